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
            job.run(deadline)?
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
