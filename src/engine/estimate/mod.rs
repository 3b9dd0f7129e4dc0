//! Estimators: each computes (or estimates) one summary of a game and
//! returns the values with a std error per player, whether it converged,
//! and — through the game's cache — how many coalitions it evaluated.
//!
//! Sampled estimators are anytime: they work in rounds and stop at the
//! tolerance, the evaluation cap or the deadline, whichever comes first.

pub mod exact;
mod fit;
pub mod linear;
pub mod msr;
pub mod permutation;
pub mod regression;
mod sampling;
pub mod tree;

use std::time::Instant;

/// The estimator choices, as the API names them.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum EstimatorKind {
    Exact,
    Permutation,
    PairedRegression,
    LeverageRegression,
    MaximumSampleReuse,
    TreeExact,
    LinearExact,
}

impl EstimatorKind {
    pub fn name(self) -> &'static str {
        match self {
            EstimatorKind::Exact => "EXACT",
            EstimatorKind::Permutation => "PERMUTATION",
            EstimatorKind::PairedRegression => "PAIRED_REGRESSION",
            EstimatorKind::LeverageRegression => "LEVERAGE_REGRESSION",
            EstimatorKind::MaximumSampleReuse => "MSR",
            EstimatorKind::TreeExact => "TREE_EXACT",
            EstimatorKind::LinearExact => "LINEAR_EXACT",
        }
    }

    pub fn is_exact(self) -> bool {
        matches!(
            self,
            EstimatorKind::Exact | EstimatorKind::TreeExact | EstimatorKind::LinearExact
        )
    }
}

/// When a sampled estimator stops.
#[derive(Debug, Clone, Copy)]
pub struct Stopping {
    /// Stop once every std error is at most this (same units as the values);
    /// 0 disables the check.
    pub tolerance: f64,
    /// Most distinct coalitions to evaluate.
    pub max_evaluations: u64,
    /// Stop at this instant, with what has been gathered.
    pub deadline: Option<Instant>,
}

impl Stopping {
    pub fn evaluations(max_evaluations: u64) -> Stopping {
        Stopping {
            tolerance: 0.0,
            max_evaluations,
            deadline: None,
        }
    }

    pub fn past_deadline(&self) -> bool {
        self.deadline.is_some_and(|d| Instant::now() >= d)
    }

    /// Whether the largest std error meets the tolerance.
    pub fn tolerance_met(&self, std_errors: &[f64]) -> bool {
        self.tolerance > 0.0 && std_errors.iter().all(|s| *s <= self.tolerance)
    }
}

/// What an estimator found.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    /// One value per player, in player order.
    pub values: Vec<f64>,
    /// One std error per player; 0 for exact estimators.
    pub std_errors: Vec<f64>,
    /// `v(all)`.
    pub value_full: f64,
    /// `v(none)`.
    pub value_empty: f64,
    /// False when a sampled estimator stopped at the cap or the deadline
    /// before reaching the tolerance.
    pub converged: bool,
    /// For [`crate::engine::Summary::Selection`]: the chosen players in the
    /// order they were added, and the value `v(chosen)` reached.
    pub selection: Option<Selection>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Selection {
    pub players: Vec<usize>,
    pub value: f64,
}

impl Estimate {
    /// An exact answer: zero std errors, converged.
    pub fn exact(values: Vec<f64>, value_full: f64, value_empty: f64) -> Estimate {
        let players = values.len();
        Estimate {
            values,
            std_errors: vec![0.0; players],
            value_full,
            value_empty,
            converged: true,
            selection: None,
        }
    }

    /// `v(all) - v(none) - Σ values`: zero (to rounding) for efficient
    /// summaries.
    pub fn efficiency_gap(&self) -> f64 {
        self.value_full - self.value_empty - self.values.iter().sum::<f64>()
    }
}
