//! The Attributions service: check the request against the server's
//! maxima, convert it, prepare a job against the registered model, run it
//! where the call arrives or on the compute pool (cancelled if the call goes
//! away first), and convert the answer back. ExplainBatch plans one shared
//! request for many instances; ExplainStream answers a stream of requests
//! with bounded work in flight per stream.

use std::pin::Pin;
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio::sync::mpsc;
use tokio::task::JoinSet;
use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

use super::auth::Access;
use super::convert;
use super::deadline::{effective_budget, grpc_timeout};
use super::drain::Flight;
use super::pool::{Timing, guarded};
use super::proto;
use super::proto::attributions_server::Attributions;
use super::server::{Limits, Shared, observe};
use super::status::{ServiceError, code_label};
use super::stream::{Place, Room};
use crate::engine::{self, CancelFlag, ErrorKind};
use crate::telemetry;

#[derive(Debug, Clone)]
pub(super) struct AttributionsService {
    pub(super) shared: Arc<Shared>,
}

impl AttributionsService {
    async fn explain(
        &self,
        request: Request<proto::ExplainRequest>,
    ) -> Result<proto::Explanation, ServiceError> {
        let arrival = Instant::now();
        let timeout = grpc_timeout(request.metadata());
        explain_one(
            &self.shared,
            "Explain",
            request.into_inner(),
            arrival,
            timeout,
        )
        .await
    }

