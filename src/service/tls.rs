//! TLS on the gRPC port. [`ServerTls`] holds the rustls configuration built
//! from PEM files — the server's certificate chain and key, and for mutual
//! TLS the CA that client certificates must chain to — and rebuilds it on
//! SIGHUP or when a file changes, keeping the old one if the new files do
//! not load. [`accept`] is the accept loop: each handshake runs in a task of
//! its own under a timeout, so a slow or silent peer never holds up the
//! next connection, and tonic is handed only connections whose handshake
//! completed.

use std::io;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, RwLock};
use std::time::{Duration, SystemTime};

use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{Semaphore, mpsc};
use tokio::task::JoinHandle;
use tokio_rustls::TlsAcceptor;
use tokio_rustls::rustls::{self, ServerConfig};
use tokio_rustls::server::TlsStream;
use tokio_stream::wrappers::ReceiverStream;

use rustls::crypto::CryptoProvider;
use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, PrivateKeyDer};
use rustls::server::WebPkiClientVerifier;
use sha2::{Digest, Sha256};

use crate::telemetry;

/// Longest a TLS handshake may take by default before the connection is
/// dropped. Generous for a real client on a slow network, short enough
/// that idle sockets do not pile up (common practice, no source).
pub const DEFAULT_HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);

/// How often the files are compared with what was loaded, by default.
pub const DEFAULT_POLL_INTERVAL: Duration = Duration::from_secs(5);

/// Handshakes in progress at once; a connection over it is closed at once
/// and counted, so a flood of silent peers cannot hold unbounded sockets
/// and tasks for the handshake timeout (common practice, no source).
const MAX_PENDING_HANDSHAKES: usize = 1024;

/// Wait after a failed `accept` (out of file descriptors, for example)
/// before the next, so the loop does not spin on an error that persists.
const ACCEPT_BACKOFF: Duration = Duration::from_millis(50);

/// Where the server's certificate and key, and the client CA, are read from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TlsFiles {
    /// PEM certificate chain, the server's certificate first (`tls_cert_file`).
    pub cert: PathBuf,
    /// PEM private key (PKCS#8, PKCS#1 or SEC1) of that certificate
    /// (`tls_key_file`).
    pub key: PathBuf,
    /// PEM certificates of the CA that signs client certificates; with it
    /// every client must present one (`tls_client_ca_file`).
    pub client_ca: Option<PathBuf>,
}

/// A TLS file that cannot be used, naming its setting and path.
#[derive(Debug, thiserror::Error)]
pub enum TlsError {
    #[error("{setting} ({}): cannot be read: {source}", path.display())]
    Read {
        setting: &'static str,
        path: PathBuf,
        source: io::Error,
    },
    #[error("{setting} ({}): {message}", path.display())]
    Invalid {
        setting: &'static str,
        path: PathBuf,
        message: String,
    },
}

/// Why a handshake failed; the connection is dropped in every case.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HandshakeFailure {
    /// No handshake within the timeout (a slow or silent peer).
    Timeout,
    /// Mutual TLS: no client certificate, or one that does not chain to
    /// the client CA.
    ClientCertificate,
    /// Anything else: a plaintext client, a client that refused the
    /// server's certificate, no common protocol version or ALPN.
    Protocol,
    /// More handshakes in progress than the server allows at once.
    Overload,
}

impl HandshakeFailure {
    /// The `reason` label of `apportion_tls_handshake_failures_total`.
    pub fn label(self) -> &'static str {
        match self {
            HandshakeFailure::Timeout => "timeout",
            HandshakeFailure::ClientCertificate => "client_certificate",
            HandshakeFailure::Protocol => "protocol",
            HandshakeFailure::Overload => "overload",
        }
    }

    fn index(self) -> usize {
        self as usize
    }
}

/// What the TLS layer has done since start, for tests and for operators'
/// questions that the Prometheus counters also answer.
#[derive(Debug, Default)]
pub struct TlsStats {
    handshakes: AtomicU64,
    /// By [`HandshakeFailure`], in its order.
    failures: [AtomicU64; 4],
    reloads: AtomicU64,
    failed_reloads: AtomicU64,
}

impl TlsStats {
    /// Handshakes completed and handed to the gRPC server.
    pub fn handshakes(&self) -> u64 {
        self.handshakes.load(Ordering::Relaxed)
    }

