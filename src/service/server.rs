//! The gRPC server: configuration, shared state, the bounded compute pool
//! with admission control, the handlers, and `run`, which serves on a
//! listener the caller binds until the caller's shutdown future completes.

use std::future::Future;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio::net::TcpListener;
use tokio::sync::Semaphore;
use tonic::metadata::MetadataMap;
use tonic::{Request, Response, Status};

use super::convert;
use super::proto;
use super::proto::attributions_server::{Attributions, AttributionsServer};
use super::proto::diagnostics_server::{Diagnostics, DiagnosticsServer};
use super::proto::registry_server::{Registry as RegistryApi, RegistryServer};
use super::status::{ServiceError, code_label};
use crate::engine;
use crate::registry::{LoadProblem, ModelSpec, Registry};
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
}

impl Default for Config {
    fn default() -> Config {
        Config {
            address: SocketAddr::from(([127, 0, 0, 1], 50051)),
            data_dir: None,
            metrics_address: Some(SocketAddr::from(([127, 0, 0, 1], 9464))),
            log_format: LogFormat::Human,
            log_filter: "info".to_string(),
            default_budget: Duration::from_millis(200),
            deadline_margin: Duration::from_millis(5),
            compute_threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            max_message_bytes: 64 * 1024 * 1024,
        }
    }
}

/// A bounded pool for CPU work: each job holds one of `threads` permits on a
/// blocking thread, so the async reactor never computes and the number of
/// concurrent computations is capped.
#[derive(Debug, Clone)]
pub struct ComputePool {
    permits: Arc<Semaphore>,
}

impl ComputePool {
    pub fn new(threads: usize) -> ComputePool {
        ComputePool {
            permits: Arc::new(Semaphore::new(threads.max(1))),
        }
    }

    /// Runs `work` once a permit is free; refuses with RESOURCE_EXHAUSTED
    /// when none is free by `admit_by`, so a queue never grows past what can
    /// still be answered in time.
    pub async fn run<T, F>(&self, admit_by: Instant, work: F) -> Result<T, ServiceError>
    where
        T: Send + 'static,
        F: FnOnce() -> T + Send + 'static,
    {
        let acquire = self.permits.clone().acquire_owned();
        let permit = match tokio::time::timeout_at(admit_by.into(), acquire).await {
            Ok(Ok(permit)) => permit,
            Ok(Err(_)) => return Err(ServiceError::Internal("the compute pool is closed".into())),
            Err(_) => {
                return Err(ServiceError::Exhausted(
                    "every compute thread is busy and none freed up before the call's deadline; retry with backoff or a longer deadline"
                        .into(),
                ));
            }
        };
        tokio::task::spawn_blocking(move || {
            let _permit = permit;
            work()
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("the computation failed: {e}")))
    }
}

/// Everything the handlers share.
#[derive(Debug)]
struct Shared {
    registry: Arc<Registry>,
    pool: ComputePool,
    default_budget: Duration,
    deadline_margin: Duration,
}

/// The state `run` serves: the registry and the settings the handlers need.
#[derive(Debug)]
pub struct State {
    shared: Arc<Shared>,
    max_message_bytes: usize,
}

impl State {
    /// Opens the registry in `config.data_dir` (or the default directory).
    /// Files that could not be loaded are returned for the caller to log;
    /// they are never served.
    pub fn open(config: &Config) -> Result<(State, Vec<LoadProblem>), ServiceError> {
        let (registry, problems) = match &config.data_dir {
            Some(dir) => Registry::open(dir)?,
            None => Registry::open_default()?,
        };
        Ok((State::new(Arc::new(registry), config), problems))
    }

    pub fn new(registry: Arc<Registry>, config: &Config) -> State {
        State {
            shared: Arc::new(Shared {
                registry,
                pool: ComputePool::new(config.compute_threads),
                default_budget: config.default_budget,
                deadline_margin: config.deadline_margin,
            }),
            max_message_bytes: config.max_message_bytes,
        }
    }

    pub fn registry(&self) -> &Arc<Registry> {
        &self.shared.registry
    }
}

