//! Estimators: each computes (or estimates) one summary of a game and
//! returns the values with a std error per player, whether it converged,
//! and — through the game's cache — how many coalitions it evaluated.
//!
//! Sampled estimators are anytime: they work in rounds and stop at the
//! tolerance, the evaluation cap or the deadline, whichever comes first.
//! Exact estimators cannot stop with half an answer: they check the
//! deadline and the cancel flag between batches and fail when either trips.
//!
//! Every estimator's std errors include the removal's own noise: a random
//! removal makes each coalition value a mean of random draws, with a
//! variance the game reports.

pub mod boundary;
pub mod exact;
mod fit;
pub mod linear;
pub mod msr;
pub mod permutation;
pub mod regression;
pub mod row_permutation;
mod sampling;
pub mod tree;
pub mod tree_table;

use std::time::Instant;

use crate::engine::cancel::CancelFlag;
use crate::engine::error::{EngineError, ErrorKind, Result};

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
    /// Joint (permutation, background row) sampling of marginal Shapley
    /// values, for when one coalition over all background rows is too
    /// expensive.
    RowPermutation,
    /// The exact tree algorithm's per-row pass over a random subset of
    /// background rows, for when the whole pass does not fit.
    TreeRowSample,
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
            EstimatorKind::RowPermutation => "ROW_PERMUTATION",
            EstimatorKind::TreeRowSample => "TREE_ROW_SAMPLE",
        }
    }

    pub fn is_exact(self) -> bool {
        matches!(
            self,
            EstimatorKind::Exact | EstimatorKind::TreeExact | EstimatorKind::LinearExact
        )
    }
}

/// When an estimator stops.
#[derive(Debug, Clone)]
pub struct Stopping {
    /// Stop once every std error is at most this (same units as the values);
    /// 0 disables the check. An exact answer over a noisy game is
    /// `converged` only if every std error is within it.
    pub tolerance: f64,
    /// Most distinct coalitions to evaluate.
    pub max_evaluations: u64,
    /// A sampler stops here with what it has; an exact estimator fails.
    pub deadline: Option<Instant>,
    /// Set when the answer is no longer wanted: every estimator fails at
    /// its next check.
    pub cancel: CancelFlag,
}

impl Stopping {
    pub fn evaluations(max_evaluations: u64) -> Stopping {
        Stopping {
            tolerance: 0.0,
            max_evaluations,
            deadline: None,
            cancel: CancelFlag::new(),
        }
    }

    /// No cap, no deadline, no tolerance: for callers that run to the end.
    pub fn unbounded() -> Stopping {
        Stopping::evaluations(u64::MAX)
    }

    pub fn past_deadline(&self) -> bool {
        self.deadline.is_some_and(|d| Instant::now() >= d)
    }

    /// The error a sampler returns when it is cancelled between rounds.
    pub(crate) fn check_cancelled(&self) -> Result<()> {
        if self.cancel.is_cancelled() {
            return Err(cancelled());
        }
        Ok(())
    }

    /// For estimators with no partial answer: fails when cancelled or past
    /// the deadline. `progress` says how far the work got, for the message.
    pub(crate) fn check_exact(
        &self,
        estimator: &str,
        progress: impl FnOnce() -> String,
    ) -> Result<()> {
        self.check_cancelled()?;
        if self.past_deadline() {
            return Err(EngineError::of_kind(
                ErrorKind::DeadlineExceeded,
                "budget_ms",
                format!(
                    "{estimator} reached the deadline after {}; an exact answer cannot be cut \
                     short: raise budget_ms (and the call's deadline) or choose a sampled estimator",
                    progress()
                ),
            ));
        }
        Ok(())
    }

    /// Whether the largest std error meets the tolerance.
    pub fn tolerance_met(&self, std_errors: &[f64]) -> bool {
        self.tolerance > 0.0 && std_errors.iter().all(|s| *s <= self.tolerance)
    }
}

/// How fast a sampler's work has gone so far in this run, to size its next
/// round so the round is predicted to end by the deadline. Sized by counts
/// alone, a round can overrun the deadline by as much as all the rounds
/// before it took (rounds double while they are small), and with models
/// costing milliseconds per coalition that is the whole budget again.
pub(crate) struct Pace {
    started: Instant,
    done: u64,
}

impl Pace {
    pub(crate) fn start() -> Pace {
        Pace {
            started: Instant::now(),
            done: 0,
        }
    }

    /// Counts work units (coalitions, model rows) just computed.
    pub(crate) fn record(&mut self, units: u64) {
        self.done += units;
    }

    /// At most `wanted` sample units of `unit_cost` work units each, fewer
    /// if at this run's pace (setup included, so it errs long) they would
    /// not be done by the deadline; `wanted` when there is no deadline or
    /// nothing has been measured yet. Zero means the run should stop.
    pub(crate) fn fit(&self, wanted: u64, unit_cost: u64, stopping: &Stopping) -> u64 {
        let Some(deadline) = stopping.deadline else {
            return wanted;
        };
        if self.done == 0 {
            return wanted;
        }
        let per_unit = self.started.elapsed().as_secs_f64() / self.done as f64;
        let left = deadline
            .saturating_duration_since(Instant::now())
            .as_secs_f64();
        let fits = (left / (per_unit * unit_cost.max(1) as f64)).floor();
        if fits >= wanted as f64 {
            wanted
        } else {
            fits as u64
        }
    }
}

