//! TLS and mutual TLS over real loopback gRPC, with certificates made here
//! by rcgen: a TLS call is answered correctly, plaintext and untrusted
//! clients are refused, mutual TLS refuses clients without a certificate
//! from its CA, a reload serves the new certificate to new connections and a
//! bad replacement keeps the old one, a slow handshake does not hold up
//! accepting, the plaintext health listener answers; and the binary refuses
//! to start without TLS or `--plaintext`, names a missing key file, and
//! reloads on SIGHUP.

use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::process::{Child, Command};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::service::proto::{self, register_model_request::Model};
use apportion::service::proto::{
    attributions_client::AttributionsClient, diagnostics_client::DiagnosticsClient,
    registry_client::RegistryClient,
};
use apportion::service::tls::HandshakeFailure;
use apportion::service::{Config, Options, ServerTls, State, TlsFiles, Transport, run_with};
use rcgen::{
    BasicConstraints, CertificateParams, CertifiedIssuer, DnType, ExtendedKeyUsagePurpose, IsCa,
    KeyPair, KeyUsagePurpose,
};
use tokio::sync::oneshot;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

/// Long enough for a loaded two-core machine, short enough that a broken
/// server fails the test instead of hanging it.
const PATIENCE: Duration = Duration::from_secs(10);

/// A certificate authority made for one test.
struct Authority {
    issuer: CertifiedIssuer<'static, KeyPair>,
}

impl Authority {
    fn new(name: &str) -> Authority {
        let mut params = CertificateParams::new(Vec::<String>::new()).unwrap();
        params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
        params.distinguished_name.push(DnType::CommonName, name);
        params.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
        Authority {
            issuer: CertifiedIssuer::self_signed(params, KeyPair::generate().unwrap()).unwrap(),
        }
    }

    fn pem(&self) -> String {
        self.issuer.pem()
    }

    /// A leaf certificate and its key, as PEM; for a server, valid for
    /// `localhost` and 127.0.0.1 (RFC 5280, section 4.2.1.6: the subject
    /// alternative names a client checks), for a client, for client auth.
    fn leaf(&self, server: bool) -> (String, String) {
        let names = if server {
            vec!["localhost".to_string(), "127.0.0.1".to_string()]
        } else {
            vec!["client.apportion.test".to_string()]
        };
        let mut params = CertificateParams::new(names).unwrap();
        params.distinguished_name.push(
            DnType::CommonName,
            if server {
                "apportion test server"
            } else {
                "apportion test client"
            },
        );
        params.extended_key_usages = vec![if server {
            ExtendedKeyUsagePurpose::ServerAuth
        } else {
            ExtendedKeyUsagePurpose::ClientAuth
        }];
        let key = KeyPair::generate().unwrap();
        let cert = params.signed_by(&key, &self.issuer).unwrap();
        (cert.pem(), key.serialize_pem())
    }
}

/// The server's files in a folder of the test's own.
fn write_server_files(dir: &Path, ca: &Authority, client_ca: Option<&Authority>) -> TlsFiles {
    let (cert, key) = ca.leaf(true);
    let files = TlsFiles {
        cert: dir.join("tls.crt"),
        key: dir.join("tls.key"),
        client_ca: client_ca.map(|_| dir.join("ca.crt")),
    };
    std::fs::write(&files.cert, cert).unwrap();
    std::fs::write(&files.key, key).unwrap();
    if let (Some(path), Some(ca)) = (&files.client_ca, client_ca) {
        std::fs::write(path, ca.pem()).unwrap();
    }
    files
}

struct TlsServer {
    address: SocketAddr,
    health_address: SocketAddr,
    tls: Arc<ServerTls>,
    stop: oneshot::Sender<()>,
    task: tokio::task::JoinHandle<Result<(), apportion::service::ServiceError>>,
    _data: tempfile::TempDir,
}

async fn start(tls: ServerTls) -> TlsServer {
    start_with_tokens(tls, None).await
}

