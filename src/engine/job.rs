//! The engine's front door, in two stages. [`prepare`] validates a
//! [`Request`] against a [`PreparedModel`] once and plans it, giving a
//! [`Job`]: ready-to-run work that knows its predicted cost. [`Job::run`]
//! computes it before a deadline. Nothing is computed before validation is
//! complete, and nothing is validated again while computing.

use std::sync::Arc;
use std::time::{Duration, Instant};

use ndarray::ArrayView2;

use super::cancel::CancelFlag;
use super::coalition::Coalition;
use super::error::{EngineError, ErrorKind, Result};
use super::estimate::boundary::{Boundary, Goal};
use super::estimate::tree_table::TreeTable;
use super::estimate::{self, Estimate, EstimatorKind, Stopping};
use super::game::{CachedGame, Game, ModelGame};
use super::model::{Link, Structure};
use super::plan::{self, ModelShape, PlanInput};
use super::prepared::PreparedModel;
use super::removal::{
    ConditionalGaussian, ConditionalNeighbors, Fixed, Independent, Marginal, Removal, RemovalKind,
};
use super::summary::{Kernel, Summary};
use super::target::Target;

/// Draws per coalition for the random removals when the caller gives none.
pub const DEFAULT_DRAWS: usize = 32;
/// Most draws per coalition: each draw is a model row per coalition, and
/// more than this buys no accuracy a budget could pay for.
pub const MAX_DRAWS: usize = 4096;
/// Most model rows one coalition value may cost by default (removal rows ×
/// DATASET_LOSS rows): they are filled and predicted as one block, so this
/// bounds a request's memory whatever its draws and data set.
pub const DEFAULT_MAX_COALITION_ROWS: usize = 1 << 20;
/// Kernel width for neighbour removal when the caller gives none.
pub const DEFAULT_WIDTH: f64 = 1.0;
/// Jobs predicted to take at most this long are cheaper to compute where
/// the call arrives than to hand to a compute thread (measured: a handoff
/// costs tens of microseconds; see the README's service benchmark).
pub const INLINE_LIMIT: Duration = Duration::from_micros(20);

/// How missing features are filled, with each choice's own parameters.
#[derive(Debug, Clone, PartialEq)]
pub enum RemovalChoice {
    /// Fixed reference values; `None` uses the background mean.
    Fixed(Option<Vec<f64>>),
    Marginal,
    Independent {
        draws: usize,
    },
    ConditionalGaussian {
        draws: usize,
    },
    ConditionalNeighbors {
        width: f64,
    },
}

impl RemovalChoice {
    pub fn kind(&self) -> RemovalKind {
        match self {
            RemovalChoice::Fixed(_) => RemovalKind::Fixed,
            RemovalChoice::Marginal => RemovalKind::Marginal,
            RemovalChoice::Independent { .. } => RemovalKind::Independent,
            RemovalChoice::ConditionalGaussian { .. } => RemovalKind::ConditionalGaussian,
            RemovalChoice::ConditionalNeighbors { .. } => RemovalKind::ConditionalNeighbors,
        }
    }
}

/// One attribution request, as the caller gave it.
#[derive(Debug, Clone)]
pub struct Request {
    pub instance: Vec<f64>,
    pub removal: RemovalChoice,
    pub target: Target,
    pub summary: Summary,
    /// `None` lets the planner choose.
    pub estimator: Option<EstimatorKind>,
    pub budget: Duration,
    pub max_evaluations: u64,
    /// Largest acceptable std error: where samplers stop, and whether an
    /// exact answer over a random removal has converged; 0 lets the engine
    /// choose ([`estimate::default_tolerance`]).
    pub tolerance: f64,
    pub seed: u64,
    pub enumeration_cap: usize,
    /// Most model rows one coalition value may cost.
    pub max_coalition_rows: usize,
    /// The reasons the answer will list, when sampling should aim at them:
    /// a sampled Shapley estimate over a deterministic removal then gets
    /// half the budget and half the evaluations, and the players on the
    /// list's boundary the rest ([`estimate::boundary`]).
    pub reasons_goal: Option<Arc<Goal>>,
}

