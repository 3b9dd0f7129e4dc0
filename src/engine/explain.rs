//! The engine's front door: validate a request against its model, build the
//! game (removal ∘ model ∘ target behind the per-request cache), plan, run
//! the estimator and report what it cost.

use std::time::{Duration, Instant};

use ndarray::ArrayView2;

use super::error::{EngineError, Result};
use super::estimate::{self, Estimate, EstimatorKind, Stopping};
use super::game::{CachedGame, Game, ModelGame};
use super::plan::{self, ModelShape, PlanInput};
use super::players::Players;
use super::removal::{
    ConditionalGaussian, ConditionalNeighbors, Fixed, GaussianFit, Independent, Marginal, Removal,
    RemovalKind, inverse_scales,
};
use super::summary::Summary;
use super::target::Target;
use crate::model::{Link, Model, Structure};

/// Draws per coalition for the random removals when the caller gives none.
pub const DEFAULT_DRAWS: usize = 32;
/// Kernel width for neighbour removal when the caller gives none.
pub const DEFAULT_WIDTH: f64 = 1.0;

/// A registered model with what the engine needs beside it.
pub struct Subject<'a> {
    pub model: &'a dyn Model,
    pub players: &'a Players,
    /// Background (reference) rows, one column per model input.
    pub background: ArrayView2<'a, f64>,
    /// Measured time of one model row, in nanoseconds.
    pub row_cost_ns: f64,
}

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

/// One attribution request.
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
    /// Largest acceptable std error for sampled estimators; 0 lets the
    /// engine use 1% of |v(all) − v(none)|.
    pub tolerance: f64,
    pub seed: u64,
    pub enumeration_cap: usize,
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
        }
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
    pub elapsed: Duration,
}

/// Most background values a closed-form explanation may average and still
/// count as cheap: about 10⁵ additions, tens of microseconds.
const CHEAP_BACKGROUND_VALUES: usize = 100_000;

/// Whether `request` will take the linear closed form over a small
/// background: microseconds of work, so a server may compute it where the
/// call arrives instead of handing it to a compute thread.
pub fn is_cheap(subject: &Subject, request: &Request) -> bool {
    let Structure::Linear(_) = subject.model.structure() else {
        return false;
    };
    let closed_form = plan::model_specific(
        ModelShape::Linear,
        request.removal.kind(),
        request.target == Target::Output,
        request.summary,
    )
    .is_some_and(|(estimator, _)| estimator == EstimatorKind::LinearExact);
    closed_form
        && matches!(request.estimator, None | Some(EstimatorKind::LinearExact))
        && subject.background.len() <= CHEAP_BACKGROUND_VALUES
}

