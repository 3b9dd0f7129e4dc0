//! The Monitoring service: how a model version's attributions move over
//! time (see [`crate::drift`]). Every answer the Attributions service gives
//! OK is added to the tracker; as each window closes, its mean |attribution|
//! and its stability index against the earlier windows are exported per
//! model and player.

use std::sync::Arc;
use std::time::{SystemTime, UNIX_EPOCH};

use tonic::{Request, Response, Status};

use super::auth::Access;
use super::proto;
use super::proto::monitoring_server::Monitoring;
use super::server::{Shared, observe};
use super::status::ServiceError;
use crate::drift::{self, DriftTracker};
use crate::telemetry;

#[derive(Debug, Clone)]
pub(super) struct MonitoringService {
    pub(super) shared: Arc<Shared>,
}

/// Adds an answer's attributions to the tracker; when it opens a new
/// window, exports the figures of the window just closed.
pub(super) fn track(tracker: &DriftTracker, explanation: &proto::Explanation) {
    let at_unix_ms = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |since| since.as_millis() as u64);
    let values: Vec<f64> = explanation.attributions.iter().map(|a| a.value).collect();
    let opened = tracker.record(
        &explanation.model_id,
        explanation.version,
        || {
            explanation
                .attributions
                .iter()
                .map(|a| a.name.clone())
                .collect()
        },
        &values,
        at_unix_ms,
    );
    if opened
        && let Some(closed) = tracker.compare_closed(&explanation.model_id, explanation.version)
    {
        // Labels: model ids and the players of registered models only,
        // so the series stay as many as the registry's players.
        for player in closed.players {
            let labels = [
                ("model", explanation.model_id.clone()),
                ("player", player.player),
            ];
            metrics::gauge!(telemetry::ATTRIBUTION_MEAN_ABS, &labels).set(player.recent.mean_abs());
            metrics::gauge!(telemetry::ATTRIBUTION_STABILITY, &labels).set(player.stability_index);
        }
    }
}

impl MonitoringService {
    fn drift(
        &self,
        request: proto::AttributionDriftRequest,
    ) -> Result<proto::AttributionDriftResponse, ServiceError> {
        if request.model_id.is_empty() {
            return Err(ServiceError::invalid("model_id", "is required"));
        }
        let entry = self
            .shared
            .registry
            .get(&request.model_id, request.version)?;
        let version = entry.info().version;
        let drift = self
            .shared
            .drift
            .compare(
                &request.model_id,
                version,
                request.recent_windows as usize,
                request.reference_windows as usize,
            )
            .ok_or_else(|| {
                ServiceError::Invalid(crate::engine::EngineError::of_kind(
                    crate::engine::ErrorKind::FailedPrecondition,
                    "model_id",
                    format!(
                        "version {version} of {:?} has answered no explanation since this server \
                         started, so there is nothing to compare (drift is kept per replica, in \
                         memory)",
                        request.model_id
                    ),
                ))
            })?;
        Ok(proto::AttributionDriftResponse {
            model_id: request.model_id,
            version,
            window_ms: drift.window_ms,
            reference_start_unix_ms: drift.reference_span.0,
            reference_end_unix_ms: drift.reference_span.1,
            recent_start_unix_ms: drift.recent_span.0,
            recent_end_unix_ms: drift.recent_span.1,
            shift_index: drift::SHIFT_INDEX,
            min_samples: drift::MIN_SAMPLES,
            players: drift
                .players
                .into_iter()
                .map(|player| proto::PlayerDrift {
                    name: player.player,
                    reference_count: player.reference.count,
                    recent_count: player.recent.count,
                    reference_mean: player.reference.mean(),
                    recent_mean: player.recent.mean(),
                    reference_mean_abs: player.reference.mean_abs(),
                    recent_mean_abs: player.recent.mean_abs(),
                    mean_abs_change: player.recent.mean_abs() - player.reference.mean_abs(),
                    stability_index: player.stability_index,
                    shifted: player.shifted,
                })
                .collect(),
        })
    }
}

#[tonic::async_trait]
impl Monitoring for MonitoringService {
    async fn attribution_drift(
        &self,
        request: Request<proto::AttributionDriftRequest>,
    ) -> Result<Response<proto::AttributionDriftResponse>, Status> {
        let result = self
            .shared
            .admit(request.metadata(), Access::Read)
            .and_then(|_flight| {
                self.drift(request.into_inner())
                    .map(Response::new)
                    .map_err(Status::from)
            });
        observe("AttributionDrift", &result);
        result
    }
}
