//! Cooperative cancellation: a flag the caller sets when it no longer wants
//! an answer, and that every estimator reads wherever it reads its
//! deadline, so an abandoned computation frees its thread within a batch.
//! Plain atomics: the engine knows nothing of the runtime that sets it.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};

/// Shared by the caller and the computation; clones see the same flag.
#[derive(Debug, Clone, Default)]
pub struct CancelFlag(Arc<AtomicBool>);

impl CancelFlag {
    pub fn new() -> CancelFlag {
        CancelFlag::default()
    }

    /// Asks the computation to stop at its next check.
    pub fn cancel(&self) {
        // Relaxed is enough: the flag carries no data, and the next check
        // after the store sees it.
        self.0.store(true, Ordering::Relaxed);
    }

    pub fn is_cancelled(&self) -> bool {
        self.0.load(Ordering::Relaxed)
    }
}
