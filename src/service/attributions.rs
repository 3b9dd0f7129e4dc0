//! The Attributions service: convert the request, prepare a job against
//! the registered model, run it where the call arrives or on the compute
//! pool, and convert the answer back.

use std::sync::Arc;
use std::time::Instant;

use tonic::{Request, Response, Status};

use super::convert;
use super::deadline::{effective_budget, grpc_timeout};
use super::proto;
use super::proto::attributions_server::Attributions;
use super::server::{Shared, observe};
use super::status::ServiceError;
use crate::engine;
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
