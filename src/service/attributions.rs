//! The Attributions service: check the request against the server's
//! maxima, convert it, prepare a job against the registered model, run it
//! where the call arrives or on the compute pool (cancelled if the call goes
//! away first), and convert the answer back.

use std::sync::Arc;
use std::time::Instant;

use tonic::{Request, Response, Status};

use super::auth::Access;
use super::convert;
use super::deadline::{effective_budget, grpc_timeout};
use super::pool::guarded;
use super::proto;
use super::proto::attributions_server::Attributions;
use super::server::{Limits, Shared, observe};
use super::status::ServiceError;
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
        let shared = &self.shared;
        let timeout = grpc_timeout(request.metadata());
        let message = request.into_inner();
        let budget = effective_budget(
            message.budget_ms,
            shared.default_budget,
            timeout,
            shared.deadline_margin,
        );
        shared.limits.check(&message)?;
        let mut request = convert::explain_request(&message, budget)?;
        request.max_evaluations = request.max_evaluations.min(shared.limits.evaluations);
        request.max_coalition_rows = shared.limits.coalition_rows;
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
            guarded("computation", || job.run(deadline))??
        } else {
            // Dropped with this future when the client cancels or the call's
            // deadline passes: the computation then stops at its next check
            // and frees its compute thread.
            let cancel = CancelOnDrop(CancelFlag::new());
            let flag = cancel.0.clone();
            let answer = shared
                .pool
                .run(admit_by, move || {
                    let result = job.run_cancellable(deadline, flag);
                    if let Err(error) = &result
                        && error.kind == ErrorKind::Cancelled
                    {
                        metrics::counter!(telemetry::COMPUTATIONS_CANCELLED).increment(1);
                    }
                    result
                })
                .await??;
            drop(cancel);
            answer
        };
        metrics::histogram!(telemetry::EXPLAIN_SECONDS).record(answer.elapsed.as_secs_f64());
        metrics::counter!(telemetry::COALITIONS_EVALUATED).increment(answer.coalitions_evaluated);
        metrics::counter!(telemetry::MODEL_ROWS_EVALUATED).increment(answer.model_rows_evaluated);
        metrics::counter!(telemetry::CACHE_HITS).increment(answer.cache_hits);
        Ok(convert::explanation(&entry, &message, &answer, budget))
    }
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
    async fn explain(
        &self,
        request: Request<proto::ExplainRequest>,
    ) -> Result<Response<proto::Explanation>, Status> {
        let result = match self.shared.authorize(request.metadata(), Access::Explain) {
            Ok(()) => AttributionsService::explain(self, request)
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
