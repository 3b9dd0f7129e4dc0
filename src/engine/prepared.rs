//! The prepared model: a registered model with its players and background,
//! and everything derived from them alone — background means, neighbour
//! scales, the Gaussian fit, the tree ensemble summarised against its
//! background — computed once, at registration and on load. Requests borrow
//! it; nothing here is recomputed or copied per request.

use std::sync::{Arc, Mutex, OnceLock};
use std::time::{Duration, Instant};

use ndarray::{Array2, ArrayView2};

use super::error::{EngineError, ErrorKind, Result};
use super::estimate::tree::{self, CompiledTrees};
use super::estimate::tree_table;
use super::model::{Link, Model, Structure};
use super::players::Players;
use super::removal::{self, GaussianFit};
use super::summary::Summary;
use super::target::Target;

/// Background rows the exact tree algorithm is timed on at preparation.
const TREE_TIMING_ROWS: usize = 16;

/// Most memory the per-leaf background summaries of one tree ensemble may
/// take; trees beyond it keep the per-row pass.
pub const TREE_SUMMARY_LIMIT_BYTES: usize = 256 << 20;

/// Largest Gaussian fit made at preparation, in multiply-adds (rows ×
/// features²): about a tenth of a second. A larger one is made by the first
/// request that needs it, then kept.
const EAGER_GAUSSIAN_WORK: usize = 100_000_000;

/// Runs of a model's coalition work the planner waits for before it
/// prices rows at their learnt cost instead of the registered one.
const LEARNT_AFTER_RUNS: u64 = 3;
/// Fewest model rows a run must evaluate to teach the row cost: below
/// that, a run's fixed costs (planning, the cache, the estimator's
/// arithmetic) would pass for the rows' (common practice, no source).
const LEARNING_ROWS: u64 = 1024;
/// Weight of the newest run in the learnt row cost (an exponentially
/// weighted mean over the last ten or so runs; common practice, no
/// source).
const LEARNING_WEIGHT: f64 = 0.2;

/// What one model row costs inside the engine's coalition work (rows
/// filled by the removal, predicted, averaged, and the estimator's own
/// arithmetic spread over them), learnt from this model's runs; the
/// batched prediction timed at registration prices rows until enough runs
/// have been seen. Learnt under the server's real load, so when the cores
/// are shared the planner sees rows cost more, and plans less.
#[derive(Debug)]
struct LearntRowCost {
    registered: f64,
    /// (exponentially weighted ns per row, runs seen).
    learnt: Mutex<(f64, u64)>,
}

impl LearntRowCost {
    fn new(registered: f64) -> LearntRowCost {
        LearntRowCost {
            registered,
            learnt: Mutex::new((0.0, 0)),
        }
    }

    fn get(&self) -> f64 {
        let (learnt, runs) = *self.learnt.lock().unwrap_or_else(|e| e.into_inner());
        if runs >= LEARNT_AFTER_RUNS {
            learnt
        } else {
            self.registered
        }
    }

    fn observe(&self, elapsed: Duration, rows: u64) {
        if rows < LEARNING_ROWS {
            return;
        }
        let per_row = elapsed.as_nanos() as f64 / rows as f64;
        let mut learnt = self.learnt.lock().unwrap_or_else(|e| e.into_inner());
        learnt.0 = if learnt.1 == 0 {
            per_row
        } else {
            LEARNING_WEIGHT * per_row + (1.0 - LEARNING_WEIGHT) * learnt.0
        };
        learnt.1 += 1;
    }
}

/// A model ready to explain. Shared as `Arc<PreparedModel>`; what it
/// derives never changes after preparation (only the learnt row cost
/// moves, with the model's runs).
pub struct PreparedModel {
    model: Arc<dyn Model>,
    players: Players,
    /// Background (reference) rows × model inputs.
    background: Array2<f64>,
    /// Measured time of one model row in a batched prediction, in ns.
    row_cost_ns: f64,
    /// The planner's price of a row of coalition work.
    coalition_row_cost: LearntRowCost,
    /// Column means, the reference of FIXED removal without values and of
    /// the linear closed form; refused when the background has missing
    /// values.
    background_mean: Result<Vec<f64>>,
    /// Per-feature inverse standard deviations for neighbour removal, or
    /// why there are none.
    neighbor_scales: Result<Vec<f64>>,
    /// The Gaussian fitted to the background, or why none fits.
    gaussian: OnceLock<Result<GaussianFit>>,
    /// A tree ensemble summarised against the background, for marginal
    /// removal; `None` for other models.
    compiled_trees: Option<CompiledTrees>,
    /// Measured time of the exact tree algorithm per reference row over
    /// the whole ensemble (FIXED removal), in ns; 0 for other models.
    tree_reference_cost_ns: f64,
    /// Measured time of the tree walk's coalition table per reference
    /// row, in ns; `None` for other models and for more players than a
    /// table takes.
    tree_table_cost_ns: Option<f64>,
    /// How long preparation took.
    preparation: Duration,
}

