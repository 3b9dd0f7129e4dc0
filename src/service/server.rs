//! The gRPC server: configuration, the state the handlers share, and `run`,
//! which serves every service (with health and reflection) on a listener
//! the caller binds until the caller's shutdown future completes; `run_with`
//! serves it over TLS, and can add a plaintext listener for health probes.

use std::future::Future;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tonic::Status;
use tonic::codegen::http;
use tonic::metadata::MetadataMap;

use super::attribution_log::{AttributionLog, LogSettings};
use super::attributions::AttributionsService;
use super::auth::{Access, Tokens};
use super::deadline::Reserve;
use super::diagnostics::DiagnosticsService;
use super::drain::{Drain, Flight};
use super::monitoring::MonitoringService;
use super::pool::ComputePool;
use super::proto;
use super::proto::attributions_server::AttributionsServer;
use super::proto::diagnostics_server::DiagnosticsServer;
use super::proto::monitoring_server::MonitoringServer;
use super::proto::registry_server::RegistryServer;
use super::registry_api::{RegistryService, set_registered_models};
use super::status::{ServiceError, code_label, transport_status};
use super::stream::StreamStats;
use super::tls::{self, ServerTls, TlsFiles};
use crate::drift::DriftTracker;
use crate::registry::{LoadProblem, Registry, StoreUrl};
use crate::telemetry::{self, LogFormat};

/// Server settings with their defaults. A plain struct: the binary fills it
/// from flags, environment or a file.
#[derive(Debug, Clone)]
pub struct Config {
    /// Where gRPC is served.
    pub address: SocketAddr,
    /// The registry's directory; `None` uses the registry's default
    /// (`$XDG_DATA_HOME/apportion` or `~/.local/share/apportion`).
    pub data_dir: Option<PathBuf>,
    /// The PostgreSQL database the registry is kept in, in place of the
    /// directory, so that several replicas share it; `None`: the directory.
    pub store: Option<StoreUrl>,
    /// With `store`: how often every record is listed again, in case a
    /// notification was missed (a lost listening connection also starts
    /// one).
    pub store_reread: Duration,
    /// Where Prometheus scrapes metrics; `None` records none.
    pub metrics_address: Option<SocketAddr>,
    pub log_format: LogFormat,
    /// `RUST_LOG`-style filter for log lines.
    pub log_filter: String,
    /// Budget of an Explain call that asks for none (`budget_ms = 0`).
    pub default_budget: Duration,
    /// Kept back from a call's gRPC deadline so the answer can still be
    /// encoded and sent in time.
    pub deadline_margin: Duration,
    /// Explain calls computed at once; more wait for a free thread until
    /// their deadline.
    pub compute_threads: usize,
    /// Largest request or response message accepted, in bytes.
    pub max_message_bytes: usize,
    /// Largest `budget_ms` an Explain call may ask for: a call holds a
    /// compute thread for up to its budget.
    pub max_budget: Duration,
    /// Largest `max_evaluations` a call may ask for: each evaluation is
    /// kept in the per-request cache (tens of bytes) and costs its model
    /// rows.
    pub max_evaluations: u64,
    /// Largest `draws` a call may ask for: each draw is a model row per
    /// coalition, held in memory with the coalition's batch.
    pub max_draws: u32,
    /// Most model rows one coalition value may cost (draws or background
    /// rows, times DATASET_LOSS rows): they are filled as one block.
    pub max_coalition_rows: usize,
    /// The token file (digests and roles); `None`: no authentication.
    pub tokens_file: Option<PathBuf>,
    /// Most instances one ExplainBatch call may carry: the call's request,
    /// its answers and their jobs are held in memory at once.
    pub max_batch_instances: usize,
    /// Most requests of one ExplainStream computed or waiting to be sent
    /// at once; the server reads the stream's next request only below it,
    /// so a slow reader holds at most this many answers in the server.
    pub max_stream_in_flight: usize,
    /// How long calls in flight may take to finish once the server is
    /// asked to stop; computations still running then are cancelled.
    pub drain_timeout: Duration,
    /// Where every explanation answered OK is logged; `None`: nowhere.
    pub attribution_log: Option<LogSettings>,
    /// Length of the attribution-drift windows.
    pub drift_window: Duration,
    /// Drift windows kept per model version (at least 2).
    pub drift_windows: usize,
    /// The server's certificate and key, and the client CA for mutual TLS;
    /// `None` serves plaintext, which the binary allows only with
    /// `plaintext`.
    pub tls: Option<TlsFiles>,
    /// How often the TLS files are checked for a change; zero: only on
    /// SIGHUP.
    pub tls_poll_interval: Duration,
    /// Serving without TLS was asked for explicitly; the binary refuses to
    /// start with neither this nor `tls`, so plaintext is never an accident.
    pub plaintext: bool,
    /// A plaintext listener serving only `grpc.health.v1`, for probes that
    /// cannot speak TLS (the kubelet's native gRPC probes).
    pub health_address: Option<SocketAddr>,
}

