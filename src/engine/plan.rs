//! The planner: from the game's size, the model's structure and measured
//! per-row cost, the budget and the caps, choose the estimator and say why.
//!
//! Preference order: a model-specific exact algorithm when one is valid
//! (it beats any sampler); else exact enumeration when it fits the budget and
//! the caps; else the sampler best suited to the summary, given as many
//! evaluations as the budget allows.

use std::time::Duration;

use super::error::{EngineError, ErrorKind, Result};
use super::estimate::EstimatorKind;
use super::estimate::exact::ENUMERATION_LIMIT;
use super::estimate::row_permutation;
use super::removal::RemovalKind;
use super::summary::{Kernel, Summary};

/// Default cap on players for exact enumeration (2^20 coalitions).
pub const DEFAULT_ENUMERATION_CAP: usize = 20;

/// Share of the budget an exact enumeration or a model-specific exact
/// algorithm may be predicted to take for AUTO to choose it: neither can
/// stop early with what it has, a predicted
/// time is a mean and not a bound, and a sampler that stops on time is
/// there when it does not fit (common practice, no source).
const EXACT_SHARE: f64 = 0.75;

/// Share of the budget a coalition sampler's smallest run may be predicted
/// to take for AUTO to choose it when joint row sampling could answer
/// instead: a smallest run that nearly fills the budget gives one barely
/// determined estimate and leaves nothing for a late start, where joint
/// row sampling spends the same time on many cheap units and can stop
/// after any of them (common practice, no source).
const SAMPLER_FIRST_SHARE: f64 = 0.5;

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
    /// Whether joint (permutation, background row) sampling estimates this
    /// game: MARGINAL removal of one instance under OUTPUT or PROBABILITY,
    /// where a coalition value is a mean over background rows of a per-row
    /// value.
    pub row_sampling: bool,
    /// Predicted time of the tree algorithm's per-row pass for one
    /// background row (tree models), in nanoseconds.
    pub tree_row_cost_ns: Option<f64>,
    /// Background rows the marginal game averages over.
    pub background_rows: usize,
    /// Predicted time of every coalition value by the tree walk (see
    /// [`super::estimate::tree_table`]), in nanoseconds, when exact
    /// enumeration takes its values from it (it is cheaper than the rows).
    pub table_cost_ns: Option<f64>,
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
    /// Predicted time of the smallest answer the plan can give: all of it
    /// for an exact estimator, the first round for an anytime sampler
    /// (which stops at its deadline with what it has). Admission control
    /// refuses a call that cannot start early enough to finish this much.
    pub minimum: Duration,
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

    /// Model rows the budget pays for at the measured row cost.
    fn affordable_rows(&self) -> u64 {
        (self.budget.as_nanos() as f64 / self.row_cost_ns.max(1.0)).floor() as u64
    }

    /// Predicted time of one background row of the subsampled tree pass:
    /// the pass itself and the row's prediction.
    fn tree_row_ns(&self) -> f64 {
        (self.tree_row_cost_ns.unwrap_or(0.0) + self.row_cost_ns).max(1.0)
    }

    /// Background rows of the subsampled tree pass the budget pays for, at
    /// most every row and the cap.
    fn affordable_tree_rows(&self) -> u64 {
        let affordable = (self.budget.as_nanos() as f64 / self.tree_row_ns()).floor() as u64;
        affordable
            .min(self.background_rows as u64)
            .min(self.max_evaluations)
    }

    /// Predicted time of the subsampled tree pass over `rows` rows.
    fn predicted_tree_rows(&self, rows: u64) -> Duration {
        Duration::from_secs_f64(rows as f64 * self.tree_row_ns() / 1e9)
    }

    /// Whether the subsampled tree pass computes this request: where
    /// TREE_EXACT would, under MARGINAL removal (FIXED has one row).
    fn tree_row_sampling(&self) -> bool {
        self.removal == RemovalKind::Marginal
            && self.tree_row_cost_ns.is_some()
            && matches!(self.model_specific(), Some((EstimatorKind::TreeExact, _)))
    }

    /// Predicted time of `rows` model rows.
    fn predicted_rows(&self, rows: u64) -> Duration {
        Duration::from_secs_f64(rows as f64 * self.row_cost_ns.max(1.0) / 1e9)
    }

    /// Predicted time of `estimator` evaluating at most `evaluations`
    /// coalitions.
    fn predicted(&self, estimator: EstimatorKind, evaluations: u64) -> Duration {
        let nanoseconds = match (estimator, self.table_cost_ns) {
            (EstimatorKind::TreeExact | EstimatorKind::LinearExact, _) => {
                self.exact_cost_ns.unwrap_or(0.0)
            }
            (EstimatorKind::Exact, Some(table)) => table,
            _ => evaluations as f64 * self.coalition_cost_ns(),
        };
        Duration::try_from_secs_f64(nanoseconds.max(0.0) / 1e9).unwrap_or(Duration::MAX)
    }

    /// Coalitions exact enumeration of the summary evaluates.
    fn enumerated(&self) -> u64 {
        enumerated(self.summary, self.players)
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
            EstimatorKind::TreeRowSample => (!self.tree_row_sampling()).then(|| {
                format!(
                    "TREE_ROW_SAMPLE needs a tree ensemble under MARGINAL removal of the raw \
                     output, for SHAPLEY or BANZHAF; this request asks for {summary} under {:?} \
                     removal",
                    self.removal
                )
            }),
            EstimatorKind::RowPermutation => {
                if self.summary != Summary::Shapley {
                    Some(format!("ROW_PERMUTATION estimates SHAPLEY only, not {summary}"))
                } else if !self.row_sampling {
                    Some(
                        "ROW_PERMUTATION needs MARGINAL removal with the OUTPUT or PROBABILITY \
                         target, whose coalition value is a mean of per-row values; LOSS and \
                         DATASET_LOSS apply the loss to the averaged prediction, which one row \
                         does not estimate without bias"
                            .to_string(),
                    )
                } else {
                    None
                }
            }
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

/// Fewest background rows of the subsampled tree pass: two give a std
/// error.
const TREE_ROWS_MINIMUM: u64 = 2;

/// Fewest coalition evaluations `estimator` needs for `players` players
/// (each sampler's first round, as it refuses below it; `2^p` always
/// suffices because no coalition is evaluated twice). Exact estimators and
/// the joint row sampler are priced elsewhere.
pub(crate) fn sampler_minimum(estimator: EstimatorKind, players: usize) -> u64 {
    let p = players as u64;
    let need = match estimator {
        _ if players == 1 => 2,
        EstimatorKind::Permutation => 2 + 2 * 2 * (p - 1),
        EstimatorKind::PairedRegression => 2 + 2 * (p + 1),
        // Leverage needs 2 + 2 max(p, Σ_s min(N_s, 2)), and the sum is at
        // most p: two pairs for each of the p/2 sizes.
        EstimatorKind::LeverageRegression => 2 + 2 * p,
        EstimatorKind::MaximumSampleReuse => 34,
        _ => 2,
    };
    if players < 64 {
        need.min(1 << players)
    } else {
        need
    }
}

fn milliseconds(time: Duration) -> f64 {
    time.as_secs_f64() * 1e3
}

/// Refuses an explicitly requested estimator that cannot finish within the
/// budget: asked for by name, it is not swapped for another.
fn refuse_explicit(
    input: &PlanInput,
    estimator: EstimatorKind,
    predicted: Duration,
    what: &str,
) -> EngineError {
    EngineError::failed_precondition(
        "estimator",
        format!(
            "{} is predicted to take {:.3} ms ({what}) at this model's measured costs, over the \
             {:.3} ms budget: raise budget_ms (and the call's deadline) to at least {:.3} ms, or \
             leave estimator at AUTO to get an estimate that fits",
            estimator.name(),
            milliseconds(predicted),
            milliseconds(input.budget),
            milliseconds(predicted).ceil()
        ),
    )
}

/// Chooses the estimator for `input`. Under AUTO nothing is planned that is
/// predicted to take longer than the budget; when even the smallest
/// estimate does not fit, the refusal says what budget would.
pub fn plan(input: &PlanInput) -> Result<Plan> {
    if input.players == 0 {
        return Err(EngineError::new("features", "the game has no players"));
    }
    match input.requested {
        Some(requested) => plan_requested(input, requested),
        None => plan_auto(input),
    }
}

/// The caller named the estimator: it runs as asked if it is compatible and
/// fits the budget, and is refused at once otherwise.
fn plan_requested(input: &PlanInput, requested: EstimatorKind) -> Result<Plan> {
    if let Some(why) = input.incompatibility(requested) {
        return Err(EngineError::new("estimator", why));
    }
    let p = input.players;
    match requested {
        EstimatorKind::TreeExact | EstimatorKind::LinearExact => {
            let predicted = input.predicted(requested, 0);
            if predicted > input.budget {
                return Err(refuse_explicit(
                    input,
                    requested,
                    predicted,
                    "one exact pass",
                ));
            }
            Ok(Plan {
                estimator: requested,
                max_evaluations: input.max_evaluations,
                reason: format!("{} as requested", requested.name()),
                predicted,
                minimum: predicted,
            })
        }
        EstimatorKind::Exact => {
            let needed = input.enumerated();
            if needed > input.max_evaluations {
                return Err(EngineError::new(
                    "max_evaluations",
                    format!(
                        "EXACT evaluates up to {needed} coalitions for {} over {p} players, more \
                         than the {} allowed: raise max_evaluations or choose a sampled estimator",
                        input.summary.name(),
                        input.max_evaluations
                    ),
                ));
            }
            let predicted = input.predicted(requested, needed);
            if predicted > input.budget {
                let what = format!(
                    "{needed} coalitions × {} model rows",
                    input.rows_per_coalition
                );
                return Err(refuse_explicit(input, requested, predicted, &what));
            }
            Ok(Plan {
                estimator: requested,
                max_evaluations: input.max_evaluations,
                reason: format!("{} as requested", requested.name()),
                predicted,
                minimum: predicted,
            })
        }
        EstimatorKind::TreeRowSample => {
            let predicted = input.predicted_tree_rows(TREE_ROWS_MINIMUM);
            if predicted > input.budget {
                let what = format!("its first {TREE_ROWS_MINIMUM} background rows");
                return Err(refuse_explicit(input, requested, predicted, &what));
            }
            let rows = input.affordable_tree_rows();
            Ok(Plan {
                estimator: requested,
                max_evaluations: rows,
                reason: format!(
                    "{} as requested, up to {rows} of {} background rows",
                    requested.name(),
                    input.background_rows
                ),
                predicted: input.predicted_tree_rows(rows),
                minimum: predicted,
            })
        }
        EstimatorKind::RowPermutation => {
            let needed = row_permutation::minimum_rows(p);
            let predicted = input.predicted_rows(needed);
            if predicted > input.budget {
                let what = format!("its first round of {needed} model rows");
                return Err(refuse_explicit(input, requested, predicted, &what));
            }
            let rows = input.max_evaluations.min(input.affordable_rows());
            Ok(Plan {
                estimator: requested,
                max_evaluations: rows,
                reason: format!("{} as requested, up to {rows} model rows", requested.name()),
                predicted: input.predicted_rows(rows),
                minimum: predicted,
            })
        }
        sampler => {
            let needed = sampler_minimum(sampler, p);
            let predicted = input.predicted(sampler, needed);
            if predicted > input.budget {
                let what = format!(
                    "its first round of {needed} coalitions × {} model rows",
                    input.rows_per_coalition
                );
                return Err(refuse_explicit(input, requested, predicted, &what));
            }
            let cap = input.max_evaluations.min(input.affordable_evaluations());
            Ok(Plan {
                estimator: requested,
                max_evaluations: cap,
                reason: format!("{} as requested", requested.name()),
                predicted: input.predicted(sampler, cap),
                minimum: predicted,
            })
        }
    }
}

/// AUTO: the most exact work that fits, degrading to fewer background rows
/// (joint row sampling) rather than refusing.
fn plan_auto(input: &PlanInput) -> Result<Plan> {
    let p = input.players;
    let budget_ms = milliseconds(input.budget);
    // Why each better path was passed over, for the plan reason.
    let mut passed_over = Vec::new();
    if let Some((estimator, why)) = input.model_specific() {
        let predicted = input.predicted(estimator, 0);
        if predicted.as_secs_f64() <= EXACT_SHARE * input.budget.as_secs_f64() {
            return Ok(Plan {
                estimator,
                max_evaluations: input.max_evaluations,
                reason: why.to_string(),
                predicted,
                minimum: predicted,
            });
        }
        passed_over.push(format!(
            "{} would take {:.3} ms, more than {:.0}% of the {budget_ms:.3} ms budget",
            estimator.name(),
            milliseconds(predicted),
            EXACT_SHARE * 100.0
        ));
        let rows = input.affordable_tree_rows();
        if input.tree_row_sampling() && rows >= TREE_ROWS_MINIMUM {
            passed_over.push(format!(
                "the tree algorithm's per-row pass over {rows} of {} background rows in random \
                 order fits instead (exact in the coalitions, sampled in the rows)",
                input.background_rows
            ));
            return Ok(Plan {
                estimator: EstimatorKind::TreeRowSample,
                max_evaluations: rows,
                reason: passed_over.join("; "),
                predicted: input.predicted_tree_rows(rows),
                minimum: input.predicted_tree_rows(TREE_ROWS_MINIMUM),
            });
        }
    }

    let affordable = input.affordable_evaluations();
    if matches!(
        input.summary,
        Summary::LeaveOneOut | Summary::IncludeOne | Summary::Selection { .. }
    ) {
        let needed = input.enumerated();
        let predicted = input.predicted(EstimatorKind::Exact, needed);
        if predicted <= input.budget {
            return Ok(Plan {
                estimator: EstimatorKind::Exact,
                max_evaluations: input.max_evaluations,
                reason: format!(
                    "{} needs at most {needed} coalition values, so it is computed exactly",
                    input.summary.name()
                ),
                predicted,
                minimum: predicted,
            });
        }
        // No sampler estimates these summaries: the exact answer is the
        // smallest there is.
        return Err(too_small(
            input,
            predicted,
            &format!(
                "{} needs {needed} coalition values × {} model rows",
                input.summary.name(),
                input.rows_per_coalition
            ),
        ));
    }

    let all = if p < 64 { 1u64 << p } else { u64::MAX };
    let cap = input.enumeration_cap.min(ENUMERATION_LIMIT);
    let predicted_all = input.predicted(EstimatorKind::Exact, all);
    if p <= cap
        && all <= input.max_evaluations
        && predicted_all.as_secs_f64() <= EXACT_SHARE * input.budget.as_secs_f64()
    {
        let predicted = predicted_all;
        let how = if input.table_cost_ns.is_some() {
            "coalition values, by walking the trees with each of the"
        } else {
            "coalitions ×"
        };
        passed_over.push(format!(
            "all 2^{p} {how} {} rows ≈ {:.1} ms fit the budget, so the answer is exact",
            input.rows_per_coalition,
            milliseconds(predicted)
        ));
        return Ok(Plan {
            estimator: EstimatorKind::Exact,
            max_evaluations: all,
            reason: passed_over.join("; "),
            predicted,
            minimum: predicted,
        });
    }
    passed_over.push(if p > cap {
        format!("{p} players exceed the exact-enumeration cap of {cap}")
    } else if all > input.max_evaluations {
        format!(
            "2^{p} coalitions exceed max_evaluations = {}",
            input.max_evaluations
        )
    } else {
        format!(
            "2^{p} coalitions × {} rows ≈ {:.1} ms would take more than {:.0}% of the \
             {budget_ms:.3} ms budget",
            input.rows_per_coalition,
            milliseconds(predicted_all),
            EXACT_SHARE * 100.0
        )
    });

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
    let needed = sampler_minimum(estimator, p);
    let sampled_cap = input.max_evaluations.min(affordable);
    let coalition_predicted = input.predicted(estimator, needed);
    let joint = input.summary == Summary::Shapley && input.row_sampling;
    let roomy =
        coalition_predicted.as_secs_f64() <= SAMPLER_FIRST_SHARE * input.budget.as_secs_f64();
    let coalition_plan = |mut passed_over: Vec<String>| {
        passed_over.push(format!(
            "sampling with {method}, up to {sampled_cap} coalitions"
        ));
        Ok(Plan {
            estimator,
            max_evaluations: sampled_cap,
            reason: passed_over.join("; "),
            predicted: input.predicted(estimator, sampled_cap),
            minimum: coalition_predicted,
        })
    };
    if sampled_cap >= needed && (roomy || !joint) {
        return coalition_plan(passed_over);
    }
    if input.max_evaluations < needed && affordable >= needed {
        // The caller's own cap, not the budget, is what is too small.
        return Err(EngineError::new(
            "max_evaluations",
            format!(
                "{} needs at least {needed} coalition evaluations for {p} players; {} allowed",
                estimator.name(),
                input.max_evaluations
            ),
        ));
    }

    if joint {
        let rows_needed = row_permutation::minimum_rows(p);
        let rows = input.max_evaluations.min(input.affordable_rows());
        if rows < rows_needed && sampled_cap >= needed {
            return coalition_plan(passed_over);
        }
        if rows >= rows_needed {
            passed_over.push(format!(
                "one coalition over all {} background rows costs {:.3} ms, so the {needed} \
                 coalitions the smallest {} run needs would take {:.3} ms, {} the {budget_ms:.3} \
                 ms budget; sampling permutations and background rows jointly instead, up to \
                 {rows} model rows",
                input.rows_per_coalition,
                milliseconds(input.predicted(estimator, 1)),
                estimator.name(),
                milliseconds(coalition_predicted),
                if sampled_cap >= needed {
                    "more than half of"
                } else {
                    "over"
                }
            ));
            return Ok(Plan {
                estimator: EstimatorKind::RowPermutation,
                max_evaluations: rows,
                reason: passed_over.join("; "),
                predicted: input.predicted_rows(rows),
                minimum: input.predicted_rows(rows_needed),
            });
        }
        let row_predicted = input.predicted_rows(rows_needed);
        return Err(too_small(
            input,
            row_predicted.min(coalition_predicted),
            &format!("joint row sampling needs {rows_needed} model rows for {p} players"),
        ));
    }
    Err(too_small(
        input,
        coalition_predicted,
        &format!(
            "{} needs {needed} coalitions × {} model rows",
            estimator.name(),
            input.rows_per_coalition
        ),
    ))
}

/// Coalitions exact enumeration of `summary` over `players` evaluates.
pub fn enumerated(summary: Summary, players: usize) -> u64 {
    let p = players as u64;
    match summary {
        Summary::LeaveOneOut | Summary::IncludeOne => p + 2,
        Summary::Selection { .. } => p * (p + 1) / 2 + 2,
        _ if p < 64 => 1 << p,
        _ => u64::MAX,
    }
}

/// The refusal when even the smallest estimate AUTO could make does not
/// fit: at once, saying what budget would do.
fn too_small(input: &PlanInput, predicted: Duration, smallest: &str) -> EngineError {
    EngineError::of_kind(
        ErrorKind::ResourceExhausted,
        "budget_ms",
        format!(
            "the smallest estimate for this request ({smallest}) is predicted to take {:.3} ms at \
             this model's measured costs, over the {:.3} ms budget: a budget_ms (and call \
             deadline) of at least {:.0} ms would do",
            milliseconds(predicted),
            milliseconds(input.budget),
            milliseconds(predicted).ceil().max(1.0)
        ),
    )
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
            row_sampling: true,
            tree_row_cost_ns: None,
            background_rows: 100,
            table_cost_ns: None,
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

    /// The measured case: 30 players, 1,000 background rows at
    /// 10 µs a row, so one coalition costs 10 ms and the 62 a leverage run
    /// needs cost 620 ms.
    fn expensive_coalitions(budget_ms: u64) -> PlanInput {
        PlanInput {
            rows_per_coalition: 1000,
            row_cost_ns: 10_000.0,
            budget: Duration::from_millis(budget_ms),
            output_target: false,
            ..input(30)
        }
    }

    #[test]
    fn auto_never_plans_past_the_budget_and_never_blames_a_field_it_was_not_given() {
        for players in [1, 4, 12, 30, 100] {
            for rows in [1, 100, 1000, 100_000] {
                for row_cost_ns in [0.0, 20.0, 1e3, 1e5, 1e6] {
                    for budget_us in [10, 1_000, 20_000, 1_000_000] {
                        for (shape, exact_cost_ns) in [
                            (ModelShape::Opaque, None),
                            (ModelShape::Trees, Some(5e6)),
                            (ModelShape::Linear, Some(row_cost_ns)),
                        ] {
                            for (summary, table_cost_ns) in
                                [Summary::Shapley, Summary::Banzhaf, Summary::LeaveOneOut]
                                    .into_iter()
                                    .flat_map(|s| [(s, None), (s, Some(1e6)), (s, Some(1e9))])
                            {
                                let case = PlanInput {
                                    players,
                                    rows_per_coalition: rows,
                                    shape,
                                    summary,
                                    budget: Duration::from_micros(budget_us),
                                    row_cost_ns,
                                    exact_cost_ns,
                                    tree_row_cost_ns: (shape == ModelShape::Trees)
                                        .then_some(row_cost_ns * 20.0),
                                    background_rows: rows,
                                    table_cost_ns,
                                    ..input(players)
                                };
                                match plan(&case) {
                                    Ok(chosen) => assert!(
                                        chosen.predicted <= case.budget,
                                        "{case:?} → {chosen:?}"
                                    ),
                                    Err(error) => assert_eq!(
                                        (error.kind, error.field.as_str()),
                                        (ErrorKind::ResourceExhausted, "budget_ms"),
                                        "{case:?} → {error:?}"
                                    ),
                                }
                            }
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn auto_samples_rows_jointly_when_one_coalition_over_all_rows_does_not_fit() {
        let chosen = plan(&expensive_coalitions(100)).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::RowPermutation);
        // 100 ms at 10 µs a row pays for 10,000 rows.
        assert_eq!(chosen.max_evaluations, 10_000);
        assert!(chosen.reason.contains("jointly"), "{}", chosen.reason);
        // The budget pays for the 62 coalitions of the smallest leverage
        // run (620 ms), but they would take more than half of it.
        let chosen = plan(&expensive_coalitions(700)).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::RowPermutation);
        assert!(
            chosen
                .reason
                .contains("would take 620.000 ms, more than half of the 700.000 ms budget"),
            "{}",
            chosen.reason
        );
        // Within half the budget the coalition sampler comes back.
        let chosen = plan(&expensive_coalitions(1300)).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::LeverageRegression);
        // A loss is applied to the averaged prediction: no row sampling.
        let loss = PlanInput {
            row_sampling: false,
            ..expensive_coalitions(100)
        };
        assert_eq!(plan(&loss).unwrap_err().kind, ErrorKind::ResourceExhausted);
    }

    #[test]
    fn hopeless_budgets_are_refused_at_once_saying_what_budget_would_do() {
        // Two pairs and the instance: 1 + 2 × 59 = 119 rows × 10 µs = 1.19 ms.
        let error = plan(&expensive_coalitions(1)).unwrap_err();
        assert_eq!(error.kind, ErrorKind::ResourceExhausted);
        assert_eq!(error.field, "budget_ms");
        assert!(error.message.contains("1.190 ms"), "{}", error.message);
        assert!(error.message.contains("at least 2 ms"), "{}", error.message);
        assert!(plan(&expensive_coalitions(2)).is_ok());
    }

    #[test]
    fn a_tree_walk_cheaper_than_the_rows_makes_the_enumeration_exact() {
        // 2^8 coalitions × 100 rows × 10 µs = 256 ms, over the 100 ms budget.
        let mut trees = input(8);
        trees.shape = ModelShape::Trees;
        trees.output_target = false;
        trees.row_cost_ns = 10_000.0;
        assert_ne!(plan(&trees).unwrap().estimator, EstimatorKind::Exact);
        // The walk's 5 ms fits.
        trees.table_cost_ns = Some(5e6);
        let chosen = plan(&trees).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::Exact);
        assert_eq!(chosen.predicted, Duration::from_millis(5));
        assert!(
            chosen.reason.contains("walking the trees"),
            "{}",
            chosen.reason
        );
        // 80 ms is over three quarters of the budget: an enumeration cannot
        // stop early, so a sampler takes it.
        trees.table_cost_ns = Some(80e6);
        assert_ne!(plan(&trees).unwrap().estimator, EstimatorKind::Exact);
    }

    #[test]
    fn model_specific_algorithms_are_taken_only_when_their_predicted_time_fits() {
        let mut trees = input(30);
        trees.shape = ModelShape::Trees;
        trees.rows_per_coalition = 1000;
        trees.row_cost_ns = 10_000.0;
        trees.exact_cost_ns = Some(50e6);
        assert_eq!(plan(&trees).unwrap().estimator, EstimatorKind::TreeExact);
        // Within the budget but past the 75% an answer that cannot stop
        // early may be predicted to take.
        trees.exact_cost_ns = Some(80e6);
        let chosen = plan(&trees).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::RowPermutation);
        assert!(
            chosen.reason.contains(
                "TREE_EXACT would take 80.000 ms, more than 75% of the 100.000 ms budget"
            ),
            "{}",
            chosen.reason
        );
    }

    #[test]
    fn trees_too_large_for_the_whole_pass_take_it_over_a_subset_of_rows() {
        let mut trees = input(30);
        trees.shape = ModelShape::Trees;
        trees.rows_per_coalition = 1000;
        trees.background_rows = 1000;
        trees.row_cost_ns = 10_000.0;
        trees.exact_cost_ns = Some(200e6);
        trees.tree_row_cost_ns = Some(90_000.0);
        let chosen = plan(&trees).unwrap();
        assert_eq!(chosen.estimator, EstimatorKind::TreeRowSample);
        // 100 ms at 90 + 10 µs a row: 1,000 rows would take 100 ms; the
        // budget pays for 999 (floating point floors 999.99…), never more
        // than the background holds.
        assert!((999..=1000).contains(&chosen.max_evaluations), "{chosen:?}");
        assert!(chosen.predicted <= trees.budget);
        assert!(chosen.reason.contains("per-row pass"), "{}", chosen.reason);
        // FIXED has one reference row: nothing to subsample.
        trees.removal = RemovalKind::Fixed;
        assert_ne!(
            plan(&trees).unwrap().estimator,
            EstimatorKind::TreeRowSample
        );
        trees.removal = RemovalKind::Marginal;
        trees.requested = Some(EstimatorKind::TreeRowSample);
        trees.budget = Duration::from_micros(150);
        let error = plan(&trees).unwrap_err();
        assert_eq!(error.kind, ErrorKind::FailedPrecondition);
        // Two rows × 100 µs.
        assert!(error.message.contains("0.200 ms"), "{}", error.message);
    }

    #[test]
    fn explicit_estimators_that_do_not_fit_are_refused_with_their_predicted_time() {
        let mut trees = expensive_coalitions(100);
        trees.shape = ModelShape::Trees;
        trees.output_target = true;
        trees.exact_cost_ns = Some(250e6);
        for (estimator, predicted) in [
            (EstimatorKind::TreeExact, "250.000 ms"),
            // 2 + 2 × 2 × 29 = 118 coalitions × 10 ms.
            (EstimatorKind::Permutation, "1180.000 ms"),
            (EstimatorKind::LeverageRegression, "620.000 ms"),
        ] {
            trees.requested = Some(estimator);
            let error = plan(&trees).unwrap_err();
            assert_eq!(error.kind, ErrorKind::FailedPrecondition, "{estimator:?}");
            assert!(error.message.contains(predicted), "{}", error.message);
            assert!(
                error.message.contains("100.000 ms budget"),
                "{}",
                error.message
            );
        }
        let mut exact = input(16);
        exact.requested = Some(EstimatorKind::Exact);
        // 2^16 × 100 rows × 50 ns = 327.68 ms.
        let error = plan(&exact).unwrap_err();
        assert_eq!(error.kind, ErrorKind::FailedPrecondition);
        assert!(error.message.contains("327.680 ms"), "{}", error.message);
        trees.requested = Some(EstimatorKind::RowPermutation);
        assert_eq!(
            plan(&trees).unwrap().estimator,
            EstimatorKind::RowPermutation
        );
        trees.budget = Duration::from_millis(1);
        assert_eq!(
            plan(&trees).unwrap_err().kind,
            ErrorKind::FailedPrecondition
        );
    }
}