impl Request {
    /// A request with the engine's defaults: marginal removal, raw output,
    /// Shapley values, automatic estimator, 1 s budget.
    pub fn new(instance: Vec<f64>) -> Request {
        Request {
            instance,
            removal: RemovalChoice::Marginal,
            target: Target::Output,
            summary: Summary::Shapley,
            estimator: None,
            budget: Duration::from_secs(1),
            max_evaluations: 1 << 20,
            tolerance: 0.0,
            seed: 0,
            enumeration_cap: plan::DEFAULT_ENUMERATION_CAP,
            max_coalition_rows: DEFAULT_MAX_COALITION_ROWS,
            reasons_goal: None,
        }
    }
}

/// The removal of a validated request: parameters checked, FIXED's
/// reference resolved.
#[derive(Debug, Clone, PartialEq)]
enum ValidRemoval {
    Fixed(Vec<f64>),
    Marginal,
    Independent { draws: usize },
    ConditionalGaussian { draws: usize },
    ConditionalNeighbors { width: f64 },
}

impl ValidRemoval {
    fn rows_per_coalition(&self, background_rows: usize) -> usize {
        match self {
            ValidRemoval::Fixed(_) => 1,
            ValidRemoval::Marginal | ValidRemoval::ConditionalNeighbors { .. } => background_rows,
            ValidRemoval::Independent { draws } | ValidRemoval::ConditionalGaussian { draws } => {
                *draws
            }
        }
    }
}

/// The sampled estimators, each with what it needs beyond the game.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Sampler {
    Permutation,
    PairedRegression(Kernel),
    LeverageRegression,
    MaximumSampleReuse,
}

/// Ready-to-run work.
#[derive(Debug, Clone, PartialEq)]
enum Work {
    /// The exact tree algorithm over the background (marginal) or one
    /// reference row (fixed). `anytime` (AUTO under marginal removal): if
    /// the deadline comes first, the answer is estimated from the trees
    /// done, with std errors, instead of failing.
    TreeExact { anytime: bool },
    /// The linear closed form against the reference mean or fixed values.
    LinearExact,
    /// Every coalition the summary needs; the tolerance (0: the default)
    /// decides whether removal noise leaves the answer unconverged. With
    /// `tree_walk`, the values come from one walk of the trees per
    /// reference row (see [`estimate::tree_table`]), not from model rows.
    Enumerate { tolerance: f64, tree_walk: bool },
    /// An anytime sampler stopping at the tolerance (0: the default, see
    /// [`estimate::default_tolerance`]), the evaluation cap or the deadline.
    /// `budget_capped`: the budget, not the caller's cap, set
    /// `max_evaluations`.
    Sample {
        sampler: Sampler,
        max_evaluations: u64,
        budget_capped: bool,
        tolerance: f64,
    },
    /// Joint (permutation, background row) sampling of the marginal game,
    /// when one coalition over all background rows does not fit; stops at
    /// the tolerance (0: the default from its estimated ends), `max_rows`
    /// model rows or the deadline.
    RowSample {
        max_rows: u64,
        round_rows: u64,
        tolerance: f64,
    },
    /// The tree algorithm's per-row pass over at most `max_rows` background
    /// rows in random order, when the whole pass does not fit.
    TreeRowSample { max_rows: u64, tolerance: f64 },
}

/// Rounds of a joint row sampler per budget: the deadline is checked
/// between rounds, so a round is sized to a fraction of the budget at the
/// measured row cost (common practice, no source: a stop then lags the
/// deadline by at most about an eighth of the budget).
const ROUNDS_PER_BUDGET: f64 = 8.0;

/// Most model rows one batched call of the joint row sampler fills.
const MAX_ROUND_ROWS: u64 = 4096;

/// Model rows per round of the joint row sampler for `budget` at
/// `row_cost_ns` per row.
fn round_rows(budget: Duration, row_cost_ns: f64) -> u64 {
    let rows = budget.as_nanos() as f64 / ROUNDS_PER_BUDGET / row_cost_ns.max(1.0);
    (rows.floor() as u64).clamp(1, MAX_ROUND_ROWS)
}

/// A validated, planned request. Owns what it needs (the prepared model is
/// shared), so it can be handed to a compute thread.
pub struct Job {
    model: Arc<PreparedModel>,
    instance: Vec<f64>,
    removal: ValidRemoval,
    target: Target,
    summary: Summary,
    seed: u64,
    work: Work,
    estimator: EstimatorKind,
    plan_reason: String,
    predicted: Duration,
    minimum: Duration,
    reasons_goal: Option<Arc<Goal>>,
    /// When [`prepare`] was called: the explanation's elapsed time counts
    /// from here.
    prepared_at: Instant,
}

