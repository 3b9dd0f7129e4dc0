//! The planner: from the game's size, the model's structure and measured
//! per-row cost, the budget and the caps, choose the estimator and say why.
//!
//! Preference order: a model-specific exact algorithm when one is valid
//! (it beats any sampler); else exact enumeration when it fits the budget and
//! the caps; else the sampler best suited to the summary, given as many
//! evaluations as the budget allows.

use std::time::Duration;

use super::error::{EngineError, Result};
use super::estimate::EstimatorKind;
use super::estimate::exact::ENUMERATION_LIMIT;
use super::removal::RemovalKind;
use super::summary::{Kernel, Summary};

/// Default cap on players for exact enumeration (2^20 coalitions).
pub const DEFAULT_ENUMERATION_CAP: usize = 20;

/// What the model lets the planner do beyond evaluating it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ModelShape {
    Linear,
    Trees,
    Opaque,
}

/// Everything the planner looks at.
#[derive(Debug, Clone)]
pub struct PlanInput {
    pub players: usize,
    /// Model rows one coalition value costs (removal rows × instances).
    pub rows_per_coalition: usize,
    pub shape: ModelShape,
    pub removal: RemovalKind,
    /// Whether the target is the raw output (the only one the
    /// model-specific algorithms compute).
    pub output_target: bool,
    pub summary: Summary,
    /// `None` lets the planner choose.
    pub requested: Option<EstimatorKind>,
    pub budget: Duration,
    pub max_evaluations: u64,
    /// Measured time of one model row, in nanoseconds.
    pub row_cost_ns: f64,
    /// Predicted time of the model-specific exact algorithm, where the
    /// model has one, in nanoseconds.
    pub exact_cost_ns: Option<f64>,
    pub enumeration_cap: usize,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    pub estimator: EstimatorKind,
    /// Distinct coalitions the estimator may evaluate (the smaller of the
    /// cap and what the budget pays for; exact estimators ignore it).
    pub max_evaluations: u64,
    /// One sentence for the caller on why this estimator was chosen.
    pub reason: String,
    /// Predicted computing time, from the measured costs.
    pub predicted: Duration,
}

impl PlanInput {
    /// Predicted time of one coalition value, in nanoseconds.
    fn coalition_cost_ns(&self) -> f64 {
        self.rows_per_coalition as f64 * self.row_cost_ns.max(1.0)
    }

    /// Coalition evaluations the budget pays for at the measured row cost.
    fn affordable_evaluations(&self) -> u64 {
        (self.budget.as_nanos() as f64 / self.coalition_cost_ns()).floor() as u64
    }

    /// Predicted time of `estimator` evaluating at most `evaluations`
    /// coalitions.
    fn predicted(&self, estimator: EstimatorKind, evaluations: u64) -> Duration {
        let nanoseconds = match estimator {
            EstimatorKind::TreeExact | EstimatorKind::LinearExact => {
                self.exact_cost_ns.unwrap_or(0.0)
            }
            _ => evaluations as f64 * self.coalition_cost_ns(),
        };
        Duration::from_secs_f64(nanoseconds.max(0.0) / 1e9)
    }

    /// Coalitions exact enumeration of the summary evaluates.
    fn enumerated(&self) -> u64 {
        let p = self.players as u64;
        match self.summary {
            Summary::LeaveOneOut | Summary::IncludeOne => p + 2,
            Summary::Selection { .. } => p * (p + 1) / 2 + 2,
            _ if p < 64 => 1 << p,
            _ => u64::MAX,
        }
    }

    fn model_specific(&self) -> Option<(EstimatorKind, &'static str)> {
        model_specific(self.shape, self.removal, self.output_target, self.summary)
    }