/// Explains `request.instance` for `subject`. `started` is when the budget
/// began to run (the service passes the request's arrival).
pub fn explain(subject: &Subject, request: &Request, started: Instant) -> Result<Explanation> {
    validate(subject, request)?;
    let model = subject.model;
    let background = subject.background;
    // Derived from the background per request until the prepared model
    // holds them.
    let gaussian_fit;
    let neighbor_scales;
    let removal: Box<dyn Removal + '_> = match &request.removal {
        RemovalChoice::Fixed(Some(values)) => {
            Box::new(Fixed::try_new(values.clone(), model.inputs())?)
        }
        RemovalChoice::Fixed(None) => Box::new(Fixed::background_mean(background)?),
        RemovalChoice::Marginal => Box::new(Marginal::try_new(background)?),
        RemovalChoice::Independent { draws } => {
            Box::new(Independent::try_new(background, *draws, request.seed)?)
        }
        RemovalChoice::ConditionalGaussian { draws } => {
            gaussian_fit = GaussianFit::try_new(background)?;
            Box::new(ConditionalGaussian::try_new(
                &gaussian_fit,
                *draws,
                request.seed,
            )?)
        }
        RemovalChoice::ConditionalNeighbors { width } => {
            neighbor_scales = inverse_scales(background)?;
            Box::new(ConditionalNeighbors::try_new(
                background,
                &neighbor_scales,
                *width,
            )?)
        }
    };
    let instances = match &request.target {
        Target::DatasetLoss { rows, .. } => rows.nrows(),
        _ => 1,
    };
    let shape = match model.structure() {
        Structure::Linear(_) => ModelShape::Linear,
        Structure::Trees(_) => ModelShape::Trees,
        Structure::Opaque => ModelShape::Opaque,
    };
    let chosen = plan::plan(&PlanInput {
        players: subject.players.len(),
        rows_per_coalition: removal.rows_per_coalition() * instances,
        shape,
        removal: request.removal.kind(),
        output_target: request.target == Target::Output,
        summary: request.summary,
        requested: request.estimator,
        budget: request.budget,
        max_evaluations: request.max_evaluations,
        row_cost_ns: subject.row_cost_ns,
        enumeration_cap: request.enumeration_cap,
    })?;

    let reference = |removal: &RemovalChoice| -> Result<ndarray::Array2<f64>> {
        Ok(match removal {
            RemovalChoice::Fixed(Some(values)) => {
                ndarray::Array2::from_shape_vec((1, values.len()), values.clone())
                    .map_err(|_| EngineError::new("fixed_values", "could not be read as one row"))?
            }
            RemovalChoice::Fixed(None) => {
                let mean = Fixed::background_mean(background)?.values().to_vec();
                ndarray::Array2::from_shape_vec((1, mean.len()), mean)
                    .map_err(|_| EngineError::new("background", "could not be averaged"))?
            }
            _ => background.to_owned(),
        })
    };

    let game = ModelGame::try_new(
        model,
        removal.as_ref(),
        subject.players,
        &request.instance,
        &request.target,
    )?;
    let cached = CachedGame::new(&game);
    let deadline = started + request.budget;
    let estimate = match chosen.estimator {
        EstimatorKind::TreeExact => {
            let Structure::Trees(ensemble) = model.structure() else {
                unreachable!("the planner checked the model is a tree ensemble")
            };
            let references = reference(&request.removal)?;
            estimate::tree::explain(
                ensemble,
                subject.players,
                &request.instance,
                references.view(),
                request.summary,
            )?
        }
        EstimatorKind::LinearExact => {
            let Structure::Linear(linear) = model.structure() else {
                unreachable!("the planner checked the model is linear")
            };
            // The closed form needs only the reference mean: no copy of the
            // background.
            let mean: Vec<f64> = match &request.removal {
                RemovalChoice::Fixed(Some(values)) => values.clone(),
                _ => background
                    .mean_axis(ndarray::Axis(0))
                    .map(|m| m.to_vec())
                    .ok_or_else(|| EngineError::new("background", "needs at least one row"))?,
            };
            estimate::linear::explain(linear, subject.players, &request.instance, &mean)?
        }
        EstimatorKind::Exact => estimate::exact::explain(&cached, request.summary)?,
        sampled => {
            let tolerance = if request.tolerance > 0.0 {
                request.tolerance
            } else {
                let ends = [
                    super::Coalition::EMPTY,
                    super::Coalition::full(subject.players.len()),
                ];
                let mut values = [0.0; 2];
                cached.values(&ends, &mut values);
                0.01 * (values[1] - values[0]).abs()
            };
            let stopping = Stopping {
                tolerance,
                max_evaluations: chosen.max_evaluations,
                deadline: Some(deadline),
            };
            let seed = request.seed;
            match (sampled, request.summary) {
                (EstimatorKind::Permutation, _) => {
                    estimate::permutation::shapley(&cached, &stopping, seed)?
                }
                (EstimatorKind::PairedRegression, Summary::LinearFit(kernel)) => {
                    estimate::regression::paired(&cached, kernel, &stopping, seed)?
                }
                (EstimatorKind::PairedRegression, _) => estimate::regression::paired(
                    &cached,
                    super::summary::Kernel::Shapley,
                    &stopping,
                    seed,
                )?,
                (EstimatorKind::LeverageRegression, _) => {
                    estimate::regression::leverage(&cached, &stopping, seed)?
                }
                (EstimatorKind::MaximumSampleReuse, _) => {
                    estimate::msr::banzhaf(&cached, &stopping, seed)?
                }
                (other, _) => unreachable!("{other:?} is not a sampled estimator"),
            }
        }
    };
    let finite = estimate.value_full.is_finite()
        && estimate.value_empty.is_finite()
        && estimate.values.iter().all(|v| v.is_finite());
    if !finite {
        return Err(EngineError::new(
            "model",
            "gave a non-finite output for this instance or a coalition of it; nothing can be attributed",
        ));
    }
    Ok(Explanation {
        estimate,
        estimator: chosen.estimator,
        plan_reason: chosen.reason,
        coalitions_evaluated: cached.evaluations(),
        model_rows_evaluated: cached.model_rows(),
        cache_hits: cached.cache_hits(),
        elapsed: started.elapsed(),
    })
}

/// Checks that do not need the removal or the game; every refusal names its
/// field.
fn validate(subject: &Subject, request: &Request) -> Result<()> {
    let model = subject.model;
    let inputs = model.inputs();
    let names = subject.players;
    if request.instance.len() != inputs {
        return Err(EngineError::new(
            "instance",
            format!(
                "has {} values; the model takes {inputs}",
                request.instance.len()
            ),
        ));
    }
    let conditional = matches!(
        request.removal,
        RemovalChoice::ConditionalGaussian { .. } | RemovalChoice::ConditionalNeighbors { .. }
    );
    for (j, x) in request.instance.iter().enumerate() {
        let missing_ok = model.accepts_missing() && !conditional;
        if x.is_infinite() || (x.is_nan() && !missing_ok) {
            let why = if x.is_infinite() {
                "is infinite".to_string()
            } else if conditional {
                "is NaN; conditional removal needs every feature present in the instance"
                    .to_string()
            } else {
                format!(
                    "is NaN; a {} model does not accept missing values",
                    model.kind()
                )
            };
            let feature = names.player_of(j);
            return Err(EngineError::new(
                "instance",
                format!("value {j} (player {:?}) {why}", names.names()[feature]),
            ));
        }
    }
    if subject.background.ncols() != inputs || subject.background.nrows() == 0 {
        return Err(EngineError::new(
            "background",
            format!(
                "needs at least one row of {inputs} columns, has {} × {}",
                subject.background.nrows(),
                subject.background.ncols()
            ),
        ));
    }
    match &request.target {
        Target::Probability if model.link() != Link::Logistic => {
            return Err(EngineError::new(
                "target",
                "PROBABILITY needs a model with a logistic link; use OUTPUT for this model",
            ));
        }
        Target::Loss { label } => check_label("label", *label, model.link())?,
        Target::DatasetLoss { labels, .. } => {
            for label in labels {
                check_label("dataset.labels", *label, model.link())?;
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