    /// Validates and plans the shared request once, then computes the
    /// instances on the compute pool in as many chunks as it has threads;
    /// an instance that fails gets its error in its item.
    async fn explain_batch(
        &self,
        request: Request<proto::ExplainBatchRequest>,
    ) -> Result<proto::ExplainBatchResponse, ServiceError> {
        let arrival = Instant::now();
        let shared = &self.shared;
        let timeout = grpc_timeout(request.metadata());
        let batch = request.into_inner();
        let Some(shape) = batch.request else {
            return Err(ServiceError::invalid(
                "request",
                "is required: the request every instance shares (model_id, removal, target, …)",
            ));
        };
        if !shape.instance.is_empty() {
            return Err(ServiceError::invalid(
                "request.instance",
                "must be empty in a batch; give each instance in `instances`",
            ));
        }
        if batch.instances.is_empty() {
            return Err(ServiceError::invalid(
                "instances",
                "is empty; give at least one instance",
            ));
        }
        if batch.instances.len() > shared.limits.batch_instances {
            return Err(ServiceError::invalid(
                "instances",
                format!(
                    "{} instances are over this server's maximum of {}; split the batch",
                    batch.instances.len(),
                    shared.limits.batch_instances
                ),
            ));
        }
        let budget = effective_budget(
            shape.budget_ms,
            shared.default_budget,
            timeout,
            shared.deadline_margin,
        );
        shared.limits.check(&shape)?;
        // TARGET_LOSS may take its label from each instance: the shared
        // request is then checked with the first one given, and each
        // instance's own label replaces it in its job.
        let mut checked = shape.clone();
        let labels_per_instance =
            shape.target == proto::Target::Loss as i32 && shape.label.is_none();
        if labels_per_instance {
            checked.label = batch.instances.iter().find_map(|item| item.label);
            if checked.label.is_none() {
                return Err(ServiceError::invalid(
                    "label",
                    "is required for TARGET_LOSS: give it in the shared request or in each instance",
                ));
            }
        }
        let mut engine_request = convert::explain_request(&checked, budget)?;
        engine_request.max_evaluations = engine_request
            .max_evaluations
            .min(shared.limits.evaluations);
        engine_request.max_coalition_rows = shared.limits.coalition_rows;
        let entry = shared.registry.get(&shape.model_id, shape.version)?;
        engine_request.reasons_goal = convert::reasons_goal(&entry, &checked);
        let template = Arc::new(engine::prepare_template(entry.prepared(), &engine_request)?);
        // Each instance gets its budget from when it starts; the call's
        // deadline (less the margin) bounds them all and the admission.
        let call_deadline = timeout.map(|t| arrival + t.saturating_sub(shared.deadline_margin));
        let admit_by = call_deadline.unwrap_or(arrival + budget);
        let count = batch.instances.len();
        let chunk_size = count.div_ceil(shared.pool.threads().min(count));
        let cancel = CancelOnDrop(shared.drain.cancel_flag());
        let mut chunks = Vec::new();
        let mut instances = batch.instances.into_iter().enumerate().peekable();
        while instances.peek().is_some() {
            let chunk: Vec<(usize, proto::BatchInstance)> =
                instances.by_ref().take(chunk_size).collect();
            let indices: Vec<usize> = chunk.iter().map(|(index, _)| *index).collect();
            // A chunk computes its instances one after another, each with
            // the call's budget from when it starts.
            let instances = indices.len() as u32;
            let timing = Timing {
                admit_by,
                deadline: call_deadline.unwrap_or(admit_by + budget * instances),
                predicted: template.predicted().min(budget) * instances,
                minimum: template.minimum() * instances,
            };
            let template = template.clone();
            let flag = cancel.0.clone();
            let pool = shared.pool.clone();
            let (shared, entry, shape) = (shared.clone(), entry.clone(), shape.clone());
            // Each chunk also converts its own answers, so the conversion
            // runs on the compute threads side by side, not one after
            // another where the call arrived.
            let work = move || {
                // OK items are counted once per chunk (a counter's lookup
                // costs about as much as a small answer's conversion).
                let mut answered = 0u64;
                let items = chunk
                    .into_iter()
                    .map(|(index, item)| {
                        let label = if labels_per_instance {
                            item.label.or(checked.label)
                        } else {
                            item.label
                        };
                        let seed = item.seed.unwrap_or(shape.seed);
                        let request_id = if item.request_id.is_empty() {
                            shape.request_id.clone()
                        } else {
                            item.request_id
                        };
                        let result = template
                            .job(item.instance, label, seed)
                            .and_then(|job| {
                                let mut deadline = Instant::now() + budget;
                                if let Some(call) = call_deadline {
                                    deadline = deadline.min(call);
                                }
                                counted(job.run_cancellable(deadline, flag.clone()))
                            })
                            .map(|answer| {
                                record(&answer);
                                let echo = convert::Echo {
                                    request_id: &request_id,
                                    seed,
                                    request: &shape,
                                };
                                let explanation =
                                    convert::explanation_echoing(&entry, &echo, &answer, budget);
                                log(&shared, "ExplainBatch", &explanation);
                                explanation
                            })
                            .map_err(|error| unless_stopping(&shared, error));
                        if result.is_ok() {
                            answered += 1;
                            convert::outcome(request_id, index as u64, result)
                        } else {
                            self::item(request_id, index as u64, result, "ExplainBatch")
                        }
                    })
                    .collect::<Vec<_>>();
                count_answered("ExplainBatch", answered);
                items
            };
            chunks.push((
                indices,
                tokio::spawn(async move { pool.run(timing, work).await }),
            ));
        }
        let mut items = Vec::with_capacity(count);
        for (indices, chunk) in chunks {
            let computed = chunk
                .await
                .map_err(|e| ServiceError::Internal(format!("a batch chunk failed: {e}")))?;
            match computed {
                Ok(answers) => items.extend(answers),
                // A chunk that could not start in time: its instances say
                // so, the others keep their answers.
                Err(refused) => {
                    let status = super::status::item_error(&refused);
                    for index in indices {
                        let message = proto::ExplainOutcome {
                            request_id: shape.request_id.clone(),
                            index: index as u64,
                            outcome: Some(proto::explain_outcome::Outcome::Error(status.clone())),
                        };
                        count_item("ExplainBatch", &message);
                        items.push(message);
                    }
                }
            }
        }
        drop(cancel);
        on_time(timeout.map(|timeout| arrival + timeout))?;
        items.sort_by_key(|item| item.index);
        Ok(proto::ExplainBatchResponse { items })
    }
}