    /// Why `estimator` cannot compute this request, if it cannot.
    fn incompatibility(&self, estimator: EstimatorKind) -> Option<String> {
        let summary = self.summary.name();
        match estimator {
            EstimatorKind::TreeExact | EstimatorKind::LinearExact => {
                let wanted = if estimator == EstimatorKind::TreeExact {
                    ModelShape::Trees
                } else {
                    ModelShape::Linear
                };
                if self.shape != wanted {
                    return Some(format!("{} needs a {wanted:?} model", estimator.name()).to_lowercase());
                }
                match self.model_specific() {
                    Some((kind, _)) if kind == estimator => None,
                    _ => Some(format!(
                        "{} computes the raw-output target under marginal or fixed removal only, for {}; \
                         this request asks for {summary} under {:?} removal",
                        estimator.name(),
                        if estimator == EstimatorKind::TreeExact {
                            "SHAPLEY or BANZHAF"
                        } else {
                            "SHAPLEY, BANZHAF, LEAVE_ONE_OUT or INCLUDE_ONE"
                        },
                        self.removal
                    )),
                }
            }
            EstimatorKind::Exact => {
                let needs_all = matches!(
                    self.summary,
                    Summary::Shapley | Summary::Banzhaf | Summary::LinearFit(_)
                );
                (needs_all && self.players > ENUMERATION_LIMIT).then(|| {
                    format!(
                        "EXACT enumerates 2^{} coalitions for {summary}; the limit is {ENUMERATION_LIMIT} players",
                        self.players
                    )
                })
            }
            EstimatorKind::Permutation => (self.summary != Summary::Shapley)
                .then(|| format!("PERMUTATION estimates SHAPLEY only, not {summary}")),
            EstimatorKind::PairedRegression => (!matches!(
                self.summary,
                Summary::Shapley | Summary::LinearFit(_)
            ))
            .then(|| format!("PAIRED_REGRESSION estimates SHAPLEY or LINEAR_FIT, not {summary}")),
            EstimatorKind::LeverageRegression => (!matches!(
                self.summary,
                Summary::Shapley | Summary::LinearFit(Kernel::Shapley)
            ))
            .then(|| {
                format!(
                    "LEVERAGE_REGRESSION estimates SHAPLEY (the Shapley-kernel fit) only, not {summary}"
                )
            }),
            EstimatorKind::MaximumSampleReuse => (self.summary != Summary::Banzhaf)
                .then(|| format!("MSR estimates BANZHAF only, not {summary}")),
        }
    }
}

/// The model-specific exact algorithm for these choices, if there is one,
/// and why it applies.
pub fn model_specific(
    shape: ModelShape,
    removal: RemovalKind,
    output_target: bool,
    summary: Summary,
) -> Option<(EstimatorKind, &'static str)> {
    let removal_ok = matches!(removal, RemovalKind::Marginal | RemovalKind::Fixed);
    if !removal_ok || !output_target {
        return None;
    }
    match (shape, summary) {
        (ModelShape::Trees, Summary::Shapley | Summary::Banzhaf) => Some((
            EstimatorKind::TreeExact,
            "tree ensemble under marginal or fixed removal of the raw output: the exact tree algorithm needs no coalition enumeration",
        )),
        (
            ModelShape::Linear,
            Summary::Shapley | Summary::Banzhaf | Summary::LeaveOneOut | Summary::IncludeOne,
        ) => Some((
            EstimatorKind::LinearExact,
            "linear model under marginal or fixed removal of the raw output: the game is additive, so the closed form w·(x − reference) is exact",
        )),
        _ => None,
    }
}