    /// Handshakes that failed for `reason`.
    pub fn handshake_failures(&self, reason: HandshakeFailure) -> u64 {
        self.failures[reason.index()].load(Ordering::Relaxed)
    }

    /// Reloads that replaced the configuration.
    pub fn reloads(&self) -> u64 {
        self.reloads.load(Ordering::Relaxed)
    }

    /// Reloads that failed and left the previous configuration serving.
    pub fn failed_reloads(&self) -> u64 {
        self.failed_reloads.load(Ordering::Relaxed)
    }
}

/// The modification time and content digest of each file as last read; a
/// change in either (or a file appearing or vanishing) triggers a reload.
/// The digest catches a replacement within the file system's timestamp
/// granularity (certificates of one shape often have the same length).
type Stamps = Vec<Option<(SystemTime, [u8; 32])>>;

/// The server's TLS configuration, swapped whole on reload: connections
/// accepted after a reload use the new one, those already open keep theirs.
#[derive(Debug)]
pub struct ServerTls {
    files: TlsFiles,
    /// Cloned (an `Arc`) per connection; the lock is held only for that
    /// clone or the swap, never across an await.
    current: RwLock<Arc<ServerConfig>>,
    /// The files' stamps when a reload was last attempted, so a file that
    /// fails to load is not retried (and logged) on every poll.
    stamps: Mutex<Stamps>,
    /// Changed stamps seen by the last poll and not yet acted on: a change
    /// is reloaded once the files have stayed the same for one poll, so a
    /// certificate and key written one after the other are read together.
    settling: Mutex<Option<Stamps>>,
    handshake_timeout: Duration,
    stats: TlsStats,
}

impl ServerTls {
    /// Reads the files and builds the configuration; any problem is an
    /// error naming the setting and file.
    pub fn load(files: TlsFiles) -> Result<ServerTls, TlsError> {
        let stamps = stamps(&files);
        let config = build(&files)?;
        Ok(ServerTls {
            files,
            current: RwLock::new(config),
            stamps: Mutex::new(stamps),
            settling: Mutex::new(None),
            handshake_timeout: DEFAULT_HANDSHAKE_TIMEOUT,
            stats: TlsStats::default(),
        })
    }

    /// The same, with another limit on each handshake.
    pub fn with_handshake_timeout(mut self, timeout: Duration) -> ServerTls {
        self.handshake_timeout = timeout;
        self
    }

    pub fn files(&self) -> &TlsFiles {
        &self.files
    }

    pub fn stats(&self) -> &TlsStats {
        &self.stats
    }

    /// The configuration new connections get.
    pub fn current(&self) -> Arc<ServerConfig> {
        // A poisoned lock still holds a whole configuration: the swap is
        // one assignment.
        self.current
            .read()
            .unwrap_or_else(|poisoned| poisoned.into_inner())
            .clone()
    }

    /// Reads the files again and, if they load, serves new connections
    /// with them; if not, the previous configuration stays, and the error
    /// is logged, counted and returned.
    pub fn reload(&self) -> Result<(), TlsError> {
        let stamps = stamps(&self.files);
        let outcome = build(&self.files);
        *self.stamps.lock().unwrap_or_else(|p| p.into_inner()) = stamps;
        match outcome {
            Ok(config) => {
                *self.current.write().unwrap_or_else(|p| p.into_inner()) = config;
                self.stats.reloads.fetch_add(1, Ordering::Relaxed);
                metrics::counter!(telemetry::TLS_RELOADS, "outcome" => "ok").increment(1);
                tracing::info!(
                    cert = %self.files.cert.display(),
                    "TLS configuration reloaded; new connections use it"
                );
                Ok(())
            }
            Err(error) => {
                self.stats.failed_reloads.fetch_add(1, Ordering::Relaxed);
                metrics::counter!(telemetry::TLS_RELOADS, "outcome" => "failed").increment(1);
                tracing::error!(%error, "TLS reload failed; the previous certificate stays in use");
                Err(error)
            }
        }
    }

    /// One poll: reloads if the files differ from the last attempt and
    /// are as the previous poll saw them; `None` if nothing was reloaded.
    pub fn reload_if_changed(&self) -> Option<Result<(), TlsError>> {
        let now = stamps(&self.files);
        let mut settling = self.settling.lock().unwrap_or_else(|p| p.into_inner());
        if *self.stamps.lock().unwrap_or_else(|p| p.into_inner()) == now {
            *settling = None;
            return None;
        }
        if settling.as_ref() != Some(&now) {
            *settling = Some(now);
            return None;
        }
        *settling = None;
        drop(settling);
        Some(self.reload())
    }