/// One Explain: check the request against the server's maxima, convert it,
/// prepare a job and run it where the call arrives or on the compute pool
/// (cancelled if this future is dropped first), and keep the answer
/// (attribution log, drift) under `rpc`. `timeout` is what is left
/// of the call's deadline at `arrival`.
async fn explain_one(
    shared: &Shared,
    rpc: &'static str,
    message: proto::ExplainRequest,
    arrival: Instant,
    timeout: Option<Duration>,
) -> Result<proto::Explanation, ServiceError> {
    let budget = effective_budget(
        message.budget_ms,
        shared.default_budget,
        timeout,
        shared.deadline_margin,
    );
    shared.limits.check(&message)?;
    // The computation is planned and stopped early enough for what follows
    // it: the hand-off, the conversion and the records.
    let computing = budget - shared.reserve.kept_back(budget);
    let mut request = convert::explain_request(&message, computing)?;
    request.max_evaluations = request.max_evaluations.min(shared.limits.evaluations);
    request.max_coalition_rows = shared.limits.coalition_rows;
    let entry = shared.registry.get(&message.model_id, message.version)?;
    request.reasons_goal = convert::reasons_goal(&entry, &message);
    let job = engine::prepare(entry.prepared(), request)?;
    // Work that cannot start before the deadline (or, without one, within
    // the budget) is refused rather than queued.
    let admit_by = arrival
        + match timeout {
            Some(timeout) => timeout.saturating_sub(shared.deadline_margin),
            None => budget,
        };
    let deadline = arrival + computing;
    // Work of a few microseconds costs less than the handoff to a
    // compute thread.
    let (answer, ended) = if job.runs_inline() {
        (
            guarded("computation", || job.run(deadline))??,
            Instant::now(),
        )
    } else {
        let timing = Timing {
            admit_by,
            deadline,
            predicted: job.predicted(),
            minimum: job.minimum(),
        };
        // Dropped with this future when the client cancels or the call's
        // deadline passes: the computation then stops at its next check
        // and frees its compute thread.
        let cancel = CancelOnDrop(shared.drain.cancel_flag());
        let flag = cancel.0.clone();
        let (answer, ended) = shared
            .pool
            .run(timing, move || {
                let answer = counted(job.run_cancellable(deadline, flag));
                (answer, Instant::now())
            })
            .await?;
        drop(cancel);
        (
            answer.map_err(|error| unless_stopping(shared, error))?,
            ended,
        )
    };
    on_time(timeout.map(|timeout| arrival + timeout))?;
    record(&answer);
    let explanation = convert::explanation(&entry, &message, &answer, budget);
    log(shared, rpc, &explanation);
    shared
        .reserve
        .observe(ended.saturating_duration_since(deadline) + ended.elapsed());
    Ok(explanation)
}

/// Keeps an answer given OK: offered to the attribution log, if there is
/// one, and added to the drift windows.
fn log(shared: &Shared, rpc: &'static str, explanation: &proto::Explanation) {
    if let Some(log) = &shared.log {
        log.record(rpc, explanation);
    }
    super::monitoring::track(&shared.drift, explanation);
}

/// A computation cancelled because the server is stopping answers
/// UNAVAILABLE: its caller did not cancel, and another replica can answer.
fn unless_stopping(shared: &Shared, error: engine::EngineError) -> ServiceError {
    if error.kind == ErrorKind::Cancelled && shared.drain.stopped() {
        ServiceError::ShuttingDown(
            "the server stopped before this computation finished; retry on another replica".into(),
        )
    } else {
        error.into()
    }
}

/// Refuses to send an answer after the call's deadline: the caller has
/// stopped waiting, and an OK it never reads would count as on time.
fn on_time(call_deadline: Option<Instant>) -> Result<(), ServiceError> {
    match call_deadline {
        Some(deadline) => match Instant::now().checked_duration_since(deadline) {
            Some(late) if !late.is_zero() => Err(ServiceError::Late(format!(
                "the answer was ready {:.1} ms after the call's deadline, so it is not sent; give \
                 a longer deadline or a smaller budget_ms",
                late.as_secs_f64() * 1e3
            ))),
            _ => Ok(()),
        },
        None => Ok(()),
    }
}