impl std::fmt::Debug for Job {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        formatter
            .debug_struct("Job")
            .field("estimator", &self.estimator)
            .field("predicted", &self.predicted)
            .field("minimum", &self.minimum)
            .field("plan_reason", &self.plan_reason)
            .finish_non_exhaustive()
    }
}

/// The answer with its accounting.
#[derive(Debug, Clone)]
pub struct Explanation {
    pub estimate: Estimate,
    pub estimator: EstimatorKind,
    pub plan_reason: String,
    pub coalitions_evaluated: u64,
    pub model_rows_evaluated: u64,
    pub cache_hits: u64,
    /// From [`prepare`] to the end of [`Job::run`].
    pub elapsed: Duration,
    /// What the boundary phase did, when the request aimed at its reasons
    /// and the answer was sampled.
    pub boundary: Option<Boundary>,
}

/// Validates `request` against `model` and plans it. Every refusal names
/// its field; nothing is computed.
pub fn prepare(model: &Arc<PreparedModel>, request: Request) -> Result<Job> {
    let prepared_at = Instant::now();
    let template = prepare_template(model, &request)?;
    template.job_from(request.instance, None, request.seed, prepared_at)
}

/// Everything a request fixes except its instance: validated and planned
/// once, then turned into one [`Job`] per instance by
/// [`JobTemplate::job`]. A batch of instances shares it, and a single
/// request goes through it too ([`prepare`]), so a batch's answers are
/// the single answers, bit for bit, for the same seeds.
#[derive(Clone)]
pub struct JobTemplate {
    model: Arc<PreparedModel>,
    removal: ValidRemoval,
    /// Whether the removal conditions on the present features, which then
    /// may not be missing.
    conditional: bool,
    target: Target,
    summary: Summary,
    work: Work,
    estimator: EstimatorKind,
    plan_reason: String,
    predicted: Duration,
    minimum: Duration,
    reasons_goal: Option<Arc<Goal>>,
}

impl std::fmt::Debug for JobTemplate {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        formatter
            .debug_struct("JobTemplate")
            .field("estimator", &self.estimator)
            .field("predicted", &self.predicted)
            .field("minimum", &self.minimum)
            .finish_non_exhaustive()
    }
}

