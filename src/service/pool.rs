//! The bounded compute pool: CPU work never runs on the reactor threads, at
//! most `threads` computations run at once, and work predicted not to
//! start early enough to finish by its deadline is refused when it arrives
//! rather than queued. Also the panic
//! guard every computation runs under, on the pool or inline.

use std::cmp::Reverse;
use std::collections::{BTreeMap, BinaryHeap, HashMap};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

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
/// concurrent computations is capped. It keeps a ledger of what runs and
/// waits, with each job's predicted time, so a call that cannot start early
/// enough is refused when it arrives rather than when its deadline passes.
#[derive(Debug, Clone)]
pub struct ComputePool {
    permits: Arc<Semaphore>,
    threads: usize,
    ledger: Arc<Mutex<Ledger>>,
}

/// When one job must start and finish, and how long it is predicted to
/// take.
#[derive(Debug, Clone, Copy)]
pub struct Timing {
    /// The latest start the call allows (its deadline less the margin).
    pub admit_by: Instant,
    /// When the computation must be done.
    pub deadline: Instant,
    /// The planner's predicted time for the whole job.
    pub predicted: Duration,
    /// The predicted time of the smallest answer it can give.
    pub minimum: Duration,
}

/// The pool's view of its work: the predicted end of what runs, the
/// predicted time of what waits (in arrival order: tokio's semaphore is
/// fair, first come first served), and how far actual service times run
/// over or under the predictions.
#[derive(Debug)]
struct Ledger {
    running: HashMap<u64, (Instant, Duration)>,
    waiting: BTreeMap<u64, Duration>,
    next_ticket: u64,
    /// Exponentially weighted mean of actual / predicted service time, 1
    /// until measured; it corrects every prediction the ledger makes.
    ratio: f64,
}

/// Weight of the newest service time in [`Ledger::ratio`]: about the last
/// ten jobs count (common practice, no source).
const RATIO_WEIGHT: f64 = 0.2;
/// Jobs shorter than this say more about timer noise than about the
/// model's costs, so they do not move the ratio.
const RATIO_FLOOR: Duration = Duration::from_micros(50);

impl Ledger {
    /// When a job arriving at `now` is predicted to start: each thread
    /// frees up when its job's predicted end passes, and the jobs already
    /// waiting take the first free threads in order.
    fn predicted_start(&self, now: Instant, threads: usize) -> Instant {
        let mut free: BinaryHeap<Reverse<Instant>> = self
            .running
            .values()
            .map(|&(started, expected)| Reverse((started + expected.mul_f64(self.ratio)).max(now)))
            .collect();
        while free.len() < threads {
            free.push(Reverse(now));
        }
        for expected in self.waiting.values() {
            let Reverse(first) = free.pop().expect("threads ≥ 1");
            free.push(Reverse(first + expected.mul_f64(self.ratio)));
        }
        free.pop().map_or(now, |Reverse(first)| first)
    }

    fn observe(&mut self, expected: Duration, actual: Duration) {
        if expected < RATIO_FLOOR && actual < RATIO_FLOOR {
            return;
        }
        let seen =
            (actual.as_secs_f64() / expected.max(RATIO_FLOOR).as_secs_f64()).clamp(0.1, 10.0);
        self.ratio = ((1.0 - RATIO_WEIGHT) * self.ratio + RATIO_WEIGHT * seen).clamp(0.25, 8.0);
    }
}

/// A job's place in the ledger, given up when the job ends or its caller
/// goes away.
struct Ticket {
    ledger: Arc<Mutex<Ledger>>,
    id: u64,
}

impl Ticket {
    fn started(&self, expected: Duration) {
        let mut ledger = lock(&self.ledger);
        ledger.waiting.remove(&self.id);
        ledger.running.insert(self.id, (Instant::now(), expected));
    }
}

impl Drop for Ticket {
    fn drop(&mut self) {
        let mut ledger = lock(&self.ledger);
        ledger.waiting.remove(&self.id);
        ledger.running.remove(&self.id);
    }
}

/// The ledger holds no invariant a panic elsewhere could break halfway, so
/// a poisoned lock is still usable.
fn lock(ledger: &Mutex<Ledger>) -> std::sync::MutexGuard<'_, Ledger> {
    ledger
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
}

fn milliseconds(duration: Duration) -> f64 {
    duration.as_secs_f64() * 1e3
}

impl ComputePool {
    pub fn new(threads: usize) -> ComputePool {
        ComputePool {
            permits: Arc::new(Semaphore::new(threads.max(1))),
            threads: threads.max(1),
            ledger: Arc::new(Mutex::new(Ledger {
                running: HashMap::new(),
                waiting: BTreeMap::new(),
                next_ticket: 0,
                ratio: 1.0,
            })),
        }
    }