impl Default for Config {
    fn default() -> Config {
        Config {
            address: SocketAddr::from(([127, 0, 0, 1], 50051)),
            data_dir: None,
            store: None,
            store_reread: Duration::from_secs(30),
            metrics_address: Some(SocketAddr::from(([127, 0, 0, 1], 9464))),
            log_format: LogFormat::Human,
            log_filter: "info".to_string(),
            default_budget: Duration::from_millis(200),
            deadline_margin: Duration::from_millis(5),
            compute_threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            max_message_bytes: 64 * 1024 * 1024,
            max_budget: Duration::from_secs(60),
            max_evaluations: 1 << 22,
            max_draws: crate::engine::job::MAX_DRAWS as u32,
            max_coalition_rows: crate::engine::job::DEFAULT_MAX_COALITION_ROWS,
            tokens_file: None,
            max_batch_instances: 1024,
            max_stream_in_flight: 16,
            // Inside Kubernetes' default 30 s grace period, with room for
            // the cancelled computations to answer.
            drain_timeout: Duration::from_secs(20),
            attribution_log: None,
            drift_window: Duration::from_secs(3600),
            // Two days of hourly windows.
            drift_windows: 48,
            tls: None,
            tls_poll_interval: tls::DEFAULT_POLL_INTERVAL,
            plaintext: false,
            health_address: None,
        }
    }
}

/// Everything the handlers share.
#[derive(Debug)]
pub(super) struct Shared {
    pub(super) registry: Arc<Registry>,
    pub(super) pool: ComputePool,
    pub(super) default_budget: Duration,
    pub(super) deadline_margin: Duration,
    /// Kept back from an Explain's budget for the answer's way out.
    pub(super) reserve: Reserve,
    /// What one Explain call may ask for.
    pub(super) limits: Limits,
    /// Most requests of one ExplainStream in flight at once.
    pub(super) stream_in_flight: usize,
    /// What every ExplainStream has read and sent, for the flow-control
    /// gauge and for tests that watch it.
    pub(super) streams: Arc<StreamStats>,
    /// The bearer tokens calls must carry; `None`: calls are not checked.
    pub(super) tokens: Option<Tokens>,
    /// The calls in flight, and whether the server is draining.
    pub(super) drain: Arc<Drain>,
    pub(super) drain_timeout: Duration,
    pub(super) log: Option<AttributionLog>,
    /// Every answer's attributions, in time windows.
    pub(super) drift: DriftTracker,
}

impl Shared {
    /// Admits a call: refused while the server drains, and unless its
    /// token allows `access` (always, without tokens). The call counts as
    /// in flight until the returned guard is dropped.
    pub(super) fn admit(&self, metadata: &MetadataMap, access: Access) -> Result<Flight, Status> {
        let flight = self.drain.enter().map_err(Status::from)?;
        if let Some(tokens) = &self.tokens {
            tokens.check(metadata, access)?;
        }
        Ok(flight)
    }
}

/// The server's maxima for the request fields that size an Explain call's
/// work; a request over one is refused naming the field and the maximum.
#[derive(Debug, Clone, Copy)]
pub(super) struct Limits {
    pub(super) budget: Duration,
    pub(super) evaluations: u64,
    pub(super) draws: u32,
    pub(super) coalition_rows: usize,
    pub(super) batch_instances: usize,
}