impl std::fmt::Debug for PreparedModel {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        formatter
            .debug_struct("PreparedModel")
            .field("kind", &self.model.kind())
            .field("players", &self.players.names())
            .field("background", &self.background.dim())
            .finish_non_exhaustive()
    }
}

/// A statistic the background cannot give is the registration's limit, not
/// the caller's mistake.
fn precondition(error: EngineError) -> EngineError {
    EngineError {
        kind: ErrorKind::FailedPrecondition,
        ..error
    }
}

impl PreparedModel {
    /// Checks that model, players and background agree, and derives every
    /// per-model statistic. `row_cost_ns` is the measured time of one model
    /// row (see the registry).
    pub fn try_new(
        model: Arc<dyn Model>,
        players: Players,
        background: Array2<f64>,
        row_cost_ns: f64,
    ) -> Result<PreparedModel> {
        let started = Instant::now();
        let inputs = model.inputs();
        if players.features() != inputs {
            return Err(EngineError::new(
                "features",
                format!(
                    "{} features are described for a model with {inputs} inputs",
                    players.features()
                ),
            ));
        }
        if background.ncols() != inputs || background.nrows() == 0 {
            return Err(EngineError::new(
                "background",
                format!(
                    "needs at least one row of {inputs} columns, has {} × {}",
                    background.nrows(),
                    background.ncols()
                ),
            ));
        }
        if !(row_cost_ns.is_finite() && row_cost_ns >= 0.0) {
            return Err(EngineError::new(
                "row_cost_ns",
                "must be a finite number of nanoseconds ≥ 0",
            ));
        }
        let view = background.view();
        let background_mean = removal::background_mean(view).map_err(precondition);
        let neighbor_scales = removal::inverse_scales(view).map_err(precondition);
        let mut prepared = PreparedModel {
            model,
            players,
            background,
            row_cost_ns,
            coalition_row_cost: LearntRowCost::new(row_cost_ns),
            background_mean,
            neighbor_scales,
            gaussian: OnceLock::new(),
            compiled_trees: None,
            tree_reference_cost_ns: 0.0,
            tree_table_cost_ns: None,
            preparation: Duration::ZERO,
        };
        if let Structure::Trees(ensemble) = prepared.structure() {
            let compiled = CompiledTrees::compile(
                ensemble,
                &prepared.players,
                prepared.background.view(),
                TREE_SUMMARY_LIMIT_BYTES,
            )?;
            prepared.compiled_trees = Some(compiled);
        }
        prepared.tree_reference_cost_ns = prepared.measure_tree_reference_cost();
        prepared.tree_table_cost_ns = prepared.measure_tree_table_cost();
        let (rows, features) = prepared.background.dim();
        if rows.saturating_mul(features).saturating_mul(features) <= EAGER_GAUSSIAN_WORK {
            // Whether it fits or not, the outcome is kept for the requests.
            let _ = prepared.gaussian();
        }
        prepared.preparation = started.elapsed();
        Ok(prepared)
    }

    pub fn model(&self) -> &dyn Model {
        self.model.as_ref()
    }

    pub fn shared_model(&self) -> &Arc<dyn Model> {
        &self.model
    }

    pub fn players(&self) -> &Players {
        &self.players
    }