/// Counts a computation its call's cancellation stopped.
fn counted(result: engine::Result<engine::Explanation>) -> engine::Result<engine::Explanation> {
    if let Err(error) = &result
        && error.kind == ErrorKind::Cancelled
    {
        metrics::counter!(telemetry::COMPUTATIONS_CANCELLED).increment(1);
    }
    result
}

/// The metrics of one computed answer.
fn record(answer: &engine::Explanation) {
    metrics::histogram!(telemetry::EXPLAIN_SECONDS).record(answer.elapsed.as_secs_f64());
    metrics::counter!(telemetry::COALITIONS_EVALUATED).increment(answer.coalitions_evaluated);
    metrics::counter!(telemetry::MODEL_ROWS_EVALUATED).increment(answer.model_rows_evaluated);
    metrics::counter!(telemetry::CACHE_HITS).increment(answer.cache_hits);
}

/// An item of a batch or a stream, counted by rpc and code.
fn item(
    request_id: String,
    index: u64,
    result: Result<proto::Explanation, ServiceError>,
    rpc: &'static str,
) -> proto::ExplainOutcome {
    let outcome = convert::outcome(request_id, index, result);
    count_item(rpc, &outcome);
    outcome
}

/// Counts `answered` OK items of `rpc` at once.
fn count_answered(rpc: &'static str, answered: u64) {
    if answered > 0 {
        metrics::counter!(telemetry::ITEMS, "rpc" => rpc, "code" => code_label(tonic::Code::Ok))
            .increment(answered);
    }
}

fn count_item(rpc: &'static str, outcome: &proto::ExplainOutcome) {
    let code = match &outcome.outcome {
        Some(proto::explain_outcome::Outcome::Error(error)) => tonic::Code::from(error.code),
        _ => tonic::Code::Ok,
    };
    metrics::counter!(telemetry::ITEMS, "rpc" => rpc, "code" => code_label(code)).increment(1);
}

/// Reads a stream's requests while it has room (see [`super::stream`]),
/// explains each in its own task, and queues the answers for the
/// transport; stops reading when the client stops sending or goes away, or
/// when the server drains: the requests in flight are then answered and
/// the stream ends UNAVAILABLE, naming the first request not read.
fn serve_stream(
    shared: Arc<Shared>,
    mut inbound: Streaming<proto::ExplainRequest>,
    timeout: Option<Duration>,
    flight: Flight,
) -> ReceiverStream<Result<(proto::ExplainOutcome, Place), Status>> {
    let opened = Instant::now();
    let room = Room::new(shared.stream_in_flight, shared.streams.clone());
    // Never full: at most stream_in_flight answers exist at once, each
    // holding a place, and one error ends the stream.
    let (answers, queued) = mpsc::channel(shared.stream_in_flight + 1);
    tokio::spawn(async move {
        // In flight until its last answer is queued.
        let _flight = flight;
        let mut computing = JoinSet::new();
        let mut index = 0u64;
        let mut drained = false;
        loop {
            while computing.try_join_next().is_some() {}
            let next = tokio::select! {
                place = room.place() => match place {
                    Some(place) => tokio::select! {
                        next = inbound.message() => next.map(|next| next.map(|message| (message, place))),
                        () = answers.closed() => break,
                        () = shared.drain.draining() => { drained = true; break }
                    },
                    None => break,
                },
                () = shared.drain.draining() => { drained = true; break }
            };
            let (message, mut place) = match next {
                Ok(Some(next)) => next,
                Ok(None) => break,
                Err(status) => {
                    let _ = answers.send(Err(status)).await;
                    break;
                }
            };
            place.enter();
            let answers = answers.clone();
            let shared = shared.clone();
            let left = timeout.map(|t| t.saturating_sub(opened.elapsed()));
            computing.spawn(async move {
                let request_id = message.request_id.clone();
                // Dropping the computation when the client goes away
                // cancels it (CancelOnDrop inside).
                let result = tokio::select! {
                    result = explain_one(&shared, "ExplainStream", message, Instant::now(), left) => result,
                    () = answers.closed() => return,
                };
                let outcome = item(request_id, index, result, "ExplainStream");
                let _ = answers.send(Ok((outcome, place))).await;
            });
            index += 1;
        }
        while computing.join_next().await.is_some() {}
        if drained {
            let _ = answers
                .send(Err(Status::from(ServiceError::ShuttingDown(format!(
                    "the server is shutting down: requests from index {index} on were not read; \
                     send them on a new stream to another replica"
                )))))
                .await;
        }
    });
    ReceiverStream::new(queued)
}

