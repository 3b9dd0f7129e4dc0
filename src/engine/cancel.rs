//! Cooperative cancellation: a flag the caller sets when it no longer wants
//! an answer, and that every estimator reads wherever it reads its
//! deadline, so an abandoned computation frees its thread within a batch.
//! Plain atomics: the engine knows nothing of the runtime that sets it.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

/// Shared by the caller and the computation; clones see the same flag. A
/// flag made by [`CancelFlag::child`] is also set by its parent's, so one
/// call's flag and the whole server's stop the same computation.
#[derive(Debug, Clone, Default)]
pub struct CancelFlag {
    own: Arc<AtomicBool>,
    parent: Option<Arc<AtomicBool>>,
}

impl CancelFlag {
    pub fn new() -> CancelFlag {
        CancelFlag::default()
    }

    /// A new flag that reads as set once either it or this flag's own is
    /// set (this flag's parent, if any, is not inherited: one level is all
    /// the server needs).
    pub fn child(&self) -> CancelFlag {
        CancelFlag {
            own: Arc::default(),
            parent: Some(self.own.clone()),
        }
    }

    /// Asks the computation to stop at its next check.
    pub fn cancel(&self) {
        // Relaxed is enough: the flag carries no data, and the next check
        // after the store sees it.
        self.own.store(true, Ordering::Relaxed);
    }

    pub fn is_cancelled(&self) -> bool {
        self.own.load(Ordering::Relaxed)
            || self
                .parent
                .as_ref()
                .is_some_and(|parent| parent.load(Ordering::Relaxed))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_child_is_set_by_its_parent_but_not_the_other_way() {
        // The flag's documented contract (common practice, no source).
        let server = CancelFlag::new();
        let call = server.child();
        let other = server.child();
        call.cancel();
        assert!(call.is_cancelled());
        assert!(!other.is_cancelled() && !server.is_cancelled());
        server.cancel();
        assert!(other.is_cancelled());
    }
}
