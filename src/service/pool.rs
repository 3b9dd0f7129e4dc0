//! The bounded compute pool: CPU work never runs on the reactor threads, at
//! most `threads` computations run at once, and work that cannot start
//! before its deadline is refused at once rather than queued. Also the panic
//! guard every computation runs under, on the pool or inline.

use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::Arc;
use std::time::Instant;

use tokio::sync::Semaphore;

use super::status::ServiceError;
use crate::telemetry;

/// Runs `work`, turning a panic into [`ServiceError::Internal`] and counting
/// it, so a bug in one computation answers its caller with INTERNAL and
/// leaves the server serving (gRPC status codes, grpc.io documentation:
/// INTERNAL is for broken invariants). The panic's text goes to the log
/// only: it may quote request data, and the caller cannot act on it.
///
/// Unwind safety: the work owns or shares read-only what it touches
/// (prepared models never change after registration; the registry's locks
/// recover from poisoning), so nothing observable is left half-updated.
pub(super) fn guarded<T>(what: &'static str, work: impl FnOnce() -> T) -> Result<T, ServiceError> {
    catch_unwind(AssertUnwindSafe(work)).map_err(|payload| {
        let text = payload
            .downcast_ref::<&str>()
            .map(|text| (*text).to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "a panic without a message".to_string());
        metrics::counter!(telemetry::PANICS, "work" => what).increment(1);
        tracing::error!(work = what, panic = %text, "a computation panicked; answered INTERNAL");
        ServiceError::Internal(format!(
            "the {what} failed on a bug in the server (logged); retrying the same request will \
             fail again, so report it"
        ))
    })
}

/// A bounded pool for CPU work: each job holds one of `threads` permits on a
/// blocking thread, so the async reactor never computes and the number of
/// concurrent computations is capped.
#[derive(Debug, Clone)]
pub struct ComputePool {
    permits: Arc<Semaphore>,
    threads: usize,
}

impl ComputePool {
    pub fn new(threads: usize) -> ComputePool {
        ComputePool {
            permits: Arc::new(Semaphore::new(threads.max(1))),
            threads: threads.max(1),
        }
    }

    /// How many computations may run at once.
    pub fn threads(&self) -> usize {
        self.threads
    }

    /// Runs `work` once a permit is free; refuses with RESOURCE_EXHAUSTED
    /// when none is free by `admit_by`, so a queue never grows past what can
    /// still be answered in time. Dropping the returned future does not stop
    /// work that has started: the work must watch a cancel flag that the
    /// caller sets (the Attributions service does).
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
            guarded("computation", work)
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("the computation failed: {e}")))?
    }
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use super::*;

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

    #[test]
    fn a_panic_becomes_internal_and_is_counted() {
        // gRPC status codes, grpc.io documentation: a server bug is
        // INTERNAL. The counter is read back from a Prometheus recorder
        // local to this thread.
        let recorder = metrics_exporter_prometheus::PrometheusBuilder::new().build_recorder();
        let handle = recorder.handle();
        let failed = metrics::with_local_recorder(&recorder, || {
            guarded("computation", || -> u32 { panic!("an invariant broke") })
        });
        let error = failed.unwrap_err();
        assert!(matches!(error, ServiceError::Internal(_)), "{error:?}");
        assert!(!error.to_string().contains("invariant"), "{error}");
        let exposition = handle.render();
        assert!(
            exposition.contains("apportion_panics_total{work=\"computation\"} 1"),
            "{exposition}"
        );
        let fine = metrics::with_local_recorder(&recorder, || guarded("computation", || 3));
        assert_eq!(fine.unwrap(), 3);
        assert!(
            handle
                .render()
                .contains("apportion_panics_total{work=\"computation\"} 1")
        );
    }

    #[tokio::test]
    async fn the_pool_keeps_serving_after_a_panic() {
        // Common practice, no source: a panicking job frees its permit.
        let pool = ComputePool::new(1);
        let deadline = Instant::now() + Duration::from_secs(5);
        let failed = pool.run(deadline, || -> u32 { panic!("boom") }).await;
        assert!(
            matches!(failed, Err(ServiceError::Internal(_))),
            "{failed:?}"
        );
        assert_eq!(pool.run(deadline, || 4).await.unwrap(), 4);
    }
}