/// The `grpc-timeout` header (gRPC over HTTP/2 protocol spec): at most 8
/// digits and a unit, H, M, S, m (milli), u (micro) or n (nano).
pub fn grpc_timeout(metadata: &MetadataMap) -> Option<Duration> {
    let text = metadata.get("grpc-timeout")?.to_str().ok()?;
    let (digits, unit) = text.split_at(text.len().checked_sub(1)?);
    if digits.is_empty() || digits.len() > 8 {
        return None;
    }
    let amount: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(amount * 3600),
        "M" => Duration::from_secs(amount * 60),
        "S" => Duration::from_secs(amount),
        "m" => Duration::from_millis(amount),
        "u" => Duration::from_micros(amount),
        "n" => Duration::from_nanos(amount),
        _ => return None,
    })
}

/// The budget an Explain call gets: what it asked for (or the default),
/// cut to the deadline less the margin.
pub fn effective_budget(
    budget_ms: u32,
    default_budget: Duration,
    timeout: Option<Duration>,
    margin: Duration,
) -> Duration {
    let asked = if budget_ms == 0 {
        default_budget
    } else {
        Duration::from_millis(u64::from(budget_ms))
    };
    match timeout {
        Some(timeout) => asked.min(timeout.saturating_sub(margin)),
        None => asked,
    }
}