/// The state `run` serves: the registry and the settings the handlers need.
#[derive(Debug)]
pub struct State {
    shared: Arc<Shared>,
    max_message_bytes: usize,
}

impl State {
    /// Opens the registry in `config.store`, else `config.data_dir` (or the
    /// default directory). Records that could not be loaded are returned
    /// for the caller to log; they are never served.
    pub fn open(config: &Config) -> Result<(State, Vec<LoadProblem>), ServiceError> {
        let (registry, problems) = match (&config.store, &config.data_dir) {
            (Some(url), _) => Registry::open_postgres(url, config.store_reread)?,
            (None, Some(dir)) => Registry::open(dir)?,
            (None, None) => Registry::open_default()?,
        };
        let tokens = match &config.tokens_file {
            Some(path) => Some(Tokens::load(path)?),
            None => {
                tracing::warn!(
                    "no token file: every call is accepted; set tokens_file before exposing the port"
                );
                None
            }
        };
        let log = match &config.attribution_log {
            Some(settings) => {
                Some(AttributionLog::open(settings).map_err(ServiceError::AttributionLog)?)
            }
            None => None,
        };
        let mut state = State::new(Arc::new(registry), config);
        let shared = Arc::get_mut(&mut state.shared).expect("the state is not shared yet");
        shared.tokens = tokens;
        shared.log = log;
        Ok((state, problems))
    }

    pub fn new(registry: Arc<Registry>, config: &Config) -> State {
        State {
            shared: Arc::new(Shared {
                registry,
                pool: ComputePool::new(config.compute_threads),
                default_budget: config.default_budget,
                deadline_margin: config.deadline_margin,
                reserve: Reserve::default(),
                limits: Limits {
                    budget: config.max_budget,
                    evaluations: config.max_evaluations,
                    draws: config.max_draws,
                    coalition_rows: config.max_coalition_rows,
                    batch_instances: config.max_batch_instances,
                },
                stream_in_flight: config.max_stream_in_flight.max(1),
                streams: Arc::new(StreamStats::default()),
                tokens: None,
                drain: Arc::new(Drain::default()),
                drain_timeout: config.drain_timeout,
                log: None,
                drift: DriftTracker::new(
                    config.drift_window.as_millis() as u64,
                    config.drift_windows,
                ),
            }),
            max_message_bytes: config.max_message_bytes,
        }
    }

    pub fn registry(&self) -> &Arc<Registry> {
        &self.shared.registry
    }

    /// The ExplainStream counters of this server: requests read, answers
    /// handed to the transport, and the most one stream had in flight.
    pub fn stream_stats(&self) -> &Arc<StreamStats> {
        &self.shared.streams
    }
}

/// Counts the call by rpc and status code and logs refusals.
pub(super) fn observe<T>(rpc: &'static str, result: &Result<T, Status>) {
    let code = match result {
        Ok(_) => tonic::Code::Ok,
        Err(status) => status.code(),
    };
    metrics::counter!(telemetry::REQUESTS, "rpc" => rpc, "code" => code_label(code)).increment(1);
    match result {
        Err(status) if status.code() == tonic::Code::Internal => {
            tracing::error!(rpc, message = status.message(), "internal error");
        }
        Err(status) => tracing::debug!(rpc, code = code_label(code), message = status.message()),
        Ok(_) => tracing::debug!(rpc, "ok"),
    }
}

/// Rewrites the statuses tonic makes itself where gRPC's table says
/// otherwise ([`transport_status`]): in the headers of a trailers-only
/// answer (a request refused before its handler ran) and in the trailers of
/// a streamed one (an answer refused while encoding).
fn follow_status_table(
    response: http::Response<tonic::body::Body>,
) -> http::Response<tonic::body::Body> {
    use http_body_util::BodyExt;

    fn rewrite(headers: &mut http::HeaderMap) {
        let Some(status) = Status::from_header_map(headers) else {
            return;
        };
        if let Some(mapped) = transport_status(&status) {
            for name in ["grpc-status", "grpc-message", "grpc-status-details-bin"] {
                headers.remove(name);
            }
            // Only fails on a message that cannot be a header value, which
            // ours (ASCII text) always can.
            let _ = mapped.add_header(headers);
        }
    }
    let (mut parts, body) = response.into_parts();
    rewrite(&mut parts.headers);
    let body = body.map_frame(|frame| match frame.into_trailers() {
        Ok(mut trailers) => {
            rewrite(&mut trailers);
            http_body::Frame::trailers(trailers)
        }
        Err(frame) => frame,
    });
    http::Response::from_parts(parts, tonic::body::Body::new(body))
}