/// Validates every part of `request` but its instance (which is not read)
/// and plans it. Every refusal names its field; nothing is computed.
pub fn prepare_template(model: &Arc<PreparedModel>, request: &Request) -> Result<JobTemplate> {
    validate(model, request)?;
    let removal_kind = request.removal.kind();
    let conditional = matches!(
        request.removal,
        RemovalChoice::ConditionalGaussian { .. } | RemovalChoice::ConditionalNeighbors { .. }
    );
    let removal = validate_removal(model, request.removal.clone())?;
    let instances = match &request.target {
        Target::DatasetLoss { rows, .. } => rows.nrows(),
        _ => 1,
    };
    let background_rows = model.background().nrows();
    let removal_rows = removal.rows_per_coalition(background_rows);
    let rows_per_coalition = removal_rows.saturating_mul(instances);
    if rows_per_coalition > request.max_coalition_rows {
        let field = if instances > 1 {
            "dataset"
        } else if matches!(
            removal,
            ValidRemoval::Independent { .. } | ValidRemoval::ConditionalGaussian { .. }
        ) {
            "draws"
        } else {
            "removal"
        };
        return Err(EngineError::new(
            field,
            format!(
                "one coalition value would cost {removal_rows} removal rows × {instances} \
                 instances = {rows_per_coalition} model rows, over the maximum of {}; use fewer \
                 draws or data set rows (or a removal with fewer rows)",
                request.max_coalition_rows
            ),
        ));
    }
    let shape = match model.structure() {
        Structure::Linear(_) => ModelShape::Linear,
        Structure::Trees(_) => ModelShape::Trees,
        Structure::Opaque => ModelShape::Opaque,
    };
    // Every coalition value at once by walking the trees, where the game
    // is one instance's under a removal to background or fixed rows and
    // the walk is cheaper than the rows enumeration would fill.
    let fixed = matches!(removal, ValidRemoval::Fixed(_));
    let row_cost_ns = model.coalition_row_cost_ns();
    let table_cost_ns = model
        .tree_table_cost_ns(fixed)
        .filter(|_| {
            (fixed || removal == ValidRemoval::Marginal)
                && matches!(
                    request.target,
                    Target::Output | Target::Probability | Target::Loss { .. }
                )
        })
        .filter(|table| {
            let rows = plan::enumerated(request.summary, model.players().len()) as f64
                * rows_per_coalition as f64;
            *table < rows * row_cost_ns
        });
    let chosen = plan::plan(&PlanInput {
        players: model.players().len(),
        rows_per_coalition,
        shape,
        removal: removal_kind,
        output_target: request.target == Target::Output,
        summary: request.summary,
        requested: request.estimator,
        budget: request.budget,
        max_evaluations: request.max_evaluations,
        row_cost_ns,
        exact_cost_ns: model.exact_cost_ns(fixed),
        enumeration_cap: request.enumeration_cap,
        row_sampling: removal == ValidRemoval::Marginal
            && instances == 1
            && matches!(request.target, Target::Output | Target::Probability),
        tree_row_cost_ns: match shape {
            ModelShape::Trees => model.exact_cost_ns(true),
            _ => None,
        },
        background_rows,
        table_cost_ns,
    })?;
    let work = match chosen.estimator {
        EstimatorKind::TreeExact => Work::TreeExact {
            anytime: request.estimator.is_none(),
        },
        EstimatorKind::LinearExact => Work::LinearExact,
        EstimatorKind::Exact => Work::Enumerate {
            tolerance: request.tolerance,
            tree_walk: table_cost_ns.is_some(),
        },
        EstimatorKind::TreeRowSample => Work::TreeRowSample {
            max_rows: chosen.max_evaluations,
            tolerance: request.tolerance,
        },
        EstimatorKind::RowPermutation => Work::RowSample {
            max_rows: chosen.max_evaluations,
            round_rows: round_rows(request.budget, row_cost_ns),
            tolerance: request.tolerance,
        },
        sampled => Work::Sample {
            sampler: match (sampled, request.summary) {
                (EstimatorKind::Permutation, _) => Sampler::Permutation,
                (EstimatorKind::PairedRegression, Summary::LinearFit(kernel)) => {
                    Sampler::PairedRegression(kernel)
                }
                (EstimatorKind::PairedRegression, _) => Sampler::PairedRegression(Kernel::Shapley),
                (EstimatorKind::LeverageRegression, _) => Sampler::LeverageRegression,
                (EstimatorKind::MaximumSampleReuse, _) => Sampler::MaximumSampleReuse,
                (other, _) => {
                    return Err(EngineError::of_kind(
                        ErrorKind::Internal,
                        "estimator",
                        format!("the planner chose {}, which is not a sampler", other.name()),
                    ));
                }
            },
            max_evaluations: chosen.max_evaluations,
            budget_capped: chosen.max_evaluations < request.max_evaluations,
            tolerance: request.tolerance,
        },
    };
    Ok(JobTemplate {
        model: model.clone(),
        removal,
        conditional,
        target: request.target.clone(),
        summary: request.summary,
        work,
        estimator: chosen.estimator,
        plan_reason: chosen.reason,
        predicted: chosen.predicted,
        minimum: chosen.minimum,
        reasons_goal: request.reasons_goal.clone(),
    })
}

impl JobTemplate {
    /// The job for one instance: only the instance (and, for LOSS, a label
    /// in place of the template's) is validated here. `label` must be
    /// `None` for any other target.
    pub fn job(&self, instance: Vec<f64>, label: Option<f64>, seed: u64) -> Result<Job> {
        self.job_from(instance, label, seed, Instant::now())
    }

    pub fn estimator(&self) -> EstimatorKind {
        self.estimator
    }

    /// Predicted computing time of one instance.
    pub fn predicted(&self) -> Duration {
        self.predicted
    }

    /// Predicted time of the smallest answer for one instance.
    pub fn minimum(&self) -> Duration {
        self.minimum
    }

    fn job_from(
        &self,
        instance: Vec<f64>,
        label: Option<f64>,
        seed: u64,
        prepared_at: Instant,
    ) -> Result<Job> {
        validate_instance(&self.model, &instance, self.conditional)?;
        let target = match (&self.target, label) {
            (_, None) => self.target.clone(),
            (Target::Loss { .. }, Some(label)) => {
                check_label("label", label, self.model.model().link())?;
                Target::Loss { label }
            }
            (_, Some(_)) => {
                return Err(EngineError::new(
                    "label",
                    "is read by TARGET_LOSS only; leave it unset or choose TARGET_LOSS",
                ));
            }
        };
        Ok(Job {
            model: self.model.clone(),
            instance,
            removal: self.removal.clone(),
            target,
            summary: self.summary,
            seed,
            work: self.work.clone(),
            estimator: self.estimator,
            plan_reason: self.plan_reason.clone(),
            predicted: self.predicted,
            minimum: self.minimum,
            reasons_goal: self.reasons_goal.clone(),
            prepared_at,
        })
    }
}

