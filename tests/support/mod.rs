//! Starts a real apportion gRPC server on 127.0.0.1:0 over a data directory,
//! with generated clients connected to it, and stops it on request.

#![allow(dead_code)]

use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;

use apportion::registry::{LoadProblem, Registry};
use apportion::service::proto::attributions_client::AttributionsClient;
use apportion::service::proto::diagnostics_client::DiagnosticsClient;
use apportion::service::proto::registry_client::RegistryClient;
use apportion::service::{Config, ServiceError, State, StreamStats};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tonic::transport::Channel;

pub struct TestServer {
    pub address: SocketAddr,
    /// The server's own registry, for in-process comparisons.
    pub registry: Arc<Registry>,
    /// What the server's ExplainStreams have read and sent.
    pub streams: Arc<StreamStats>,
    pub channel: Channel,
    stop: oneshot::Sender<()>,
    task: JoinHandle<Result<(), ServiceError>>,
}

/// A server with the default settings except `compute_threads = 2`.
pub async fn start(data_dir: &Path) -> TestServer {
    let config = Config {
        data_dir: Some(data_dir.to_path_buf()),
        compute_threads: 2,
        ..Config::default()
    };
    start_with(config).await
}

pub async fn start_with(config: Config) -> TestServer {
    let (server, problems) = start_reporting(config).await;
    assert!(
        problems.is_empty(),
        "unexpected load problems: {problems:?}"
    );
    server
}

/// [`start_with`], returning the records the registry could not load
/// instead of refusing them.
pub async fn start_reporting(config: Config) -> (TestServer, Vec<LoadProblem>) {
    let (state, problems) = State::open(&config).expect("the registry opens");
    let registry = state.registry().clone();
    let streams = state.stream_stats().clone();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let address = listener.local_addr().expect("local address");
    let (stop, stopped) = oneshot::channel::<()>();
    let task = tokio::spawn(apportion::service::run(listener, state, async {
        let _ = stopped.await;
    }));
    let channel = Channel::from_shared(format!("http://{address}"))
        .expect("valid uri")
        .connect()
        .await
        .expect("the server accepts connections");
    let server = TestServer {
        address,
        registry,
        streams,
        channel,
        stop,
        task,
    };
    (server, problems)
}

impl TestServer {
    pub fn registry_client(&self) -> RegistryClient<Channel> {
        RegistryClient::new(self.channel.clone())
    }

    pub fn attributions_client(&self) -> AttributionsClient<Channel> {
        AttributionsClient::new(self.channel.clone())
    }

    pub fn diagnostics_client(&self) -> DiagnosticsClient<Channel> {
        DiagnosticsClient::new(self.channel.clone())
    }

    /// Shuts the server down and waits until it has released the data
    /// directory.
    pub async fn stop(self) {
        let TestServer {
            registry,
            channel,
            stop,
            task,
            ..
        } = self;
        drop(channel);
        drop(registry);
        let _ = stop.send(());
        task.await
            .expect("the server task ends")
            .expect("the server stops cleanly");
    }
}

/// The numbers of a JSON array, null read as NaN (fixtures write missing
/// values and NaN as null).
pub fn json_numbers(value: &serde_json::Value) -> Vec<f64> {
    value
        .as_array()
        .expect("an array")
        .iter()
        .map(|v| v.as_f64().unwrap_or(f64::NAN))
        .collect()
}

/// Largest |a − b| / max(1, |b|), and where.
pub fn worst_relative(got: &[f64], reference: &[f64]) -> (f64, usize) {
    assert_eq!(got.len(), reference.len());
    got.iter()
        .zip(reference)
        .map(|(a, b)| (a - b).abs() / b.abs().max(1.0))
        .enumerate()
        .fold(
            (0.0, 0),
            |(worst, at), (i, e)| if e > worst { (e, i) } else { (worst, at) },
        )
}

/// A loopback address with a port that was free a moment ago.
pub fn free_address() -> SocketAddr {
    std::net::TcpListener::bind("127.0.0.1:0")
        .expect("a free port")
        .local_addr()
        .expect("its address")
}

/// Starts the real `apportion serve --plaintext` on a free loopback port,
/// with a free metrics port, errors-only logs, no `APPORTION_*` setting
/// inherited from the environment, and `args` added; returns once it
/// accepts connections (at most 60 s).
pub fn spawn_binary<S: AsRef<std::ffi::OsStr>>(
    args: impl IntoIterator<Item = S>,
) -> (std::process::Child, SocketAddr) {
    use std::time::{Duration, Instant};
    let address = free_address();
    let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_apportion"));
    for (variable, _) in std::env::vars_os() {
        if variable.to_string_lossy().starts_with("APPORTION_") {
            command.env_remove(variable);
        }
    }
    let child = command
        .args(["serve", "--plaintext", "--address", &address.to_string()])
        .args(["--metrics-address", &free_address().to_string()])
        .args(["--log-filter", "error"])
        .args(args)
        .env_remove("RUST_LOG")
        .spawn()
        .expect("the binary starts");
    let started = Instant::now();
    while std::net::TcpStream::connect(address).is_err() {
        assert!(
            started.elapsed() < Duration::from_secs(60),
            "the server never listened"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    (child, address)
}

/// Installs the Prometheus exporter of this test process on a free
/// loopback port, from a plain thread so it runs on its own runtime rather
/// than the test's; one per test binary.
pub fn serve_metrics() -> SocketAddr {
    let address = free_address();
    std::thread::spawn(move || apportion::telemetry::install_metrics(address))
        .join()
        .expect("the exporter's thread")
        .expect("the exporter listens");
    address
}

/// One HTTP/1.0 GET of the metrics endpoint, read to the end.
pub async fn scrape(address: SocketAddr) -> std::io::Result<String> {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(address).await?;
    stream
        .write_all(b"GET /metrics HTTP/1.0\r\nHost: localhost\r\n\r\n")
        .await?;
    let mut response = Vec::new();
    stream.read_to_end(&mut response).await?;
    Ok(String::from_utf8_lossy(&response).into_owned())
}