/// The error of a computation whose caller cancelled it.
pub(crate) fn cancelled() -> EngineError {
    EngineError::of_kind(
        ErrorKind::Cancelled,
        "request",
        "the call was cancelled before the computation finished",
    )
}

/// The tolerance of a request that gives none: 1% of `|v(all) − v(none)|`,
/// but never below 1% of a thousandth of the game's largest end, so a game
/// whose ends coincide (the efficient summaries then sum to 0) converges
/// once its std errors are negligible on the game's own scale instead of
/// never; and the smallest positive number when both ends are 0, so an
/// all-zero game converges at once (common practice, no source: a relative
/// tolerance needs a scale, and the ends are the only scale known before
/// sampling).
pub fn default_tolerance(value_empty: f64, value_full: f64) -> f64 {
    let magnitude = value_empty.abs().max(value_full.abs());
    let scale = (value_full - value_empty).abs().max(1e-3 * magnitude);
    if scale > 0.0 {
        0.01 * scale
    } else {
        f64::MIN_POSITIVE
    }
}

/// What an estimator found.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    /// One value per player, in player order.
    pub values: Vec<f64>,
    /// One std error per player: the sampling error of sampled estimators
    /// and the removal's noise (random draws) for all; 0 for an exact
    /// estimator over a deterministic removal.
    pub std_errors: Vec<f64>,
    /// `v(all)`.
    pub value_full: f64,
    /// `v(none)`.
    pub value_empty: f64,
    /// Whether every std error is within the tolerance: false when a
    /// sampled estimator stopped at the cap or the deadline before reaching
    /// it, or when removal noise leaves an exact answer's std errors above
    /// it.
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

    /// An exact summary of a noisy game: its std errors come from the
    /// removal's draws alone, and it has converged when they are within
    /// `tolerance`.
    pub fn exact_with_noise(
        values: Vec<f64>,
        std_errors: Vec<f64>,
        value_full: f64,
        value_empty: f64,
        tolerance: f64,
    ) -> Estimate {
        let converged = std_errors.iter().all(|s| *s <= tolerance);
        Estimate {
            values,
            std_errors,
            value_full,
            value_empty,
            converged,
            selection: None,
        }
    }

    /// `v(all) - v(none) - Σ values`: zero (to rounding) for efficient
    /// summaries; not a measure of accuracy (see [`Estimate::relative_error`]).
    pub fn efficiency_gap(&self) -> f64 {
        self.value_full - self.value_empty - self.values.iter().sum::<f64>()
    }

    /// `‖std_errors‖₂ / ‖values‖₂`: the estimate's relative error, the
    /// figure the engine bench reports as relative L2 error, estimated from
    /// the answer itself. 0 with no error; infinite when every value is 0
    /// but some std error is not.
    pub fn relative_error(&self) -> f64 {
        let errors = self.std_errors.iter().map(|e| e * e).sum::<f64>().sqrt();
        if errors == 0.0 {
            return 0.0;
        }
        errors / self.values.iter().map(|v| v * v).sum::<f64>().sqrt()
    }
}

#[cfg(test)]
mod tests {
    use std::time::Duration;

    use super::*;

    #[test]
    fn the_relative_error_is_the_ratio_of_the_norms() {
        // Its documented definition (common practice, no source): a
        // 3-4-5 triangle on each side.
        let estimate = |values: Vec<f64>, std_errors: Vec<f64>| Estimate {
            values,
            std_errors,
            value_full: 0.0,
            value_empty: 0.0,
            converged: false,
            selection: None,
        };
        let sampled = estimate(vec![3.0, -4.0], vec![0.3, 0.4]);
        assert!((sampled.relative_error() - 0.1).abs() < 1e-15);
        assert_eq!(
            estimate(vec![1.0, 2.0], vec![0.0, 0.0]).relative_error(),
            0.0
        );
        assert_eq!(
            estimate(vec![0.0, 0.0], vec![0.0, 0.0]).relative_error(),
            0.0
        );
        assert!(
            estimate(vec![0.0, 0.0], vec![0.1, 0.0])
                .relative_error()
                .is_infinite()
        );
    }

    #[test]
    fn a_round_is_cut_to_what_fits_before_the_deadline() {
        // The pace rule this module documents (common practice, no
        // source). Only bounds that time passing cannot break: the time
        // left only shrinks and the pace only slows.
        let mut stopping = Stopping::unbounded();
        let pace = Pace {
            started: Instant::now() - Duration::from_millis(10),
            done: 10,
        };
        assert_eq!(pace.fit(100, 1, &stopping), 100, "no deadline");
        stopping.deadline = Some(Instant::now() + Duration::from_millis(5));
        assert!(pace.fit(100, 1, &stopping) <= 5, "1 ms a unit, 5 ms left");
        assert!(pace.fit(100, 2, &stopping) <= 2, "2 ms a unit");
        stopping.deadline = Some(Instant::now());
        assert_eq!(pace.fit(100, 1, &stopping), 0, "no time left");
        let unmeasured = Pace::start();
        assert_eq!(
            unmeasured.fit(100, 1, &stopping),
            100,
            "nothing measured yet"
        );
    }
}