    pub fn background(&self) -> ArrayView2<'_, f64> {
        self.background.view()
    }

    /// The batched prediction's time per row, measured at registration.
    pub fn row_cost_ns(&self) -> f64 {
        self.row_cost_ns
    }

    /// The time per model row of coalition work the planner prices: learnt
    /// from this model's runs once there are enough of them, the
    /// registered [`PreparedModel::row_cost_ns`] before.
    pub fn coalition_row_cost_ns(&self) -> f64 {
        self.coalition_row_cost.get()
    }

    /// Teaches the learnt row cost one run's computing time over the model
    /// rows it evaluated (runs too small to say are ignored).
    pub fn observe_coalition_run(&self, elapsed: Duration, rows: u64) {
        self.coalition_row_cost.observe(elapsed, rows);
    }

    pub fn structure(&self) -> Structure<'_> {
        self.model.structure()
    }

    /// The background's column means, or why there are none.
    pub fn background_mean(&self) -> Result<&[f64]> {
        self.background_mean
            .as_deref()
            .map_err(|error| error.clone())
    }

    /// Per-feature inverse standard deviations for neighbour removal.
    pub fn neighbor_scales(&self) -> Result<&[f64]> {
        self.neighbor_scales
            .as_deref()
            .map_err(|error| error.clone())
    }

    /// The Gaussian fitted to the background, made on first use when it was
    /// too large to make at preparation.
    pub fn gaussian(&self) -> Result<&GaussianFit> {
        self.gaussian
            .get_or_init(|| GaussianFit::try_new(self.background.view()).map_err(precondition))
            .as_ref()
            .map_err(|error| error.clone())
    }

    /// The tree ensemble summarised against the background (tree models
    /// only).
    pub fn compiled_trees(&self) -> Option<&CompiledTrees> {
        self.compiled_trees.as_ref()
    }

    /// Predicted time of the model-specific exact algorithm, in ns, over
    /// the whole background (`fixed` false) or one reference row; `None`
    /// when the model has none.
    pub fn exact_cost_ns(&self, fixed: bool) -> Option<f64> {
        match (self.structure(), &self.compiled_trees) {
            // One pass over the weights: about one model row.
            (Structure::Linear(_), _) => Some(self.row_cost_ns),
            (Structure::Trees(_), Some(compiled)) if !fixed => Some(compiled.predicted_ns()),
            (Structure::Trees(_), _) => Some(self.tree_reference_cost_ns),
            (Structure::Opaque, _) => None,
        }
    }

    /// Predicted time of every coalition value by the tree walk, in ns,
    /// under marginal removal over the whole background (`fixed` false)
    /// or fixed removal to one row; `None` when the model has no table.
    pub fn tree_table_cost_ns(&self, fixed: bool) -> Option<f64> {
        let rows = if fixed { 1 } else { self.background.nrows() };
        self.tree_table_cost_ns.map(|per_row| per_row * rows as f64)
    }

    /// Times the coalition table of the first background row's probability
    /// against up to [`TREE_TIMING_ROWS`] background rows, per reference
    /// row.
    fn measure_tree_table_cost(&self) -> Option<f64> {
        let Structure::Trees(ensemble) = self.structure() else {
            return None;
        };
        if self.players.len() > tree_table::TABLE_PLAYER_LIMIT {
            return None;
        }
        let (references, instance) = self.timing_rows();
        let started = Instant::now();
        tree_table::TreeTable::build(
            ensemble,
            Link::Logistic,
            &self.players,
            &instance,
            references,
            &Target::Probability,
            &super::estimate::Stopping::unbounded(),
        )
        .ok()?;
        Some(started.elapsed().as_nanos() as f64 / references.nrows() as f64)
    }

    /// What preparation times the tree algorithms on: the first
    /// [`TREE_TIMING_ROWS`] background rows as references, the first as
    /// the instance.
    fn timing_rows(&self) -> (ArrayView2<'_, f64>, Vec<f64>) {
        let rows = self.background.nrows().min(TREE_TIMING_ROWS);
        (
            self.background.slice(ndarray::s![..rows, ..]),
            self.background.row(0).to_vec(),
        )
    }

    /// Times the exact tree algorithm for the first background row against
    /// up to [`TREE_TIMING_ROWS`] background rows, and returns the time per
    /// reference row.
    fn measure_tree_reference_cost(&self) -> f64 {
        let Structure::Trees(ensemble) = self.structure() else {
            return 0.0;
        };
        let (references, instance) = self.timing_rows();
        let rows = references.nrows();
        let started = Instant::now();
        let timed = tree::explain(
            ensemble,
            &self.players,
            &instance,
            references,
            Summary::Shapley,
        );
        match timed {
            Ok(_) => started.elapsed().as_nanos() as f64 / rows as f64,
            Err(_) => 0.0,
        }
    }

    /// How long [`PreparedModel::try_new`] took.
    pub fn preparation(&self) -> Duration {
        self.preparation
    }

    /// Heap bytes of what preparation derived (not counting the model and
    /// background themselves).
    pub fn derived_bytes(&self) -> usize {
        let floats = |values: &Result<Vec<f64>>| values.as_ref().map_or(0, Vec::len);
        let features = self.background.ncols();
        let trees = self
            .compiled_trees
            .as_ref()
            .map_or(0, CompiledTrees::memory_bytes);
        // Mean, scales, correlation and its factor.
        let gaussian = match self.gaussian.get() {
            Some(Ok(_)) => 2 * features + 2 * features * features,
            _ => 0,
        };
        size_of::<f64>()
            * (floats(&self.background_mean) + floats(&self.neighbor_scales) + gaussian)
            + trees
    }
}