    /// Polls the files every `every` ([`ServerTls::reload_if_changed`]) until the
    /// returned task is aborted: a change is served within two polls. Reading a few KiB of PEM is
    /// quick enough to do on the runtime.
    pub fn watch(self: &Arc<Self>, every: Duration) -> JoinHandle<()> {
        let tls = self.clone();
        tokio::spawn(async move {
            let mut ticks = tokio::time::interval(every);
            ticks.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
            loop {
                ticks.tick().await;
                // The outcome is already logged and counted.
                let _ = tls.reload_if_changed();
            }
        })
    }

    fn handshake_failed(
        &self,
        reason: HandshakeFailure,
        peer: SocketAddr,
        detail: &dyn std::fmt::Display,
    ) {
        self.stats.failures[reason.index()].fetch_add(1, Ordering::Relaxed);
        let label = reason.label();
        metrics::counter!(telemetry::TLS_HANDSHAKE_FAILURES, "reason" => label).increment(1);
        // Debug only: any peer can cause these, so at a higher level they
        // would let anyone flood the log.
        tracing::debug!(%peer, reason = label, %detail, "TLS handshake failed");
    }
}

/// Each file's stamp, `None` for one that cannot be read.
fn stamps(files: &TlsFiles) -> Stamps {
    let stamp = |path: &Path| {
        // `metadata` follows symbolic links, so a Kubernetes Secret volume
        // (which swaps a link to a new folder) is seen to change.
        let modified = std::fs::metadata(path).and_then(|m| m.modified()).ok()?;
        let digest: [u8; 32] = Sha256::digest(std::fs::read(path).ok()?).into();
        Some((modified, digest))
    };
    let mut all = vec![stamp(&files.cert), stamp(&files.key)];
    if let Some(ca) = &files.client_ca {
        all.push(stamp(ca));
    }
    all
}

fn provider() -> Arc<CryptoProvider> {
    Arc::new(rustls::crypto::ring::default_provider())
}

fn read(setting: &'static str, path: &Path) -> Result<Vec<u8>, TlsError> {
    std::fs::read(path).map_err(|source| TlsError::Read {
        setting,
        path: path.to_path_buf(),
        source,
    })
}

fn certificates(
    setting: &'static str,
    path: &Path,
) -> Result<Vec<CertificateDer<'static>>, TlsError> {
    let invalid = |message: String| TlsError::Invalid {
        setting,
        path: path.to_path_buf(),
        message,
    };
    let pem = read(setting, path)?;
    let certs = CertificateDer::pem_slice_iter(&pem)
        .collect::<Result<Vec<_>, _>>()
        .map_err(|e| invalid(format!("not PEM certificates: {e}")))?;
    if certs.is_empty() {
        return Err(invalid(
            "holds no `BEGIN CERTIFICATE` block; give the PEM certificate (chain)".into(),
        ));
    }
    Ok(certs)
}

/// The rustls configuration the files describe: TLS 1.2 and 1.3 with the
/// ring provider's safe defaults, ALPN `h2` only (gRPC runs over HTTP/2,
/// and "HTTP/2 over TLS" is identified as `h2`: RFC 9113, section 3.2), and
/// client certificates required and verified against the client CA when
/// one is given.
fn build(files: &TlsFiles) -> Result<Arc<ServerConfig>, TlsError> {
    let chain = certificates("tls_cert_file", &files.cert)?;
    let key_pem = read("tls_key_file", &files.key)?;
    let key = PrivateKeyDer::from_pem_slice(&key_pem).map_err(|e| TlsError::Invalid {
        setting: "tls_key_file",
        path: files.key.clone(),
        message: format!("no PEM private key (PKCS#8, PKCS#1 or SEC1) could be read: {e}"),
    })?;
    let builder = ServerConfig::builder_with_provider(provider())
        .with_safe_default_protocol_versions()
        .map_err(|e| TlsError::Invalid {
            setting: "tls_cert_file",
            path: files.cert.clone(),
            message: format!("the TLS library refused its own defaults: {e}"),
        })?;
    let builder = match &files.client_ca {
        Some(path) => {
            let mut roots = rustls::RootCertStore::empty();
            for cert in certificates("tls_client_ca_file", path)? {
                roots.add(cert).map_err(|e| TlsError::Invalid {
                    setting: "tls_client_ca_file",
                    path: path.clone(),
                    message: format!("not a usable CA certificate: {e}"),
                })?;
            }
            // WebPKI path validation of the client's chain to these roots
            // (RFC 5280, section 6), as rustls does it.
            let verifier = WebPkiClientVerifier::builder_with_provider(Arc::new(roots), provider())
                .build()
                .map_err(|e| TlsError::Invalid {
                    setting: "tls_client_ca_file",
                    path: path.clone(),
                    message: format!("cannot verify clients with it: {e}"),
                })?;
            builder.with_client_cert_verifier(verifier)
        }
        None => builder.with_no_client_auth(),
    };
    let mut config = builder
        .with_single_cert(chain, key)
        .map_err(|e| TlsError::Invalid {
            setting: "tls_key_file",
            path: files.key.clone(),
            message: format!(
                "does not fit the certificate in tls_cert_file ({}): {e}",
                files.cert.display()
            ),
        })?;
    config.alpn_protocols = vec![b"h2".to_vec()];
    Ok(Arc::new(config))
}