async fn start_with_tokens(tls: ServerTls, tokens_file: Option<&Path>) -> TlsServer {
    let data = tempfile::tempdir().unwrap();
    let config = Config {
        data_dir: Some(data.path().to_path_buf()),
        compute_threads: 2,
        tokens_file: tokens_file.map(Path::to_path_buf),
        ..Config::default()
    };
    let (state, _) = State::open(&config).unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let health = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let address = listener.local_addr().unwrap();
    let health_address = health.local_addr().unwrap();
    let tls = Arc::new(tls);
    let options = Options {
        transport: Transport::Tls(tls.clone()),
        health_listener: Some(health),
    };
    let (stop, stopped) = oneshot::channel::<()>();
    let task = tokio::spawn(run_with(listener, state, options, async {
        let _ = stopped.await;
    }));
    TlsServer {
        address,
        health_address,
        tls,
        stop,
        task,
        _data: data,
    }
}

impl TlsServer {
    async fn stop(self) {
        let _ = self.stop.send(());
        tokio::time::timeout(PATIENCE, self.task)
            .await
            .expect("the server stops in time")
            .unwrap()
            .expect("the server stops cleanly");
    }
}

/// A TLS channel to `address` trusting `ca`, presenting `identity` if
/// given; `server_name` checks that name instead of the address's IP.
async fn tls_channel(
    address: SocketAddr,
    ca: &str,
    identity: Option<&(String, String)>,
    server_name: Option<&str>,
) -> Result<Channel, String> {
    let mut tls = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(ca));
    if let Some((cert, key)) = identity {
        tls = tls.identity(Identity::from_pem(cert, key));
    }
    if let Some(name) = server_name {
        tls = tls.domain_name(name);
    }
    let endpoint = Channel::from_shared(format!("https://{address}"))
        .unwrap()
        .tls_config(tls)
        .map_err(|e| e.to_string())?
        .connect_timeout(PATIENCE);
    tokio::time::timeout(PATIENCE, endpoint.connect())
        .await
        .map_err(|_| "connect timed out".to_string())?
        .map_err(|e| format!("{e:?}"))
}

/// One Echo call: what a refused handshake must make fail. Under TLS 1.3 a
/// client whose certificate the server refuses sees the refusal only on its
/// first read (RFC 8446, section 4.4.2.4), so every check makes a call.
async fn echo(channel: Channel) -> Result<Vec<u8>, String> {
    let mut client = DiagnosticsClient::new(channel);
    let mut request = tonic::Request::new(proto::EchoRequest {
        payload: b"over tls".to_vec(),
    });
    request.set_timeout(PATIENCE);
    client
        .echo(request)
        .await
        .map(|answer| answer.into_inner().payload)
        .map_err(|status| format!("{status:?}"))
}

async fn tls_echo(
    address: SocketAddr,
    ca: &str,
    identity: Option<&(String, String)>,
) -> Result<Vec<u8>, String> {
    echo(tls_channel(address, ca, identity, None).await?).await
}

