//! The gRPC server: configuration, the state the handlers share, and `run`,
//! which serves every service (with health and reflection) on a listener
//! the caller binds until the caller's shutdown future completes.

use std::future::Future;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tonic::Status;
use tonic::codegen::http;
use tonic::metadata::MetadataMap;

use super::attributions::AttributionsService;
use super::auth::{Access, Tokens};
use super::diagnostics::DiagnosticsService;
use super::pool::ComputePool;
use super::proto;
use super::proto::attributions_server::AttributionsServer;
use super::proto::diagnostics_server::DiagnosticsServer;
use super::proto::registry_server::RegistryServer;
use super::registry_api::{RegistryService, set_registered_models};
use super::status::{ServiceError, code_label, transport_status};
use super::stream::StreamStats;
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
    /// What one Explain call may ask for.
    pub(super) limits: Limits,
    /// Most requests of one ExplainStream in flight at once.
    pub(super) stream_in_flight: usize,
    /// What every ExplainStream has read and sent, for the flow-control
    /// gauge and for tests that watch it.
    pub(super) streams: Arc<StreamStats>,
    /// The bearer tokens calls must carry; `None`: calls are not checked.
    pub(super) tokens: Option<Tokens>,
}

impl Shared {
    /// Whether the call's token allows `access` (always, without tokens).
    pub(super) fn authorize(&self, metadata: &MetadataMap, access: Access) -> Result<(), Status> {
        match &self.tokens {
            Some(tokens) => tokens.check(metadata, access),
            None => Ok(()),
        }
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
        let mut state = State::new(Arc::new(registry), config);
        Arc::get_mut(&mut state.shared)
            .expect("the state is not shared yet")
            .tokens = tokens;
        Ok((state, problems))
    }

    pub fn new(registry: Arc<Registry>, config: &Config) -> State {
        State {
            shared: Arc::new(Shared {
                registry,
                pool: ComputePool::new(config.compute_threads),
                default_budget: config.default_budget,
                deadline_margin: config.deadline_margin,
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

/// Serves every service (with health and reflection) on `listener` until
/// `shutdown` completes; in-flight calls then finish before it returns.
pub async fn run(
    listener: TcpListener,
    state: State,
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

    let (health_reporter, health) = tonic_health::server::health_reporter();
    health_reporter
        .set_serving::<RegistryServer<RegistryService>>()
        .await;
    health_reporter
        .set_serving::<AttributionsServer<AttributionsService>>()
        .await;
    health_reporter
        .set_serving::<DiagnosticsServer<DiagnosticsService>>()
        .await;

    let reflection = || {
        tonic_reflection::server::Builder::configure()
            .register_encoded_file_descriptor_set(proto::FILE_DESCRIPTOR_SET)
            .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
    };
    let reflection_v1 = reflection().build_v1()?;
    let reflection_v1alpha = reflection().build_v1alpha()?;

    let address = listener.local_addr().ok();
    tracing::info!(
        ?address,
        models = shared.registry.list().len(),
        "serving gRPC"
    );
    tonic::transport::Server::builder()
        .layer(tower::util::MapResponseLayer::new(follow_status_table))
        .add_service(health)
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(registry)
        .add_service(attributions)
        .add_service(diagnostics)
        .serve_with_incoming_shutdown(
            // Without TCP_NODELAY a multi-frame response waits on the peer's
            // delayed ACK (about 40 ms per call on loopback).
            tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
            shutdown,
        )
        .await?;
    tracing::info!("gRPC server stopped");
    Ok(())
}
