//! The bounded compute pool: CPU work never runs on the reactor threads, at
//! most `threads` computations run at once, and work that cannot start
//! before its deadline is refused at once rather than queued.

use std::sync::Arc;
use std::time::Instant;

use tokio::sync::Semaphore;

use super::status::ServiceError;

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
            work()
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("the computation failed: {e}")))
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
}