impl Job {
    pub fn estimator(&self) -> EstimatorKind {
        self.estimator
    }

    /// Predicted computing time, from the prepared model's measured costs.
    pub fn predicted(&self) -> Duration {
        self.predicted
    }

    /// Predicted time of the smallest answer the job can give: all of it
    /// for an exact estimator, the first round for an anytime sampler.
    pub fn minimum(&self) -> Duration {
        self.minimum
    }

    /// Whether the job is cheaper to compute where the call arrives than
    /// to hand to a compute thread.
    pub fn runs_inline(&self) -> bool {
        self.predicted <= INLINE_LIMIT
    }

    /// Computes the explanation. Sampled estimators stop at `deadline` with
    /// what they have; exact ones fail with a deadline-exceeded error.
    pub fn run(self, deadline: Instant) -> Result<Explanation> {
        self.run_cancellable(deadline, CancelFlag::new())
    }

    /// [`Job::run`], stopping with a cancelled error soon after `cancel` is
    /// set (between batches of work, wherever the deadline is checked).
    pub fn run_cancellable(self, deadline: Instant, cancel: CancelFlag) -> Result<Explanation> {
        let stopping = Stopping {
            tolerance: self.tolerance(),
            max_evaluations: u64::MAX,
            deadline: Some(deadline),
            cancel,
        };
        stopping.check_cancelled()?;
        let started = Instant::now();
        let model = self.model.as_ref();
        let players = model.players();
        let mut boundary = None;
        let (estimate, counts) = match &self.work {
            Work::TreeExact { anytime } => {
                let Structure::Trees(ensemble) = model.structure() else {
                    return Err(self.not_planned("a tree ensemble"));
                };
                let estimate = match &self.removal {
                    ValidRemoval::Fixed(values) => {
                        let row = ArrayView2::from_shape((1, values.len()), values)
                            .map_err(|_| self.not_planned("one reference row"))?;
                        estimate::tree::explain_within(
                            ensemble,
                            players,
                            &self.instance,
                            row,
                            self.summary,
                            &stopping,
                        )?
                    }
                    _ => {
                        let Some(compiled) = model.compiled_trees() else {
                            return Err(self.not_planned("the ensemble compiled at preparation"));
                        };
                        if *anytime {
                            compiled
                                .explain_anytime(
                                    ensemble,
                                    players,
                                    model.background(),
                                    &self.instance,
                                    self.summary,
                                    &stopping,
                                    self.seed,
                                )?
                                .0
                        } else {
                            compiled.explain_within(
                                ensemble,
                                players,
                                model.background(),
                                &self.instance,
                                self.summary,
                                &stopping,
                            )?
                        }
                    }
                };
                (estimate, Counts::default())
            }
            Work::LinearExact => {
                let Structure::Linear(form) = model.structure() else {
                    return Err(self.not_planned("a linear model"));
                };
                let reference = match &self.removal {
                    ValidRemoval::Fixed(values) => values.as_slice(),
                    _ => model.background_mean()?,
                };
                let estimate = estimate::linear::explain(form, players, &self.instance, reference)?;
                (estimate, Counts::default())
            }
            Work::TreeRowSample { max_rows, .. } => {
                let Structure::Trees(ensemble) = model.structure() else {
                    return Err(self.not_planned("a tree ensemble"));
                };
                let stopping = Stopping {
                    max_evaluations: *max_rows,
                    ..stopping
                };
                let (estimate, rows) = estimate::tree::explain_row_sample(
                    ensemble,
                    players,
                    &self.instance,
                    model.background(),
                    self.summary,
                    &stopping,
                    self.seed,
                )?;
                // No coalition value is computed; the rows predicted are
                // the instance and each background row walked.
                let counts = Counts {
                    coalitions: 0,
                    model_rows: rows + 1,
                    cache_hits: 0,
                };
                (estimate, counts)
            }
            Work::RowSample {
                max_rows,
                round_rows,
                ..
            } => {
                let scale = if self.target == Target::Probability {
                    Link::Logistic
                } else {
                    Link::Identity
                };
                let input = estimate::row_permutation::RowSampling {
                    model: model.model(),
                    players,
                    background: model.background(),
                    instance: &self.instance,
                    scale,
                    round_rows: *round_rows,
                };
                let stopping = Stopping {
                    max_evaluations: *max_rows,
                    ..stopping
                };
                let sampled = estimate::row_permutation::shapley(&input, &stopping, self.seed)?;
                // Each model row is the value of one coalition of a one-row
                // game, so both counters count rows.
                let counts = Counts {
                    coalitions: sampled.model_rows,
                    model_rows: sampled.model_rows,
                    cache_hits: 0,
                };
                (sampled.estimate, counts)
            }
            Work::Enumerate { .. } | Work::Sample { .. } => {
                let (estimate, counts, aimed) = self.run_on_game(stopping)?;
                boundary = aimed;
                (estimate, counts)
            }
        };
        if matches!(
            self.work,
            Work::Enumerate {
                tree_walk: false,
                ..
            } | Work::Sample { .. }
                | Work::RowSample { .. }
        ) {
            model.observe_coalition_run(started.elapsed(), counts.model_rows);
        }
        let finite = estimate.value_full.is_finite()
            && estimate.value_empty.is_finite()
            && estimate.values.iter().all(|v| v.is_finite());
        if !finite {
            return Err(EngineError::failed_precondition(
                "model",
                "gave a non-finite output for this instance or a coalition of it; nothing can be attributed",
            ));
        }
        Ok(Explanation {
            estimate,
            estimator: self.estimator,
            plan_reason: self.plan_reason,
            coalitions_evaluated: counts.coalitions,
            model_rows_evaluated: counts.model_rows,
            cache_hits: counts.cache_hits,
            elapsed: self.prepared_at.elapsed(),
            boundary,
        })
    }