/// Chooses the estimator for `input`.
pub fn plan(input: &PlanInput) -> Result<Plan> {
    if input.players == 0 {
        return Err(EngineError::new("features", "the game has no players"));
    }
    let affordable = input.affordable_evaluations();
    let sampled_cap = input.max_evaluations.min(affordable.max(1));

    if let Some(requested) = input.requested {
        if let Some(why) = input.incompatibility(requested) {
            return Err(EngineError::new("estimator", why));
        }
        if requested == EstimatorKind::Exact && input.enumerated() > input.max_evaluations {
            return Err(EngineError::new(
                "max_evaluations",
                format!(
                    "EXACT evaluates up to {} coalitions for {} over {} players, more than the {} \
                     allowed: raise max_evaluations or choose a sampled estimator",
                    input.enumerated(),
                    input.summary.name(),
                    input.players,
                    input.max_evaluations
                ),
            ));
        }
        let max_evaluations = if requested.is_exact() {
            input.max_evaluations
        } else {
            sampled_cap
        };
        let evaluations = match requested {
            EstimatorKind::Exact => input.enumerated(),
            _ => max_evaluations,
        };
        return Ok(Plan {
            estimator: requested,
            max_evaluations,
            reason: format!("{} as requested", requested.name()),
            predicted: input.predicted(requested, evaluations),
        });
    }

    if let Some((estimator, why)) = input.model_specific() {
        return Ok(Plan {
            estimator,
            max_evaluations: input.max_evaluations,
            reason: why.to_string(),
            predicted: input.predicted(estimator, 0),
        });
    }

    let p = input.players;
    if matches!(
        input.summary,
        Summary::LeaveOneOut | Summary::IncludeOne | Summary::Selection { .. }
    ) {
        let needed = input.enumerated();
        return Ok(Plan {
            estimator: EstimatorKind::Exact,
            max_evaluations: input.max_evaluations,
            reason: format!(
                "{} needs at most {needed} coalition values, so it is computed exactly",
                input.summary.name()
            ),
            predicted: input.predicted(EstimatorKind::Exact, needed),
        });
    }

    let all = if p < 64 { 1u64 << p } else { u64::MAX };
    let cap = input.enumeration_cap.min(ENUMERATION_LIMIT);
    if p <= cap && all <= input.max_evaluations && all <= affordable {
        let predicted = input.predicted(EstimatorKind::Exact, all);
        return Ok(Plan {
            estimator: EstimatorKind::Exact,
            max_evaluations: all,
            reason: format!(
                "all 2^{p} coalitions × {} rows ≈ {:.1} ms fit the budget, so the answer is exact",
                input.rows_per_coalition,
                predicted.as_secs_f64() * 1e3
            ),
            predicted,
        });
    }

    let why_not_exact = if p > cap {
        format!("{p} players exceed the exact-enumeration cap of {cap}")
    } else if all > input.max_evaluations {
        format!(
            "2^{p} coalitions exceed max_evaluations = {}",
            input.max_evaluations
        )
    } else {
        format!(
            "2^{p} coalitions × {} rows would take longer than the {} ms budget",
            input.rows_per_coalition,
            input.budget.as_millis()
        )
    };
    let (estimator, method) = match input.summary {
        Summary::Banzhaf => (
            EstimatorKind::MaximumSampleReuse,
            "maximum-sample-reuse sampling (every sample informs every player)",
        ),
        Summary::LinearFit(Kernel::Exponential { .. }) => (
            EstimatorKind::PairedRegression,
            "paired kernel-weighted regression",
        ),
        _ => (
            EstimatorKind::LeverageRegression,
            "leverage-score paired regression (lowest error per evaluation in our benchmark)",
        ),
    };
    Ok(Plan {
        estimator,
        max_evaluations: sampled_cap,
        reason: format!("{why_not_exact}; sampling with {method}, up to {sampled_cap} coalitions"),
        predicted: input.predicted(estimator, sampled_cap),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn input(players: usize) -> PlanInput {
        PlanInput {
            players,
            rows_per_coalition: 100,
            shape: ModelShape::Opaque,
            removal: RemovalKind::Marginal,
            output_target: true,
            summary: Summary::Shapley,
            requested: None,
            budget: Duration::from_millis(100),
            max_evaluations: 1 << 20,
            row_cost_ns: 50.0,
            exact_cost_ns: None,
            enumeration_cap: DEFAULT_ENUMERATION_CAP,
        }
    }

    // Planner rules are our own design (common practice, no source): the
    // checks below follow from the costs stated in each case.

    #[test]
    fn small_games_within_budget_are_exact() {
        // 2^8 × 100 rows × 50 ns = 1.3 ms < 100 ms.
        let plan = plan(&input(8)).unwrap();
        assert_eq!(plan.estimator, EstimatorKind::Exact);
        assert_eq!(plan.max_evaluations, 256);
    }

    #[test]
    fn games_beyond_the_budget_are_sampled_within_what_it_pays_for() {
        // 2^16 × 100 × 50 ns = 328 ms > 100 ms; 100 ms pays for 20,000 coalitions.
        let plan = plan(&input(16)).unwrap();
        assert_eq!(plan.estimator, EstimatorKind::LeverageRegression);
        assert_eq!(plan.max_evaluations, 20_000);
        assert!(plan.reason.contains("budget"), "{}", plan.reason);
    }

    #[test]
    fn model_specific_exact_algorithms_come_first() {
        let mut trees = input(40);
        trees.shape = ModelShape::Trees;
        assert_eq!(plan(&trees).unwrap().estimator, EstimatorKind::TreeExact);
        trees.removal = RemovalKind::ConditionalGaussian;
        assert_ne!(plan(&trees).unwrap().estimator, EstimatorKind::TreeExact);
    }

    #[test]
    fn incompatible_requests_name_the_estimator_field() {
        let mut request = input(10);
        request.summary = Summary::Banzhaf;
        request.requested = Some(EstimatorKind::Permutation);
        assert_eq!(plan(&request).unwrap_err().field, "estimator");
        request.requested = Some(EstimatorKind::TreeExact);
        assert_eq!(plan(&request).unwrap_err().field, "estimator");
    }
}