    /// How many computations may run at once.
    pub fn threads(&self) -> usize {
        self.threads
    }

    /// How long a job arriving now is predicted to wait for a thread.
    pub fn predicted_wait(&self) -> Duration {
        let now = Instant::now();
        lock(&self.ledger)
            .predicted_start(now, self.threads)
            .saturating_duration_since(now)
    }

    /// Runs `work` once a permit is free. Refuses with RESOURCE_EXHAUSTED
    /// at once when the ledger predicts it cannot start early enough to
    /// give its smallest answer by its deadline, and when no permit is free
    /// by that latest start after all; either refusal carries the predicted
    /// wait as a retry hint. Dropping the returned future does not stop
    /// work that has started: the work must watch a cancel flag that the
    /// caller sets (the Attributions service does).
    pub async fn run<T, F>(&self, timing: Timing, work: F) -> Result<T, ServiceError>
    where
        T: Send + 'static,
        F: FnOnce() -> T + Send + 'static,
    {
        let now = Instant::now();
        let start_by = timing
            .admit_by
            .min(timing.deadline.checked_sub(timing.minimum).unwrap_or(now));
        let ticket = {
            let mut ledger = lock(&self.ledger);
            let start = ledger.predicted_start(now, self.threads);
            if start > start_by {
                let wait = start - now;
                let message = if wait.is_zero() {
                    // A thread is free: it is the time left that is short.
                    format!(
                        "the smallest answer this call's plan can give is predicted to take \
                         {:.1} ms, more than the {:.1} ms left for its computation; give a larger \
                         budget_ms (and call deadline)",
                        milliseconds(timing.minimum),
                        milliseconds(timing.deadline.saturating_duration_since(now))
                    )
                } else {
                    format!(
                        "every compute thread is busy: this call is predicted to start in {:.1} \
                         ms, too late to finish {:.1} ms of work by its deadline; retry after the \
                         hint in the {} trailer, on another replica, or with a longer deadline",
                        milliseconds(wait),
                        milliseconds(timing.minimum),
                        super::status::RETRY_AFTER_METADATA
                    )
                };
                return Err(ServiceError::Busy {
                    message,
                    retry_after: wait,
                });
            }
            let expected = timing
                .predicted
                .min(timing.deadline.saturating_duration_since(start));
            let id = ledger.next_ticket;
            ledger.next_ticket += 1;
            ledger.waiting.insert(id, expected);
            Ticket {
                ledger: self.ledger.clone(),
                id,
            }
        };
        let acquire = self.permits.clone().acquire_owned();
        let permit = match tokio::time::timeout_at(start_by.into(), acquire).await {
            Ok(Ok(permit)) => permit,
            Ok(Err(_)) => return Err(ServiceError::Internal("the compute pool is closed".into())),
            Err(_) => {
                drop(ticket);
                let wait = self.predicted_wait();
                return Err(ServiceError::Busy {
                    message: format!(
                        "every compute thread stayed busy past the latest start this call allows \
                         (the work ahead ran longer than predicted); retry after the hint in the \
                         {} trailer, on another replica, or with a longer deadline",
                        super::status::RETRY_AFTER_METADATA
                    ),
                    retry_after: wait,
                });
            }
        };
        let started = Instant::now();
        let expected = timing
            .predicted
            .min(timing.deadline.saturating_duration_since(started));
        ticket.started(expected);
        tokio::task::spawn_blocking(move || {
            let _permit = permit;
            let result = guarded("computation", work);
            lock(&ticket.ledger).observe(expected, started.elapsed());
            drop(ticket);
            result
        })
        .await
        .map_err(|e| ServiceError::Internal(format!("the computation failed: {e}")))?
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn timing(within: Duration, predicted: Duration, minimum: Duration) -> Timing {
        let now = Instant::now();
        Timing {
            admit_by: now + within,
            deadline: now + within,
            predicted,
            minimum,
        }
    }

    /// Puts a job the ledger believes runs until `for_` from now, without
    /// taking a permit: a refusal can then only come from the prediction.
    fn pretend_running(pool: &ComputePool, for_: Duration) {
        let mut ledger = lock(&pool.ledger);
        let id = ledger.next_ticket;
        ledger.next_ticket += 1;
        ledger.running.insert(id, (Instant::now(), for_));
    }

    const MS: Duration = Duration::from_millis(1);

    #[tokio::test]
    async fn admission_is_refused_when_no_thread_frees_up_before_the_deadline() {
        // Admission control as the design asks (common practice, no source):
        // the one permit is held by work the ledger does not know of, so
        // the job waits for its latest start and is then refused.
        let pool = ComputePool::new(1);
        let held = pool.permits.clone().acquire_owned().await.unwrap();
        let refused = pool.run(timing(10 * MS, MS, MS), || 1).await.unwrap_err();
        assert!(matches!(refused, ServiceError::Busy { .. }), "{refused:?}");
        drop(held);
        let admitted = pool.run(timing(5_000 * MS, MS, MS), || 2).await.unwrap();
        assert_eq!(admitted, 2);
    }

    #[tokio::test]
    async fn a_call_predicted_to_start_too_late_is_refused_at_once_with_the_wait() {
        // Refusal at arrival, not at the deadline (the budget issue's
        // admission rule; common practice, no source). The permit is free,
        // so only the ledger's prediction can refuse.
        let pool = ComputePool::new(1);
        pretend_running(&pool, 1_000 * MS);
        let refused = pool
            .run(timing(100 * MS, 10 * MS, 10 * MS), || 1)
            .await
            .unwrap_err();
        let ServiceError::Busy { retry_after, .. } = refused else {
            panic!("{refused:?}");
        };
        assert!(
            retry_after > 900 * MS && retry_after <= 1_000 * MS,
            "{retry_after:?}"
        );
        assert_eq!(
            lock(&pool.ledger).waiting.len(),
            0,
            "a refused call leaves nothing queued"
        );
    }

    #[tokio::test]
    async fn an_exact_job_must_fit_whole_while_a_sampler_needs_only_its_first_round() {
        // An exact estimator fails at its deadline; an anytime sampler
        // answers with what it has (the design's estimator contract).
        let pool = ComputePool::new(1);
        pretend_running(&pool, 50 * MS);
        let exact = pool.run(timing(100 * MS, 80 * MS, 80 * MS), || 1).await;
        assert!(matches!(exact, Err(ServiceError::Busy { .. })), "{exact:?}");
        let sampler = pool.run(timing(100 * MS, 500 * MS, 5 * MS), || 2).await;
        assert_eq!(sampler.unwrap(), 2);
    }

    #[tokio::test]
    async fn with_a_thread_free_a_refusal_blames_the_time_left_not_the_threads() {
        // Nothing runs, but the smallest answer (20 ms) does not fit the
        // 10 ms left: the caller needs a larger budget, not a retry.
        let pool = ComputePool::new(1);
        let refused = pool
            .run(timing(10 * MS, 20 * MS, 20 * MS), || 1)
            .await
            .unwrap_err();
        let ServiceError::Busy { message, .. } = refused else {
            panic!("{refused:?}");
        };
        assert!(
            message.contains("predicted to take 20.0 ms") && message.contains("larger budget_ms"),
            "{message}"
        );
        assert!(!message.contains("busy"), "{message}");
    }

    #[test]
    fn waiting_jobs_take_the_first_free_threads_in_order() {
        // A first-come-first-served queue of two servers (common practice,
        // no source): threads free at 10 and 30 ms; the 40 ms job waiting
        // takes the first, so a new job starts at 30 ms.
        let now = Instant::now();
        let mut ledger = Ledger {
            running: HashMap::from([(0, (now, 10 * MS)), (1, (now, 30 * MS))]),
            waiting: BTreeMap::from([(2, 40 * MS)]),
            next_ticket: 3,
            ratio: 1.0,
        };
        assert_eq!(ledger.predicted_start(now, 2), now + 30 * MS);
        // A third thread is idle: the waiting job takes it, and a new one
        // starts when the first running job ends.
        assert_eq!(ledger.predicted_start(now, 3), now + 10 * MS);
        assert_eq!(
            ledger.predicted_start(now, 4),
            now,
            "a thread is still idle"
        );
        // A 5 ms job behind it takes the thread freed at 30 ms.
        ledger.waiting.insert(3, 5 * MS);
        assert_eq!(ledger.predicted_start(now, 2), now + 35 * MS);
        // Jobs that ran twice as long as predicted make every prediction
        // longer.
        for _ in 0..50 {
            ledger.observe(10 * MS, 20 * MS);
        }
        assert!((ledger.ratio - 2.0).abs() < 1e-3, "{}", ledger.ratio);
        let start = ledger.predicted_start(now, 2) - now;
        assert!((milliseconds(start) - 70.0).abs() < 0.01, "{start:?}");
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
        let deadline = timing(5_000 * MS, MS, MS);
        let failed = pool.run(deadline, || -> u32 { panic!("boom") }).await;
        assert!(
            matches!(failed, Err(ServiceError::Internal(_))),
            "{failed:?}"
        );
        assert_eq!(pool.run(deadline, || 4).await.unwrap(), 4);
    }
}