    /// A sampler that ran out of evaluations the budget set (not the caller)
    /// is short of budget, not of `max_evaluations`: the caller did not set
    /// that field, and a larger cap alone would not be planned.
    fn budget_short(error: EngineError, budget_capped: bool, evaluations: u64) -> EngineError {
        if !budget_capped || error.field != "max_evaluations" {
            return error;
        }
        EngineError::of_kind(
            ErrorKind::ResourceExhausted,
            "budget_ms",
            format!(
                "the {evaluations} coalition evaluations the budget pays for did not give an answer \
             ({}); a larger budget_ms (and call deadline) would",
                error.message
            ),
        )
    }

    /// Enumeration and sampling: removal ∘ model ∘ target behind the
    /// per-request cache.
    fn run_on_game(&self, mut stopping: Stopping) -> Result<(Estimate, Counts, Option<Boundary>)> {
        let model = self.model.as_ref();
        let background = model.background();
        if let (
            Work::Enumerate {
                tree_walk: true, ..
            },
            Structure::Trees(ensemble),
        ) = (&self.work, model.structure())
        {
            let references = match &self.removal {
                ValidRemoval::Fixed(values) => ArrayView2::from_shape((1, values.len()), values)
                    .map_err(|_| self.not_planned("one reference row"))?,
                _ => background,
            };
            let table = TreeTable::build(
                ensemble,
                model.model().link(),
                model.players(),
                &self.instance,
                references,
                &self.target,
                &stopping,
            )?;
            let cached = CachedGame::new(&table);
            let estimate = estimate::exact::explain_within(&cached, self.summary, &stopping)?;
            let counts = Counts {
                coalitions: cached.evaluations(),
                model_rows: table.model_rows(),
                cache_hits: cached.cache_hits(),
            };
            return Ok((estimate, counts, None));
        }
        let removal: Box<dyn Removal + '_> =
            match &self.removal {
                ValidRemoval::Fixed(values) => {
                    Box::new(Fixed::try_new(values.clone(), background.ncols())?)
                }
                ValidRemoval::Marginal => Box::new(Marginal::try_new(background)?),
                ValidRemoval::Independent { draws } => {
                    Box::new(Independent::try_new(background, *draws, self.seed)?)
                }
                ValidRemoval::ConditionalGaussian { draws } => Box::new(
                    ConditionalGaussian::try_new(model.gaussian()?, *draws, self.seed)?,
                ),
                ValidRemoval::ConditionalNeighbors { width } => Box::new(
                    ConditionalNeighbors::try_new(background, model.neighbor_scales()?, *width)?,
                ),
            };
        let game = ModelGame::try_new(
            model.model(),
            removal.as_ref(),
            model.players(),
            &self.instance,
            &self.target,
        )?;
        let cached = CachedGame::new(&game);
        // A deterministic exact answer has no std error to compare, so its
        // ends are not looked up early (the counters stay as they were).
        let sampled = matches!(self.work, Work::Sample { .. });
        if stopping.tolerance == 0.0 && (sampled || cached.is_noisy()) {
            let ends = [Coalition::EMPTY, Coalition::full(model.players().len())];
            let mut values = [0.0; 2];
            cached.values(&ends, &mut values);
            stopping.tolerance = estimate::default_tolerance(values[0], values[1]);
        }
        let mut boundary = None;
        let estimate = match self.work {
            Work::Sample {
                sampler,
                max_evaluations,
                budget_capped,
                ..
            } => {
                stopping.max_evaluations = max_evaluations;
                let seed = self.seed;
                let aim = self.reasons_goal.as_deref().filter(|_| {
                    self.summary == Summary::Shapley
                        && !cached.is_noisy()
                        && max_evaluations / 2
                            >= plan::sampler_minimum(self.estimator, model.players().len())
                });
                // Aiming at the reasons, the sampler gets the first half of
                // the evaluations and of the time left; the boundary the
                // rest.
                let first = match aim {
                    Some(_) => Stopping {
                        max_evaluations: max_evaluations / 2,
                        deadline: stopping.deadline.map(|deadline| {
                            let now = Instant::now();
                            now + deadline.saturating_duration_since(now) / 2
                        }),
                        ..stopping.clone()
                    },
                    None => stopping.clone(),
                };
                let estimate = match sampler {
                    Sampler::Permutation => estimate::permutation::shapley(&cached, &first, seed),
                    Sampler::PairedRegression(kernel) => {
                        estimate::regression::paired(&cached, kernel, &first, seed)
                    }
                    Sampler::LeverageRegression => {
                        estimate::regression::leverage(&cached, &first, seed)
                    }
                    Sampler::MaximumSampleReuse => estimate::msr::banzhaf(&cached, &first, seed),
                }
                .map_err(|error| Self::budget_short(error, budget_capped, max_evaluations))?;
                match aim {
                    Some(goal) => {
                        let (refined, report) =
                            estimate::boundary::refine(&cached, estimate, goal, &stopping, seed)?;
                        boundary = Some(report);
                        refined
                    }
                    None => estimate,
                }
            }
            _ => estimate::exact::explain_within(&cached, self.summary, &stopping)?,
        };
        let counts = Counts {
            coalitions: cached.evaluations(),
            model_rows: cached.model_rows(),
            cache_hits: cached.cache_hits(),
        };
        Ok((estimate, counts, boundary))
    }