/// Why a handshake failed, from the TLS library's error.
fn failure_reason(error: &io::Error) -> HandshakeFailure {
    let rustls_error = error
        .get_ref()
        .and_then(|inner| inner.downcast_ref::<rustls::Error>());
    match rustls_error {
        Some(
            rustls::Error::NoCertificatesPresented
            | rustls::Error::InvalidCertificate(_)
            | rustls::Error::InvalidCertRevocationList(_),
        ) => HandshakeFailure::ClientCertificate,
        _ => HandshakeFailure::Protocol,
    }
}

/// The connections whose handshake completed, for
/// `serve_with_incoming_shutdown`.
pub(super) type Incoming = ReceiverStream<Result<TlsStream<TcpStream>, io::Error>>;

/// Accepts on `listener` until the returned stream is dropped (tonic drops
/// it when it stops accepting, at shutdown). Each connection gets
/// TCP_NODELAY and its handshake in a task of its own, under the
/// handshake timeout; a failed handshake is counted and logged at debug,
/// and the loop goes on.
pub(super) fn accept(listener: TcpListener, tls: Arc<ServerTls>) -> (Incoming, JoinHandle<()>) {
    // Completed handshakes wait here for tonic; a full channel only delays
    // handing over, never accepting.
    let (ready, incoming) = mpsc::channel(64);
    let pending = Arc::new(Semaphore::new(MAX_PENDING_HANDSHAKES));
    let task = tokio::spawn(async move {
        loop {
            let (stream, peer) = tokio::select! {
                accepted = listener.accept() => match accepted {
                    Ok(accepted) => accepted,
                    Err(error) => {
                        tracing::warn!(%error, "accepting a connection failed");
                        tokio::time::sleep(ACCEPT_BACKOFF).await;
                        continue;
                    }
                },
                () = ready.closed() => return,
            };
            let Ok(permit) = pending.clone().try_acquire_owned() else {
                tls.handshake_failed(
                    HandshakeFailure::Overload,
                    peer,
                    &"too many handshakes in progress",
                );
                continue;
            };
            // Without TCP_NODELAY a multi-frame response waits on the peer's
            // delayed ACK (about 40 ms per call on loopback).
            let _ = stream.set_nodelay(true);
            let acceptor = TlsAcceptor::from(tls.current());
            let ready = ready.clone();
            let tls = tls.clone();
            tokio::spawn(async move {
                let _permit = permit;
                match tokio::time::timeout(tls.handshake_timeout, acceptor.accept(stream)).await {
                    Ok(Ok(stream)) => {
                        tls.stats.handshakes.fetch_add(1, Ordering::Relaxed);
                        metrics::counter!(telemetry::TLS_HANDSHAKES).increment(1);
                        // Fails only once the server has stopped accepting.
                        let _ = ready.send(Ok(stream)).await;
                    }
                    Ok(Err(error)) => tls.handshake_failed(failure_reason(&error), peer, &error),
                    Err(_) => tls.handshake_failed(
                        HandshakeFailure::Timeout,
                        peer,
                        &format_args!("no handshake within {:?}", tls.handshake_timeout),
                    ),
                }
            });
        }
    });
    (ReceiverStream::new(incoming), task)
}