/// Sets its flag when dropped, so dropping the call's future cancels its
/// computation.
struct CancelOnDrop(CancelFlag);

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        self.0.cancel();
    }
}

impl Limits {
    /// Refuses a request that asks for more work than this server allows,
    /// naming the field and the maximum.
    fn check(&self, request: &proto::ExplainRequest) -> Result<(), ServiceError> {
        let budget_ms = self.budget.as_millis();
        if u128::from(request.budget_ms) > budget_ms {
            return Err(ServiceError::invalid(
                "budget_ms",
                format!(
                    "{} ms is over this server's maximum of {budget_ms} ms; ask for at most that \
                     (0 = the server default)",
                    request.budget_ms
                ),
            ));
        }
        if request.max_evaluations > self.evaluations {
            return Err(ServiceError::invalid(
                "max_evaluations",
                format!(
                    "{} is over this server's maximum of {}; ask for at most that (0 = the default)",
                    request.max_evaluations, self.evaluations
                ),
            ));
        }
        if request.draws > self.draws {
            return Err(ServiceError::invalid(
                "draws",
                format!(
                    "{} is over this server's maximum of {}; ask for at most that (0 = {})",
                    request.draws,
                    self.draws,
                    engine::job::DEFAULT_DRAWS
                ),
            ));
        }
        Ok(())
    }
}

#[tonic::async_trait]
impl Attributions for AttributionsService {
    type ExplainStreamStream =
        Pin<Box<dyn Stream<Item = Result<proto::ExplainOutcome, Status>> + Send + 'static>>;

    async fn explain_batch(
        &self,
        request: Request<proto::ExplainBatchRequest>,
    ) -> Result<Response<proto::ExplainBatchResponse>, Status> {
        let result = match self.shared.admit(request.metadata(), Access::Explain) {
            Ok(_flight) => AttributionsService::explain_batch(self, request)
                .await
                .map(Response::new)
                .map_err(Status::from),
            Err(refused) => Err(refused),
        };
        observe("ExplainBatch", &result);
        result
    }

    async fn explain_stream(
        &self,
        request: Request<Streaming<proto::ExplainRequest>>,
    ) -> Result<Response<Self::ExplainStreamStream>, Status> {
        let flight = match self.shared.admit(request.metadata(), Access::Explain) {
            Ok(flight) => flight,
            Err(refused) => {
                let result = Err(refused);
                observe("ExplainStream", &result);
                return result;
            }
        };
        let timeout = grpc_timeout(request.metadata());
        let queued = serve_stream(self.shared.clone(), request.into_inner(), timeout, flight);
        // The place is given back as the answer leaves for the transport.
        let answers = queued.map(|answer| {
            answer.map(|(outcome, place)| {
                place.sent();
                outcome
            })
        });
        let result: Result<Response<Self::ExplainStreamStream>, Status> =
            Ok(Response::new(Box::pin(answers)));
        observe("ExplainStream", &result);
        result
    }

    async fn explain(
        &self,
        request: Request<proto::ExplainRequest>,
    ) -> Result<Response<proto::Explanation>, Status> {
        let result = match self.shared.admit(request.metadata(), Access::Explain) {
            Ok(_flight) => AttributionsService::explain(self, request)
                .await
                .map(Response::new)
                .map_err(Status::from),
            Err(refused) => Err(refused),
        };
        observe("Explain", &result);
        result
    }
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use ndarray::ArrayView2;
    use tonic::Code;
    use tonic::transport::Channel;

    use super::*;
    use crate::model::{Link, Model};
    use crate::registry::{Background, FeatureSpec, LinkSpec, ModelBody, ModelSpec, Registry};
    use crate::service::proto::attributions_client::AttributionsClient;
    use crate::service::{Config, State};

    /// A model with a bug: it panics on any row whose first value is over a
    /// million, and otherwise sums its inputs.
    struct PanicsOnLargeInput;

