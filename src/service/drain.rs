//! Stopping without dropping answers. When the process is asked to stop,
//! health turns NOT_SERVING so load balancers send no more calls, new calls
//! are refused with UNAVAILABLE, and the calls in flight get up to the drain
//! timeout to finish; computations still running then are cancelled, their
//! callers answered UNAVAILABLE, and the server stops.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

use tokio::sync::Notify;

use super::status::ServiceError;
use crate::engine::CancelFlag;

/// The calls in flight and whether the server is draining.
#[derive(Debug, Default)]
pub(super) struct Drain {
    draining: AtomicBool,
    in_flight: AtomicUsize,
    idle: Notify,
    began: Notify,
    /// Every computation's cancel flag is a child of this one, so setting
    /// it at the drain timeout stops them all at their next check.
    stop: CancelFlag,
}

/// One call in flight, from its admission until its answer is handed to
/// the transport (for a stream: until the stream ends).
#[derive(Debug)]
pub(super) struct Flight(Arc<Drain>);

impl Drop for Flight {
    fn drop(&mut self) {
        if self.0.in_flight.fetch_sub(1, Ordering::AcqRel) == 1 {
            self.0.idle.notify_waiters();
        }
    }
}

impl Drain {
    /// Counts a new call in flight, or refuses it while draining.
    pub(super) fn enter(self: &Arc<Drain>) -> Result<Flight, ServiceError> {
        // Counted before the check, so `idle` never misses a call that
        // was admitted just as draining began.
        self.in_flight.fetch_add(1, Ordering::AcqRel);
        let flight = Flight(self.clone());
        if self.draining.load(Ordering::Acquire) {
            return Err(ServiceError::ShuttingDown(
                "the server is shutting down and takes no new calls; retry on another replica"
                    .into(),
            ));
        }
        Ok(flight)
    }

    pub(super) fn begin(&self) {
        self.draining.store(true, Ordering::Release);
        self.began.notify_waiters();
    }

    /// Completes once the server is draining.
    pub(super) async fn draining(&self) {
        loop {
            let notified = self.began.notified();
            tokio::pin!(notified);
            notified.as_mut().enable();
            if self.is_draining() {
                return;
            }
            notified.await;
        }
    }

    pub(super) fn is_draining(&self) -> bool {
        self.draining.load(Ordering::Acquire)
    }

    pub(super) fn in_flight(&self) -> usize {
        self.in_flight.load(Ordering::Acquire)
    }

    /// Completes once no call is in flight.
    pub(super) async fn idle(&self) {
        loop {
            let notified = self.idle.notified();
            tokio::pin!(notified);
            // Registered before the count is read, so a last call ending
            // between the two still wakes this.
            notified.as_mut().enable();
            if self.in_flight() == 0 {
                return;
            }
            notified.await;
        }
    }

    /// A cancel flag for one computation: set by its call or by [`Drain::stop`].
    pub(super) fn cancel_flag(&self) -> CancelFlag {
        self.stop.child()
    }

    /// Cancels every running computation.
    pub(super) fn stop(&self) {
        self.stop.cancel();
    }

    /// Whether computations were cancelled because the server is stopping
    /// (their callers get UNAVAILABLE, not CANCELLED: they did not cancel).
    pub(super) fn stopped(&self) -> bool {
        self.stop.is_cancelled()
    }
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use super::*;

    #[tokio::test]
    async fn draining_refuses_new_calls_and_waits_for_those_in_flight() {
        // The drain sequence this module documents (common practice, no
        // source).
        let drain = Arc::new(Drain::default());
        let first = drain.enter().unwrap();
        drain.begin();
        let refused = drain.enter().unwrap_err();
        assert!(
            matches!(refused, ServiceError::ShuttingDown(_)),
            "{refused:?}"
        );
        assert_eq!(drain.in_flight(), 1, "a refused call is not left counted");
        let waiter = {
            let drain = drain.clone();
            tokio::spawn(async move { drain.idle().await })
        };
        tokio::time::sleep(Duration::from_millis(20)).await;
        assert!(!waiter.is_finished(), "a call is still in flight");
        drop(first);
        tokio::time::timeout(Duration::from_secs(10), waiter)
            .await
            .expect("idle once the last call ends")
            .unwrap();
    }

    #[test]
    fn stopping_cancels_every_computation_flag() {
        let drain = Drain::default();
        let flags = [drain.cancel_flag(), drain.cancel_flag()];
        assert!(flags.iter().all(|flag| !flag.is_cancelled()));
        drain.stop();
        assert!(drain.stopped());
        assert!(flags.iter().all(CancelFlag::is_cancelled));
    }
}