    /// The tolerance the request gave (0: the default, taken from the
    /// game's ends once they are known).
    fn tolerance(&self) -> f64 {
        match self.work {
            Work::Enumerate { tolerance, .. }
            | Work::Sample { tolerance, .. }
            | Work::RowSample { tolerance, .. }
            | Work::TreeRowSample { tolerance, .. } => tolerance,
            Work::TreeExact { .. } | Work::LinearExact => 0.0,
        }
    }

    /// The planner chose work this model cannot do: a bug, not the
    /// caller's doing.
    fn not_planned(&self, needs: &str) -> EngineError {
        EngineError::of_kind(
            ErrorKind::Internal,
            "estimator",
            format!(
                "{} was planned, but it needs {needs}; please report this",
                self.estimator.name()
            ),
        )
    }
}

/// What a run evaluated, for the accounting.
#[derive(Debug, Clone, Copy, Default)]
struct Counts {
    coalitions: u64,
    model_rows: u64,
    cache_hits: u64,
}

/// Checks of one instance: its length, and missing values only where the
/// model takes them and the removal does not condition on them.
fn validate_instance(model: &PreparedModel, instance: &[f64], conditional: bool) -> Result<()> {
    let inputs = model.model().inputs();
    let players = model.players();
    if instance.len() != inputs {
        return Err(EngineError::new(
            "instance",
            format!("has {} values; the model takes {inputs}", instance.len()),
        ));
    }
    let missing_ok = model.model().accepts_missing() && !conditional;
    for (j, x) in instance.iter().enumerate() {
        if x.is_infinite() || (x.is_nan() && !missing_ok) {
            let why = if x.is_infinite() {
                "is infinite".to_string()
            } else if conditional {
                "is NaN; conditional removal needs every feature present in the instance"
                    .to_string()
            } else {
                format!(
                    "is NaN; a {} model does not accept missing values",
                    model.model().kind()
                )
            };
            return Err(EngineError::new(
                "instance",
                format!(
                    "value {j} (player {:?}) {why}",
                    players.names()[players.player_of(j)]
                ),
            ));
        }
    }
    Ok(())
}