/// Polls `condition` every 20 ms until it holds, failing after `PATIENCE`;
/// for counters bumped by a task the test cannot join (polled with a
/// generous cap, not a timing assertion).
async fn eventually(what: &str, condition: impl Fn() -> bool) {
    let started = Instant::now();
    while !condition() {
        assert!(started.elapsed() < PATIENCE, "never happened: {what}");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

async fn health_status(address: SocketAddr, tls_ca: Option<&str>) -> Result<i32, String> {
    use tonic_health::pb::{HealthCheckRequest, health_client::HealthClient};
    let channel = match tls_ca {
        Some(ca) => tls_channel(address, ca, None, None).await?,
        None => Channel::from_shared(format!("http://{address}"))
            .unwrap()
            .connect()
            .await
            .map_err(|e| e.to_string())?,
    };
    HealthClient::new(channel)
        .check(HealthCheckRequest {
            service: String::new(),
        })
        .await
        .map(|answer| answer.into_inner().status)
        .map_err(|status| format!("{status:?}"))
}

#[tokio::test]
async fn a_tls_call_is_answered_and_plaintext_and_untrusted_clients_are_refused() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Authority::new("apportion test CA");
    let server = start(ServerTls::load(write_server_files(dir.path(), &ca, None)).unwrap()).await;

    // A real answer over TLS: a linear model under marginal removal has
    // phi_i = w_i (x_i - mean_background x_i) ("A unified approach to
    // interpreting model predictions", NeurIPS 2017).
    let channel = tls_channel(server.address, &ca.pem(), None, None)
        .await
        .unwrap();
    let weights = [0.8, -1.5, 0.25];
    let background = [[1.0, 2.0, 3.0], [3.0, 0.0, 1.0], [2.0, 1.0, -1.0]];
    RegistryClient::new(channel.clone())
        .register_model(proto::RegisterModelRequest {
            model_id: "tls-linear".into(),
            features: ["income", "arrears", "tenure"]
                .iter()
                .map(|name| proto::Feature {
                    name: name.to_string(),
                    ..Default::default()
                })
                .collect(),
            model: Some(Model::Linear(proto::LinearModel {
                weights: weights.to_vec(),
                intercept: -0.5,
            })),
            background: Some(proto::Matrix {
                rows: 3,
                cols: 3,
                values: background.iter().flatten().copied().collect(),
            }),
            ..Default::default()
        })
        .await
        .unwrap();
    let instance = vec![4.0, 1.0, 2.0];
    let answer = AttributionsClient::new(channel.clone())
        .explain(proto::ExplainRequest {
            model_id: "tls-linear".into(),
            instance: instance.clone(),
            estimator: proto::Estimator::LinearExact as i32,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    for (i, attribution) in answer.attributions.iter().enumerate() {
        let mean = background.iter().map(|row| row[i]).sum::<f64>() / 3.0;
        let expected = weights[i] * (instance[i] - mean);
        assert!(
            (attribution.value - expected).abs() < 1e-12,
            "{}: {} vs {expected}",
            attribution.name,
            attribution.value
        );
    }
    assert!(server.tls.stats().handshakes() >= 1);
    // The certificate's DNS name is checked as well as its IP address.
    let by_name = tls_channel(server.address, &ca.pem(), None, Some("localhost"))
        .await
        .unwrap();
    assert_eq!(echo(by_name).await.unwrap(), b"over tls");
    let wrong_name = tls_channel(server.address, &ca.pem(), None, Some("elsewhere.test")).await;
    assert!(
        wrong_name.is_err(),
        "a certificate without the name is refused"
    );

    // Plaintext HTTP/2 against the TLS port: the server's handshake fails
    // on the client's preface, and the call with it.
    let plaintext = Channel::from_shared(format!("http://{}", server.address))
        .unwrap()
        .connect()
        .await;
    if let Ok(channel) = plaintext {
        assert!(
            echo(channel).await.is_err(),
            "a plaintext call to the TLS port failed"
        );
    }
    // A client that trusts another CA refuses the server's certificate.
    let stranger = Authority::new("another CA");
    assert!(
        tls_echo(server.address, &stranger.pem(), None)
            .await
            .is_err()
    );
    let stats = server.tls.clone();
    eventually("the plaintext client's handshake counted as failed", || {
        stats.stats().handshake_failures(HandshakeFailure::Protocol) >= 1
    })
    .await;

    // The plaintext health listener answers SERVING, as the TLS port's own
    // health service does, and serves nothing else.
    let serving = tonic_health::pb::health_check_response::ServingStatus::Serving as i32;
    assert_eq!(
        health_status(server.health_address, None).await,
        Ok(serving)
    );
    assert_eq!(
        health_status(server.address, Some(&ca.pem())).await,
        Ok(serving)
    );
    let health_port = Channel::from_shared(format!("http://{}", server.health_address))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let refused = DiagnosticsClient::new(health_port)
        .echo(proto::EchoRequest::default())
        .await
        .unwrap_err();
    assert_eq!(refused.code(), tonic::Code::Unimplemented, "{refused:?}");
    drop(channel);
    server.stop().await;
}

#[tokio::test]
async fn mutual_tls_admits_only_clients_with_a_certificate_from_its_ca() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Authority::new("apportion test CA");
    let clients = Authority::new("apportion client CA");
    let stranger = Authority::new("another CA");
    let server =
        start(ServerTls::load(write_server_files(dir.path(), &ca, Some(&clients))).unwrap()).await;

    // RFC 8446, section 4.4.2.4: a server that requires a client
    // certificate aborts the handshake when none is sent or it cannot be
    // verified.
    let without = tls_echo(server.address, &ca.pem(), None).await;
    assert!(without.is_err(), "no client certificate: {without:?}");
    let foreign = stranger.leaf(false);
    let with_foreign = tls_echo(server.address, &ca.pem(), Some(&foreign)).await;
    assert!(
        with_foreign.is_err(),
        "a certificate from another CA: {with_foreign:?}"
    );
    let good = clients.leaf(false);
    assert_eq!(
        tls_echo(server.address, &ca.pem(), Some(&good)).await,
        Ok(b"over tls".to_vec())
    );
    let stats = server.tls.clone();
    eventually("both refused clients counted", || {
        stats
            .stats()
            .handshake_failures(HandshakeFailure::ClientCertificate)
            >= 2
    })
    .await;
    server.stop().await;
}

#[tokio::test]
async fn a_reload_serves_the_new_certificate_and_a_bad_one_keeps_the_old() {
    let dir = tempfile::tempdir().unwrap();
    let old_ca = Authority::new("old CA");
    let files = write_server_files(dir.path(), &old_ca, None);
    let server = start(ServerTls::load(files.clone()).unwrap()).await;
    let open = tls_channel(server.address, &old_ca.pem(), None, None)
        .await
        .unwrap();
    assert!(echo(open.clone()).await.is_ok());

    // A certificate from a new CA in the same files.
    let new_ca = Authority::new("new CA");
    write_server_files(dir.path(), &new_ca, None);
    server.tls.reload().unwrap();
    assert_eq!(server.tls.stats().reloads(), 1);
    assert!(
        tls_echo(server.address, &new_ca.pem(), None).await.is_ok(),
        "a client trusting only the new CA connects"
    );
    assert!(
        tls_echo(server.address, &old_ca.pem(), None).await.is_err(),
        "a client trusting only the old CA is refused"
    );
    // A connection made before the reload keeps its session.
    assert!(echo(open).await.is_ok());

    // A corrupt certificate, then a key that is not the certificate's: each
    // reload fails naming the setting, and the new CA's certificate serves on.
    std::fs::write(&files.cert, "-----BEGIN CERTIFICATE-----\nnot base64\n").unwrap();
    let error = server.tls.reload().unwrap_err().to_string();
    assert!(error.starts_with("tls_cert_file"), "{error}");
    let (cert, _) = new_ca.leaf(true);
    std::fs::write(&files.cert, cert).unwrap();
    let (_, other_key) = new_ca.leaf(true);
    std::fs::write(&files.key, other_key).unwrap();
    let error = server.tls.reload().unwrap_err().to_string();
    assert!(error.starts_with("tls_key_file"), "{error}");
    std::fs::remove_file(&files.key).unwrap();
    let error = server.tls.reload().unwrap_err().to_string();
    assert!(
        error.starts_with("tls_key_file") && error.contains("tls.key"),
        "{error}"
    );
    assert_eq!(server.tls.stats().failed_reloads(), 3);
    assert_eq!(server.tls.stats().reloads(), 1);
    assert!(
        tls_echo(server.address, &new_ca.pem(), None).await.is_ok(),
        "the last good certificate still serves"
    );
    server.stop().await;
}

#[tokio::test]
async fn a_changed_file_is_reloaded_without_a_signal() {
    let dir = tempfile::tempdir().unwrap();
    let old_ca = Authority::new("old CA");
    let tls = ServerTls::load(write_server_files(dir.path(), &old_ca, None)).unwrap();
    let server = start(tls).await;
    let watcher = server.tls.watch(Duration::from_millis(50));
    let new_ca = Authority::new("new CA");
    write_server_files(dir.path(), &new_ca, None);
    // Polled with a generous cap: the watcher's period is not under test.
    let started = Instant::now();
    while tls_echo(server.address, &new_ca.pem(), None).await.is_err() {
        assert!(
            started.elapsed() < PATIENCE,
            "the change was never picked up"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert_eq!(server.tls.stats().failed_reloads(), 0);
    watcher.abort();
    // Unchanged files are not reloaded again.
    let reloads = server.tls.stats().reloads();
    assert!(server.tls.reload_if_changed().is_none());
    assert_eq!(server.tls.stats().reloads(), reloads);

    // A certificate written without its key yet: the poll that sees it
    // waits; the key arrives before the next one, and the pair loads
    // together, with no failed reload in between.
    let newest = Authority::new("newest CA");
    let (cert, key) = newest.leaf(true);
    std::fs::write(dir.path().join("tls.crt"), cert).unwrap();
    assert!(
        server.tls.reload_if_changed().is_none(),
        "the first sight waits"
    );
    std::fs::write(dir.path().join("tls.key"), key).unwrap();
    assert!(
        server.tls.reload_if_changed().is_none(),
        "changed again: waits"
    );
    assert!(matches!(server.tls.reload_if_changed(), Some(Ok(()))));
    assert_eq!(server.tls.stats().failed_reloads(), 0);
    assert!(tls_echo(server.address, &newest.pem(), None).await.is_ok());
    server.stop().await;
}

#[tokio::test]
async fn a_silent_peer_neither_blocks_accepting_nor_stays_forever() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Authority::new("apportion test CA");
    let files = write_server_files(dir.path(), &ca, None);

    // With a handshake timeout far beyond the client's patience, a
    // connection that never speaks must not delay the next one: with an
    // accept loop that waited on it, the call below would time out.
    let patient = start(
        ServerTls::load(files.clone())
            .unwrap()
            .with_handshake_timeout(Duration::from_secs(600)),
    )
    .await;
    let silent = TcpStream::connect(patient.address).unwrap();
    assert!(tls_echo(patient.address, &ca.pem(), None).await.is_ok());
    assert_eq!(
        patient
            .tls
            .stats()
            .handshake_failures(HandshakeFailure::Timeout),
        0
    );
    drop(silent);
    patient.stop().await;

    // With a short one, the silent connection is closed and counted.
    let strict = start(
        ServerTls::load(files)
            .unwrap()
            .with_handshake_timeout(Duration::from_millis(200)),
    )
    .await;
    let silent = TcpStream::connect(strict.address).unwrap();
    let stats = strict.tls.clone();
    eventually("the silent peer timed out", || {
        stats.stats().handshake_failures(HandshakeFailure::Timeout) == 1
    })
    .await;
    silent.set_read_timeout(Some(PATIENCE)).unwrap();
    let mut byte = [0u8; 1];
    let read = std::io::Read::read(&mut &silent, &mut byte);
    assert!(
        matches!(read, Ok(0)) || read.is_err(),
        "the server closed the connection: {read:?}"
    );
    strict.stop().await;
}

/// The binary, with no setting inherited from the environment.
fn apportion() -> Command {
    let mut command = Command::new(env!("CARGO_BIN_EXE_apportion"));
    for (variable, _) in std::env::vars_os() {
        if variable.to_string_lossy().starts_with("APPORTION_") {
            command.env_remove(variable);
        }
    }
    command.env_remove("RUST_LOG");
    command
}

fn free_address() -> SocketAddr {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
}

fn serve_output(dir: &Path, extra: &[&str]) -> (bool, String) {
    let output = apportion()
        .args([
            "serve",
            "--address",
            "127.0.0.1:0",
            "--metrics-address",
            "127.0.0.1:0",
        ])
        .arg("--data-dir")
        .arg(dir.join("registry"))
        .args(extra)
        .output()
        .unwrap();
    (
        output.status.success(),
        String::from_utf8_lossy(&output.stderr).into_owned(),
    )
}

#[test]
fn the_binary_refuses_to_start_without_tls_or_plaintext_and_names_bad_files() {
    let dir = tempfile::tempdir().unwrap();
    let (ok, stderr) = serve_output(dir.path(), &[]);
    assert!(!ok);
    assert!(
        stderr.contains("tls_cert_file") && stderr.contains("plaintext"),
        "{stderr}"
    );
    assert!(
        !dir.path().join("registry").exists(),
        "nothing was opened before the refusal"
    );

    let files = write_server_files(dir.path(), &Authority::new("CA"), None);
    let missing = dir.path().join("absent.key");
    let cert = files.cert.to_str().unwrap();
    let (ok, stderr) = serve_output(
        dir.path(),
        &[
            "--tls-cert-file",
            cert,
            "--tls-key-file",
            missing.to_str().unwrap(),
        ],
    );
    assert!(!ok);
    assert!(
        stderr.contains("tls_key_file") && stderr.contains("absent.key"),
        "{stderr}"
    );
    let (ok, stderr) = serve_output(dir.path(), &["--tls-cert-file", cert]);
    assert!(!ok);
    assert!(stderr.contains("tls_key_file"), "{stderr}");

    let corrupt = dir.path().join("corrupt.crt");
    std::fs::write(&corrupt, "no certificate here\n").unwrap();
    let (ok, stderr) = serve_output(
        dir.path(),
        &[
            "--tls-cert-file",
            corrupt.to_str().unwrap(),
            "--tls-key-file",
            files.key.to_str().unwrap(),
        ],
    );
    assert!(!ok);
    assert!(
        stderr.contains("tls_cert_file") && stderr.contains("corrupt.crt"),
        "{stderr}"
    );
}

/// The binary serving TLS, killed when dropped.
struct Binary(Child);

impl Drop for Binary {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

#[tokio::test]
async fn the_binary_serves_tls_and_reloads_on_sighup() {
    let dir = tempfile::tempdir().unwrap();
    let old_ca = Authority::new("old CA");
    write_server_files(dir.path(), &old_ca, None);
    let address = free_address();
    let health = free_address();
    let settings = dir.path().join("serve.toml");
    // Relative paths are taken from the settings file's folder; polling is
    // off, so only the signal can reload.
    std::fs::write(
        &settings,
        format!(
            "address = \"{address}\"\nhealth_address = \"{health}\"\nmetrics_address = \"{}\"\n\
             data_dir = \"registry\"\nlog_filter = \"error\"\ntls_cert_file = \"tls.crt\"\n\
             tls_key_file = \"tls.key\"\ntls_poll_seconds = 0\n",
            free_address()
        ),
    )
    .unwrap();
    let child = Binary(
        apportion()
            .args(["serve", "--config"])
            .arg(&settings)
            .spawn()
            .unwrap(),
    );
    let started = Instant::now();
    while TcpStream::connect(address).is_err() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "the server never listened"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    assert!(tls_echo(address, &old_ca.pem(), None).await.is_ok());
    let serving = tonic_health::pb::health_check_response::ServingStatus::Serving as i32;
    assert_eq!(health_status(health, None).await, Ok(serving));

    let new_ca = Authority::new("new CA");
    write_server_files(dir.path(), &new_ca, None);
    // POSIX kill(1) sends the signal; the project has no libc binding.
    let sent = Command::new("kill")
        .args(["-HUP", &child.0.id().to_string()])
        .status()
        .unwrap();
    assert!(sent.success());
    // Polled with a generous cap: how soon the signal is handled is not
    // under test.
    let started = Instant::now();
    while tls_echo(address, &new_ca.pem(), None).await.is_err() {
        assert!(started.elapsed() < PATIENCE, "SIGHUP never reloaded");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(tls_echo(address, &old_ca.pem(), None).await.is_err());
    drop(child);
}

#[tokio::test]
async fn the_thin_client_speaks_mutual_tls_and_sends_its_token() {
    let dir = tempfile::tempdir().unwrap();
    let ca = Authority::new("apportion test CA");
    let clients = Authority::new("apportion client CA");
    let files = write_server_files(dir.path(), &ca, Some(&clients));
    let token = "thin-client-admin-token";
    let tokens = dir.path().join("tokens");
    std::fs::write(
        &tokens,
        format!(
            "{} admin thin-client\n",
            apportion::service::auth::digest_line(token)
        ),
    )
    .unwrap();
    let server = start_with_tokens(ServerTls::load(files).unwrap(), Some(&tokens)).await;
    let (cert, key) = clients.leaf(false);
    let ca_file = dir.path().join("server-ca.crt");
    let cert_file = dir.path().join("client.crt");
    let key_file = dir.path().join("client.key");
    std::fs::write(&ca_file, ca.pem()).unwrap();
    std::fs::write(&cert_file, cert).unwrap();
    std::fs::write(&key_file, key).unwrap();
    let model = dir.path().join("model.json");
    std::fs::write(
        &model,
        serde_json::json!({
            "model_id": "thin-tls",
            "features": [{"name": "a"}, {"name": "b"}],
            "model": {"kind": "linear", "weights": [1.0, 2.0], "intercept": 0.0},
            "background": [[0.0, 1.0], [2.0, 3.0]],
        })
        .to_string(),
    )
    .unwrap();

    let address = server.address.to_string();
    let run = |args: Vec<std::ffi::OsString>, token: Option<&str>| {
        let mut command = tokio::process::Command::new(env!("CARGO_BIN_EXE_apportion"));
        for (variable, _) in std::env::vars_os() {
            if variable.to_string_lossy().starts_with("APPORTION_") {
                command.env_remove(variable);
            }
        }
        if let Some(token) = token {
            command.env("APPORTION_TOKEN", token);
        }
        command.args(args);
        async move {
            let output = tokio::time::timeout(PATIENCE, command.output())
                .await
                .expect("the client finishes")
                .unwrap();
            (
                output.status.success(),
                String::from_utf8_lossy(&output.stdout).into_owned(),
                String::from_utf8_lossy(&output.stderr).into_owned(),
            )
        }
    };
    let flags = |command: &str, tls: &[(&str, &Path)]| {
        let mut args: Vec<std::ffi::OsString> =
            vec![command.into(), "--address".into(), address.clone().into()];
        for (flag, path) in tls {
            args.push(flag.into());
            args.push(path.into());
        }
        if command == "register" {
            args.push("--model".into());
            args.push(model.clone().into());
        }
        args
    };
    let full = [
        ("--tls-ca", ca_file.as_path()),
        ("--tls-cert", cert_file.as_path()),
        ("--tls-key", key_file.as_path()),
    ];

    let (ok, stdout, stderr) = run(flags("register", &full), Some(token)).await;
    assert!(ok, "{stdout}{stderr}");
    let (ok, stdout, stderr) = run(flags("models", &full), Some(token)).await;
    assert!(ok && stdout.contains("\"thin-tls\""), "{stdout}{stderr}");

    // Without the token: UNAUTHENTICATED (auth.rs), and the token never
    // shows in what the client prints.
    let (ok, _, stderr) = run(flags("models", &full), None).await;
    assert!(!ok);
    assert!(
        stderr.contains("authorization: send `Bearer TOKEN`"),
        "{stderr}"
    );
    let (ok, _, stderr) = run(flags("models", &full), Some("wrong-token")).await;
    assert!(!ok && !stderr.contains("wrong-token"), "{stderr}");
    // Without a client certificate the server refuses the handshake.
    let (ok, _, stderr) = run(flags("models", &full[..1]), Some(token)).await;
    assert!(!ok, "{stderr}");
    // The name checked instead of the address's IP: the certificate's DNS
    // name passes, another name does not.
    let mut named = flags("models", &full);
    named.extend(["--tls-server-name".into(), "localhost".into()]);
    let (ok, _, stderr) = run(named, Some(token)).await;
    assert!(ok, "{stderr}");
    let mut misnamed = flags("models", &full);
    misnamed.extend(["--tls-server-name".into(), "elsewhere.test".into()]);
    let (ok, _, stderr) = run(misnamed, Some(token)).await;
    assert!(!ok, "{stderr}");
    // Half an identity, and plaintext to the TLS port.
    let (ok, _, stderr) = run(flags("models", &full[..2]), Some(token)).await;
    assert!(!ok && stderr.contains("--tls-key"), "{stderr}");
    let (ok, _, stderr) = run(flags("models", &[]), Some(token)).await;
    assert!(!ok, "{stderr}");
    server.stop().await;
}