/// How the main listener is served.
#[derive(Debug, Clone, Default)]
pub enum Transport {
    /// gRPC over plain TCP (HTTP/2 without TLS).
    #[default]
    Plaintext,
    /// gRPC over TLS with this configuration, reloadable while serving.
    Tls(Arc<ServerTls>),
}

/// What `run_with` serves beside the services themselves.
#[derive(Debug, Default)]
pub struct Options {
    pub transport: Transport,
    /// A plaintext listener serving only `grpc.health.v1`, with the same
    /// statuses as the main listener's health service.
    pub health_listener: Option<TcpListener>,
}

/// Serves every service (with health and reflection) on `listener` in
/// plaintext until `shutdown` completes and the server has drained (see
/// [`drain`]).
pub async fn run(
    listener: TcpListener,
    state: State,
    shutdown: impl Future<Output = ()> + Send,
) -> Result<(), ServiceError> {
    run_with(listener, state, Options::default(), shutdown).await
}

/// As [`run`], over the transport in `options`, and with the plaintext
/// health listener if it has one; both stop when `shutdown` completes (or
/// when either fails).
pub async fn run_with(
    listener: TcpListener,
    state: State,
    options: Options,
    shutdown: impl Future<Output = ()> + Send,
) -> Result<(), ServiceError> {
    let limit = state.max_message_bytes;
    let shared = state.shared;
    set_registered_models(&shared.registry);

    let registry = RegistryServer::new(RegistryService {
        shared: shared.clone(),
    })
    .max_decoding_message_size(limit)
    .max_encoding_message_size(limit);
    let attributions = AttributionsServer::new(AttributionsService {
        shared: shared.clone(),
    })
    .max_decoding_message_size(limit)
    .max_encoding_message_size(limit);
    let diagnostics = DiagnosticsServer::new(DiagnosticsService {
        shared: shared.clone(),
    })
    .max_decoding_message_size(limit)
    .max_encoding_message_size(limit);
    let monitoring = MonitoringServer::new(MonitoringService {
        shared: shared.clone(),
    })
    .max_decoding_message_size(limit)
    .max_encoding_message_size(limit);

    let (health_reporter, health) = tonic_health::server::health_reporter();
    set_health(&health_reporter, tonic_health::ServingStatus::Serving).await;

    let reflection = || {
        tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(proto::FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
    };
    let reflection_v1 = reflection().build_v1()?;
    let reflection_v1alpha = reflection().build_v1alpha()?;

    let address = listener.local_addr().ok();
    let tls = match &options.transport {
        Transport::Plaintext => "off",
        Transport::Tls(tls) if tls.files().client_ca.is_some() => "mutual",
        Transport::Tls(_) => "on",
    };
    tracing::info!(
        ?address,
        tls,
        models = shared.registry.list().len(),
        "serving gRPC"
    );
    let router = tonic::transport::Server::builder()
        .layer(tower::util::MapResponseLayer::new(follow_status_table))
        .add_service(health.clone())
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(registry)
        .add_service(attributions)
        .add_service(diagnostics)
        .add_service(monitoring);

    // One shutdown for both listeners: the main one drains first (the
    // health listener keeps answering NOT_SERVING meanwhile); if the main
    // one fails, the sender is dropped and the health listener stops too.
    let (stopping, stop) = tokio::sync::watch::channel(false);
    let (drained, drain_done) = tokio::sync::oneshot::channel();
    let (draining, reporter) = (&shared, &health_reporter);
    let main_shutdown = async move {
        drain(draining, reporter, shutdown).await;
        let _ = drained.send(());
        let _ = stopping.send(true);
    };
    let serving = async {
        match options.transport {
            Transport::Plaintext => {
                router
                    .serve_with_incoming_shutdown(
                        // Without TCP_NODELAY a multi-frame response waits on
                        // the peer's delayed ACK (about 40 ms per call on
                        // loopback).
                        tonic::transport::server::TcpIncoming::from(listener)
                            .with_nodelay(Some(true)),
                        main_shutdown,
                    )
                    .await
            }
            Transport::Tls(server_tls) => {
                let (incoming, accepting) = tls::accept(listener, server_tls);
                let served = router
                    .serve_with_incoming_shutdown(incoming, main_shutdown)
                    .await;
                // It ends by itself once tonic drops `incoming`; this makes
                // sure the port is released before `run_with` returns.
                accepting.abort();
                let _ = accepting.await;
                served
            }
        }
    };
    // After the drain tonic waits for every open call to end; one that
    // never does (a health Watch, a stream whose client neither reads nor
    // closes) must not keep the process from stopping.
    let cut = async {
        match drain_done.await {
            Ok(()) => tokio::time::sleep(CANCEL_GRACE).await,
            Err(_) => std::future::pending().await,
        }
    };
    let main = async {
        tokio::select! {
            served = serving => served,
            () = cut => {
                tracing::warn!("calls still open after the drain; closing their connections");
                Ok(())
            }
        }
    };
    let probes = async {
        let Some(listener) = options.health_listener else {
            return Ok(());
        };
        let mut stop = stop;
        tracing::info!(address = ?listener.local_addr().ok(), "serving grpc.health.v1 in plaintext");
        tonic::transport::Server::builder()
            .add_service(health)
            .serve_with_incoming_shutdown(
                tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
                async move {
                    let _ = stop.wait_for(|stopping| *stopping).await;
                },
            )
            .await
    };
    let (main, probes) = tokio::join!(main, probes);
    if let Some(log) = &shared.log {
        log.close();
    }
    main?;
    probes?;
    tracing::info!("gRPC server stopped");
    Ok(())
}

/// Every service's health, and the server's as a whole (the empty name).
async fn set_health(
    reporter: &tonic_health::server::HealthReporter,
    status: tonic_health::ServingStatus,
) {
    reporter.set_service_status("", status).await;
    reporter
        .set_service_status(
            <RegistryServer<RegistryService> as tonic::server::NamedService>::NAME,
            status,
        )
        .await;
    reporter
        .set_service_status(
            <AttributionsServer<AttributionsService> as tonic::server::NamedService>::NAME,
            status,
        )
        .await;
    reporter
        .set_service_status(
            <DiagnosticsServer<DiagnosticsService> as tonic::server::NamedService>::NAME,
            status,
        )
        .await;
    reporter
        .set_service_status(
            <MonitoringServer<MonitoringService> as tonic::server::NamedService>::NAME,
            status,
        )
        .await;
}

/// Once `shutdown` completes: health turns NOT_SERVING (load balancers and
/// probes stop sending calls), new calls are refused with UNAVAILABLE while
/// the listener still answers health checks, and the calls in flight get
/// the drain timeout to finish. Computations still running then are
/// cancelled (their callers get UNAVAILABLE) and given a moment to answer.
/// Completing lets tonic close the connections.
async fn drain(
    shared: &Shared,
    health: &tonic_health::server::HealthReporter,
    shutdown: impl Future<Output = ()>,
) {
    shutdown.await;
    shared.drain.begin();
    set_health(health, tonic_health::ServingStatus::NotServing).await;
    let in_flight = shared.drain.in_flight();
    tracing::info!(
        in_flight,
        drain_timeout_ms = shared.drain_timeout.as_millis() as u64,
        "stopping: health is NOT_SERVING and new calls are refused; waiting for calls in flight"
    );
    if tokio::time::timeout(shared.drain_timeout, shared.drain.idle())
        .await
        .is_err()
    {
        tracing::warn!(
            in_flight = shared.drain.in_flight(),
            "drain timeout passed; cancelling the computations still running"
        );
        shared.drain.stop();
        // Cancelled computations stop at their next check, within a batch
        // of work; a stream whose client neither reads nor closes is cut
        // when this completes.
        let _ = tokio::time::timeout(CANCEL_GRACE, shared.drain.idle()).await;
    }
}

/// How long cancelled computations get to answer after the drain timeout.
const CANCEL_GRACE: Duration = Duration::from_secs(2);