/// Checks of everything but the instance and the removal's own
/// parameters; every refusal names its field.
fn validate(model: &PreparedModel, request: &Request) -> Result<()> {
    let inputs = model.model().inputs();
    let link = model.model().link();
    match &request.target {
        Target::Probability if link != Link::Logistic => {
            return Err(EngineError::new(
                "target",
                "PROBABILITY needs a model with a logistic link; use OUTPUT for this model",
            ));
        }
        Target::Loss { label } => check_label("label", *label, link)?,
        Target::DatasetLoss { labels, .. } => {
            request.target.check_dataset(inputs)?;
            for label in labels {
                check_label("dataset.labels", *label, link)?;
            }
        }
        _ => {}
    }
    if !(request.tolerance >= 0.0 && request.tolerance.is_finite()) {
        return Err(EngineError::new("tolerance", "must be a finite number ≥ 0"));
    }
    if request.max_evaluations < 2 {
        return Err(EngineError::new(
            "max_evaluations",
            "must allow at least v(all) and v(none): 2 or more",
        ));
    }
    Ok(())
}

/// Checks the removal's own parameters and resolves FIXED's reference.
fn validate_removal(model: &PreparedModel, removal: RemovalChoice) -> Result<ValidRemoval> {
    let inputs = model.model().inputs();
    let draws = |draws: usize, paired: bool| -> Result<usize> {
        if draws == 0 || draws > MAX_DRAWS || (paired && !draws.is_multiple_of(2)) {
            let what = if paired {
                "an even number from 2" // antithetic pairs
            } else {
                "a number from 1"
            };
            return Err(EngineError::new(
                "draws",
                format!("must be {what} to {MAX_DRAWS}; got {draws}"),
            ));
        }
        Ok(draws)
    };
    Ok(match removal {
        RemovalChoice::Fixed(Some(values)) => {
            Fixed::try_new(values.clone(), inputs)?;
            ValidRemoval::Fixed(values)
        }
        RemovalChoice::Fixed(None) => ValidRemoval::Fixed(model.background_mean()?.to_vec()),
        RemovalChoice::Marginal => ValidRemoval::Marginal,
        RemovalChoice::Independent { draws: n } => ValidRemoval::Independent {
            draws: draws(n, false)?,
        },
        RemovalChoice::ConditionalGaussian { draws: n } => ValidRemoval::ConditionalGaussian {
            draws: draws(n, true)?,
        },
        RemovalChoice::ConditionalNeighbors { width } => {
            if !(width.is_finite() && width > 0.0) {
                return Err(EngineError::new(
                    "width",
                    format!("must be a finite number greater than 0; got {width}"),
                ));
            }
            ValidRemoval::ConditionalNeighbors { width }
        }
    })
}

fn check_label(field: &str, label: f64, link: Link) -> Result<()> {
    let valid = match link {
        Link::Logistic => (0.0..=1.0).contains(&label),
        Link::Identity => label.is_finite(),
    };
    if valid {
        Ok(())
    } else {
        Err(EngineError::new(
            field,
            format!(
                "{label} is not a valid label: a logistic model needs 0 or 1 (or a probability in between), a regression model a finite number"
            ),
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Our own rule (common practice, no source): a field the caller did not
    // set is never the one blamed.
    #[test]
    fn a_cap_the_budget_set_is_reported_as_short_budget() {
        let short = EngineError::new(
            "max_evaluations",
            "the coalitions sampled within the cap do not determine the fit",
        );
        let blamed = Job::budget_short(short.clone(), true, 42);
        assert_eq!(blamed.kind, ErrorKind::ResourceExhausted);
        assert_eq!(blamed.field, "budget_ms");
        assert!(
            blamed
                .message
                .contains("the 42 coalition evaluations the budget pays for")
                && blamed.message.contains("do not determine the fit"),
            "{}",
            blamed.message
        );
        // The caller's own cap is still the caller's to raise.
        assert_eq!(Job::budget_short(short.clone(), false, 42), short);
        let other = EngineError::new("seed", "not this one");
        assert_eq!(Job::budget_short(other.clone(), true, 42), other);
    }
}