    impl Model for PanicsOnLargeInput {
        fn inputs(&self) -> usize {
            2
        }
        fn link(&self) -> Link {
            Link::Identity
        }
        fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
            for (row, out) in rows.rows().into_iter().zip(out) {
                assert!(row[0] <= 1e6, "a deliberate bug in a test model");
                *out = row.sum();
            }
        }
        fn kind(&self) -> &'static str {
            "test-panics"
        }
    }

    fn spec(model_id: &str) -> ModelSpec {
        let feature = |name: &str| FeatureSpec {
            name: name.into(),
            group: String::new(),
            reason_code: String::new(),
            reason_text: String::new(),
        };
        ModelSpec {
            model_id: model_id.into(),
            features: vec![feature("a"), feature("b")],
            // Replaced by the panicking model; the body only has to be valid.
            model: ModelBody::Linear {
                weights: vec![1.0, 1.0],
                intercept: 0.0,
            },
            link: LinkSpec::Identity,
            background: Background {
                rows: 4,
                cols: 2,
                values: vec![0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0],
            },
            description: String::new(),
            imported: None,
            decision: None,
        }
    }

    fn request(model_id: &str, first: f64) -> proto::ExplainRequest {
        proto::ExplainRequest {
            model_id: model_id.into(),
            instance: vec![first, 1.0],
            budget_ms: 5_000,
            ..Default::default()
        }
    }

    #[tokio::test]
    async fn a_panicking_model_gets_internal_on_both_paths_and_the_server_keeps_serving() {
        // gRPC status codes, grpc.io documentation: a server bug is
        // INTERNAL; common practice, no source: one bad call must not take
        // the server down.
        let dir = tempfile::tempdir().unwrap();
        let (registry, _) = Registry::open(dir.path()).unwrap();
        // A row cost of 1 ns plans a few microseconds (inline); a
        // millisecond plans milliseconds (the compute pool).
        registry.serve_with_model_for_test(spec("cheap"), Arc::new(PanicsOnLargeInput), 1.0);
        registry.serve_with_model_for_test(spec("costly"), Arc::new(PanicsOnLargeInput), 1e6);
        for (model_id, inline) in [("cheap", true), ("costly", false)] {
            let entry = registry.get(model_id, 0).unwrap();
            let planned =
                convert::explain_request(&request(model_id, 0.0), Duration::from_millis(5_000))
                    .unwrap();
            let job = engine::prepare(entry.prepared(), planned).unwrap();
            assert_eq!(job.runs_inline(), inline, "{model_id}");
        }
        let config = Config {
            data_dir: Some(dir.path().to_path_buf()),
            compute_threads: 1,
            ..Config::default()
        };
        let state = State::new(Arc::new(registry), &config);
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let address = listener.local_addr().unwrap();
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(crate::service::run(listener, state, async {
            let _ = stopped.await;
        }));
        let channel = Channel::from_shared(format!("http://{address}"))
            .unwrap()
            .connect()
            .await
            .unwrap();
        let mut client = AttributionsClient::new(channel);
        for model_id in ["cheap", "costly"] {
            for _ in 0..2 {
                let status = client
                    .explain(request(model_id, 1e9))
                    .await
                    .expect_err("the model panics");
                assert_eq!(status.code(), Code::Internal, "{model_id}: {status:?}");
                let answer = client
                    .explain(request(model_id, 0.5))
                    .await
                    .unwrap_or_else(|status| panic!("{model_id}: {status:?}"))
                    .into_inner();
                // A sum of two inputs: each player's Shapley value is its
                // input less its background mean (the linear closed form,
                // NeurIPS 2017, "A unified approach to interpreting model
                // predictions").
                let expected = [0.5 - 3.0, 1.0 - 4.0];
                assert_eq!(answer.attributions.len(), expected.len());
                for (got, want) in answer.attributions.iter().zip(expected) {
                    assert!((got.value - want).abs() < 1e-9, "{model_id}: {answer:?}");
                }
            }
        }
        let _ = stop.send(());
        server.await.unwrap().unwrap();
    }
}