/// Counts the call by rpc and status code and logs refusals.
fn observe<T>(rpc: &'static str, result: &Result<T, Status>) {
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

fn set_registered_models(registry: &Registry) {
    metrics::gauge!(telemetry::REGISTERED_MODELS).set(registry.list().len() as f64);
}

#[derive(Debug, Clone)]
struct RegistryService {
    shared: Arc<Shared>,
}

impl RegistryService {
    async fn register(
        &self,
        request: proto::RegisterModelRequest,
    ) -> Result<proto::ModelInfo, ServiceError> {
        let spec = ModelSpec::try_from(request)?;
        let registry = self.shared.registry.clone();
        // Registration measures the model and fsyncs files: blocking work,
        // kept off the reactor (but outside the explain pool's permits, so
        // it is never refused for being slow).
        let info = tokio::task::spawn_blocking(move || {
            let info = registry.register(spec);
            set_registered_models(&registry);
            info
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("registration failed: {e}")))??;
        Ok(proto::ModelInfo::from(&info))
    }

    async fn delete(
        &self,
        request: proto::DeleteModelRequest,
    ) -> Result<proto::DeleteModelResponse, ServiceError> {
        if request.model_id.is_empty() {
            return Err(ServiceError::invalid("model_id", "is required"));
        }
        let registry = self.shared.registry.clone();
        let deleted = tokio::task::spawn_blocking(move || {
            let deleted = registry.delete(&request.model_id, request.version);
            set_registered_models(&registry);
            deleted
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("deletion failed: {e}")))??;
        Ok(proto::DeleteModelResponse {
            deleted: u32::try_from(deleted).unwrap_or(u32::MAX),
        })
    }
}

#[tonic::async_trait]
impl RegistryApi for RegistryService {
    async fn register_model(
        &self,
        request: Request<proto::RegisterModelRequest>,
    ) -> Result<Response<proto::ModelInfo>, Status> {
        let result = self
            .register(request.into_inner())
            .await
            .map(Response::new)
            .map_err(Status::from);
        observe("RegisterModel", &result);
        result
    }

    async fn get_model(
        &self,
        request: Request<proto::GetModelRequest>,
    ) -> Result<Response<proto::ModelInfo>, Status> {
        let request = request.into_inner();
        let result = self
            .shared
            .registry
            .get(&request.model_id, request.version)
            .map(|entry| Response::new(proto::ModelInfo::from(entry.info())))
            .map_err(|e| Status::from(ServiceError::from(e)));
        observe("GetModel", &result);
        result
    }

    async fn list_models(
        &self,
        _request: Request<proto::ListModelsRequest>,
    ) -> Result<Response<proto::ListModelsResponse>, Status> {
        let models = self
            .shared
            .registry
            .list()
            .iter()
            .map(proto::ModelInfo::from)
            .collect();
        let result = Ok(Response::new(proto::ListModelsResponse { models }));
        observe("ListModels", &result);
        result
    }

    async fn delete_model(
        &self,
        request: Request<proto::DeleteModelRequest>,
    ) -> Result<Response<proto::DeleteModelResponse>, Status> {
        let result = self
            .delete(request.into_inner())
            .await
            .map(Response::new)
            .map_err(Status::from);
        observe("DeleteModel", &result);
        result
    }
}

#[derive(Debug, Clone)]
struct AttributionsService {
    shared: Arc<Shared>,
}

impl AttributionsService {
    async fn explain(
        &self,
        request: Request<proto::ExplainRequest>,
    ) -> Result<proto::Explanation, ServiceError> {
        let arrival = Instant::now();
        let shared = &self.shared;
        let timeout = grpc_timeout(request.metadata());
        let message = request.into_inner();
        let budget = effective_budget(
            message.budget_ms,
            shared.default_budget,
            timeout,
            shared.deadline_margin,
        );
        let request = convert::explain_request(&message, budget)?;
        let entry = shared.registry.get(&message.model_id, message.version)?;
        let job = engine::prepare(entry.prepared(), request)?;
        // Work that cannot start before the deadline (or, without one, within
        // the budget) is refused rather than queued.
        let admit_by = arrival
            + match timeout {
                Some(timeout) => timeout.saturating_sub(shared.deadline_margin),
                None => budget,
            };
        let deadline = arrival + budget;
        // Work of a few microseconds costs less than the handoff to a
        // compute thread.
        let answer = if job.runs_inline() {
            job.run(deadline)?
        } else {
            shared
                .pool
                .run(admit_by, move || job.run(deadline))
                .await??
        };
        metrics::histogram!(telemetry::EXPLAIN_SECONDS).record(answer.elapsed.as_secs_f64());
        metrics::counter!(telemetry::COALITIONS_EVALUATED).increment(answer.coalitions_evaluated);
        metrics::counter!(telemetry::MODEL_ROWS_EVALUATED).increment(answer.model_rows_evaluated);
        metrics::counter!(telemetry::CACHE_HITS).increment(answer.cache_hits);
        Ok(convert::explanation(&entry, &message, &answer, budget))
    }
}

#[tonic::async_trait]
impl Attributions for AttributionsService {
    async fn explain(
        &self,
        request: Request<proto::ExplainRequest>,
    ) -> Result<Response<proto::Explanation>, Status> {
        let result = AttributionsService::explain(self, request)
            .await
            .map(Response::new)
            .map_err(Status::from);
        observe("Explain", &result);
        result
    }
}

#[derive(Debug, Clone, Default)]
struct DiagnosticsService;

#[tonic::async_trait]
impl Diagnostics for DiagnosticsService {
    async fn echo(
        &self,
        request: Request<proto::EchoRequest>,
    ) -> Result<Response<proto::EchoResponse>, Status> {
        let result = Ok(Response::new(proto::EchoResponse {
            payload: request.into_inner().payload,
        }));
        observe("Echo", &result);
        result
    }
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
    let diagnostics = DiagnosticsServer::new(DiagnosticsService)
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grpc_timeout_header_units_are_read() {
        // Units from the gRPC over HTTP/2 protocol spec (PROTOCOL-HTTP2.md).
        let mut metadata = MetadataMap::new();
        metadata.insert("grpc-timeout", "250m".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), Some(Duration::from_millis(250)));
        metadata.insert("grpc-timeout", "3S".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), Some(Duration::from_secs(3)));
        metadata.insert("grpc-timeout", "123456789m".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), None, "more than 8 digits");
        metadata.insert("grpc-timeout", "5x".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), None);
    }

    #[test]
    fn the_budget_is_cut_to_the_deadline_less_the_margin() {
        // The API's documented rule (common practice, no source).
        let default = Duration::from_millis(200);
        let margin = Duration::from_millis(5);
        assert_eq!(effective_budget(0, default, None, margin), default);
        assert_eq!(
            effective_budget(50, default, None, margin),
            Duration::from_millis(50)
        );
        assert_eq!(
            effective_budget(50, default, Some(Duration::from_millis(30)), margin),
            Duration::from_millis(25)
        );
        assert_eq!(
            effective_budget(0, default, Some(Duration::from_millis(2)), margin),
            Duration::ZERO
        );
    }

    #[tokio::test]
    async fn admission_is_refused_when_no_thread_frees_up_before_the_deadline() {
        // Admission control as the design asks (common practice, no source):
        // the one permit is held, so the second job cannot start in time.
        let pool = ComputePool::new(1);
        let held = pool.permits.clone().acquire_owned().await.unwrap();
        let refused = pool
            .run(Instant::now() + Duration::from_millis(10), || 1)
            .await
            .unwrap_err();
        assert!(matches!(refused, ServiceError::Exhausted(_)), "{refused:?}");
        drop(held);
        let admitted = pool
            .run(Instant::now() + Duration::from_secs(5), || 2)
            .await
            .unwrap();
        assert_eq!(admitted, 2);
    }
}
