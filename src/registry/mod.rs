//! Registered models, their versions and background samples, held in memory
//! for the service and persisted so that every acknowledged registration
//! survives a crash. Pure Rust: the gRPC layer converts into these types.
//!
//! # On-disk layout
//!
//! ```text
//! <dir>/lock                               held locked while a registry is open
//! <dir>/models/<model_id>/v<version>.json  one record per registered version
//! <dir>/models/<model_id>/versions.json    highest version ever assigned (written on delete)
//! <dir>/models/<model_id>/.<name>.tmp      only after an interrupted write
//! ```
//!
//! A record is one compact JSON object:
//! `{ "format": "apportion-model", "format_version": 1, "model_id", "version",
//! "checksum", "registered_unix_ms", "row_cost_ns", "spec": ModelSpec }`.
//! `checksum` is the lower-case hex sha256 of the spec's compact JSON
//! ([`spec_checksum`]) and is verified on load. The counter is
//! `{ "format": "apportion-version-counter", "format_version": 1, "model_id",
//! "last_version" }`. The next version of a model is one above the highest of
//! the counter and every `v<version>.json` name present, so versions are
//! never reused, across restarts and deletions alike.
//!
//! Every file is written to a temporary name, fsynced, renamed into place and
//! its directory fsynced before the call returns (common practice, no
//! source). On open, a record that does not parse, fails its checksum or
//! validation, or a leftover temporary file, is reported as a
//! [`LoadProblem`] and skipped; it is never served and never fatal.

mod store;

pub use store::{
    FORMAT_VERSION, MAX_RECORD_FILE_BYTES, data_dir_from, default_data_dir, spec_checksum,
};

use std::collections::{BTreeMap, HashMap};
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, PoisonError, RwLock};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use ndarray::{Array2, ArrayView2};
use serde::{Deserialize, Serialize};

use crate::engine::{EngineError, ErrorKind, Players, PreparedModel};
use crate::model::{LinearModel, Link, Model, Tree, TreeEnsemble};
use store::{Record, Store};

/// Longest model id, in characters.
pub const MAX_MODEL_ID_CHARS: usize = 128;
/// Most rows a background sample may have.
pub const MAX_BACKGROUND_ROWS: usize = 100_000;
/// Most bytes a background sample may take in memory (8 per value).
pub const MAX_BACKGROUND_BYTES: usize = 64 * 1024 * 1024;
/// Most features a model may declare.
pub const MAX_FEATURES: usize = 10_000;
/// Largest ONNX graph, in bytes.
pub const MAX_ONNX_BYTES: usize = 64 * 1024 * 1024;
/// Most tree nodes in one ensemble, summed over its trees.
pub const MAX_TREE_NODES: usize = 4_000_000;
/// Longest feature name, group, reason code or reason text, in bytes.
pub const MAX_TEXT_BYTES: usize = 4096;
/// Longest model description, in bytes.
pub const MAX_DESCRIPTION_BYTES: usize = 64 * 1024;

/// Least total time spent timing predictions when measuring the row cost.
const ROW_COST_MIN_TIME: Duration = Duration::from_millis(2);
/// Stops the row-cost loop even if the clock does not advance.
const ROW_COST_MAX_PASSES: u64 = 1_000_000;

/// One input feature as registered.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct FeatureSpec {
    pub name: String,
    /// Features sharing a non-empty group form one player named after it.
    pub group: String,
    /// Reason code and statement given when this feature's player is a
    /// principal reason; members of a group must agree (or leave them empty).
    pub reason_code: String,
    pub reason_text: String,
}

/// How raw outputs map to the probability scale (mirrors [`Link`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LinkSpec {
    Identity,
    Logistic,
}

impl From<LinkSpec> for Link {
    fn from(link: LinkSpec) -> Link {
        match link {
            LinkSpec::Identity => Link::Identity,
            LinkSpec::Logistic => Link::Logistic,
        }
    }
}

impl From<Link> for LinkSpec {
    fn from(link: Link) -> LinkSpec {
        match link {
            Link::Identity => LinkSpec::Identity,
            Link::Logistic => LinkSpec::Logistic,
        }
    }
}

/// One regression tree as parallel node arrays (see [`Tree::try_new`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TreeBody {
    pub feature: Vec<i32>,
    pub threshold: Vec<f64>,
    pub left: Vec<i32>,
    pub right: Vec<i32>,
    pub value: Vec<f64>,
    /// Empty means NaN goes left at every node.
    pub missing_left: Vec<bool>,
}

/// The model itself.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
#[non_exhaustive]
pub enum ModelBody {
    /// output = weights · x + intercept.
    Linear { weights: Vec<f64>, intercept: f64 },
    /// output = base_score + Σ tree(x).
    Trees {
        trees: Vec<TreeBody>,
        base_score: f64,
    },
    /// An ONNX graph (`ModelProto` bytes, hex on disk) taking
    /// `[batch, features]`; output = column `column` of the graph output
    /// named `output` (empty: the first output).
    Onnx {
        #[serde(with = "store::bytes_as_hex")]
        graph: Vec<u8>,
        output: String,
        column: usize,
    },
}

/// The background (reference) sample, row-major. NaN marks a missing value
/// (allowed only for models that take missing inputs); on disk it is `null`,
/// since JSON has no NaN.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Background {
    pub rows: usize,
    pub cols: usize,
    #[serde(with = "store::missing_as_null")]
    pub values: Vec<f64>,
}

/// Equal shapes and equal values, NaN equal to NaN: a missing value read
/// back from disk is the same background as the one registered.
impl PartialEq for Background {
    fn eq(&self, other: &Background) -> bool {
        self.rows == other.rows
            && self.cols == other.cols
            && self.values.len() == other.values.len()
            && self
                .values
                .iter()
                .zip(&other.values)
                .all(|(a, b)| a == b || (a.is_nan() && b.is_nan()))
    }
}

/// A registration request.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelSpec {
    pub model_id: String,
    pub features: Vec<FeatureSpec>,
    pub model: ModelBody,
    pub link: LinkSpec,
    pub background: Background,
    pub description: String,
}

/// What the registry reports about one registered version.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelInfo {
    pub model_id: String,
    pub version: u64,
    pub features: Vec<FeatureSpec>,
    pub background_rows: usize,
    /// [`Model::kind`]: `linear` or `trees`.
    pub model_kind: &'static str,
    pub link: Link,
    /// Measured at registration: time of one model row in a batched
    /// prediction over the background, in nanoseconds.
    pub row_cost_ns: f64,
    /// Time spent deriving the prepared model (at registration, and again
    /// on each load), in milliseconds.
    pub preparation_ms: f64,
    /// Heap bytes of what preparation derived from the model and
    /// background (statistics, factorizations, tree summaries).
    pub prepared_bytes: u64,
    pub registered_unix_ms: u64,
    /// See [`spec_checksum`].
    pub checksum: String,
    pub description: String,
}

/// One registered version, ready to explain with. Shared as `Arc<Entry>`;
/// it never changes after registration.
pub struct Entry {
    info: ModelInfo,
    body: ModelBody,
    prepared: Arc<PreparedModel>,
    reason_codes: Vec<String>,
    reason_statements: Vec<String>,
}

impl fmt::Debug for Entry {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        formatter
            .debug_struct("Entry")
            .field("info", &self.info)
            .field("players", &self.prepared.players().names())
            .finish_non_exhaustive()
    }
}

impl Entry {
    pub fn info(&self) -> &ModelInfo {
        &self.info
    }

    /// The model with everything derived from it and its background, as
    /// requests borrow it.
    pub fn prepared(&self) -> &Arc<PreparedModel> {
        &self.prepared
    }

    pub fn model(&self) -> &Arc<dyn Model> {
        self.prepared.shared_model()
    }

    pub fn players(&self) -> &Players {
        self.prepared.players()
    }

    /// Background rows × features.
    pub fn background(&self) -> ArrayView2<'_, f64> {
        self.prepared.background()
    }

    /// Reason code per player (empty when none was registered).
    pub fn reason_codes(&self) -> &[String] {
        &self.reason_codes
    }

    /// Reason statement per player, as [`crate::reasons::principal_reasons`]
    /// takes them; empty for a player that is never listed as a reason.
    pub fn reason_statements(&self) -> &[String] {
        &self.reason_statements
    }

    /// The registration as submitted, rebuilt on demand so the background
    /// is held in memory once. Its [`spec_checksum`] is `info().checksum`.
    pub fn spec(&self) -> ModelSpec {
        let background = self.background();
        ModelSpec {
            model_id: self.info.model_id.clone(),
            features: self.info.features.clone(),
            model: self.body.clone(),
            link: self.info.link.into(),
            background: Background {
                rows: background.nrows(),
                cols: background.ncols(),
                values: background.iter().copied().collect(),
            },
            description: self.info.description.clone(),
        }
    }
}

/// A file skipped on open, and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LoadProblem {
    pub path: PathBuf,
    pub reason: String,
}

impl fmt::Display for LoadProblem {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(formatter, "{}: {}", self.path.display(), self.reason)
    }
}

/// Why the registry refused a call. Nothing is changed when one is returned,
/// except where [`RegistryError::Io`] says otherwise for a partial delete.
#[derive(Debug, thiserror::Error)]
pub enum RegistryError {
    /// The spec is invalid; the engine error names the field.
    #[error("{0}")]
    Invalid(#[from] EngineError),
    #[error("{field}: {actual} {unit} exceed the limit of {limit}; {fix}")]
    TooLarge {
        field: String,
        actual: u64,
        limit: u64,
        unit: &'static str,
        fix: &'static str,
    },
    /// `version` 0 means "any version".
    #[error(
        "model_id {model_id:?}{}: not registered; list the registry for the registered models and versions",
        if *version == 0 { String::new() } else { format!(" version {version}") }
    )]
    NotFound { model_id: String, version: u64 },
    #[error(
        "{}: another registry holds this data directory; stop it or configure a different directory",
        path.display()
    )]
    InUse { path: PathBuf },
    #[error(
        "{}: could not {action}: {source}; check that the data directory is writable and has free space",
        path.display()
    )]
    Io {
        path: PathBuf,
        action: &'static str,
        source: std::io::Error,
    },
}

impl RegistryError {
    /// Whose fault the error is.
    pub fn kind(&self) -> ErrorKind {
        match self {
            RegistryError::Invalid(error) => error.kind,
            RegistryError::TooLarge { .. } => ErrorKind::InvalidArgument,
            RegistryError::NotFound { .. } => ErrorKind::NotFound,
            // Storage trouble is the operator's to fix and may pass.
            RegistryError::InUse { .. } | RegistryError::Io { .. } => ErrorKind::Unavailable,
        }
    }

    /// The request field at fault, if the error is about one.
    pub fn field(&self) -> Option<&str> {
        match self {
            RegistryError::Invalid(error) => Some(&error.field),
            RegistryError::TooLarge { field, .. } => Some(field),
            RegistryError::NotFound { version: 0, .. } => Some("model_id"),
            RegistryError::NotFound { .. } => Some("version"),
            RegistryError::InUse { .. } | RegistryError::Io { .. } => None,
        }
    }
}

pub type Result<T> = std::result::Result<T, RegistryError>;

/// Checks that `model_id` is usable as a directory name on any file system.
pub fn check_model_id(model_id: &str) -> std::result::Result<(), EngineError> {
    let refuse = |why: String| Err(EngineError::new("model_id", why));
    if model_id.is_empty() {
        return refuse("must not be empty; use letters, digits, '.', '_' or '-'".to_string());
    }
    if let Some((at, bad)) = model_id
        .chars()
        .enumerate()
        .find(|(_, c)| !(c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-')))
    {
        return refuse(format!(
            "character {at} ({bad:?}) is not allowed; use only letters A-Z a-z, digits, '.', '_' or '-'"
        ));
    }
    if model_id.len() > MAX_MODEL_ID_CHARS {
        return refuse(format!(
            "has {} characters; use at most {MAX_MODEL_ID_CHARS}",
            model_id.len()
        ));
    }
    if model_id.starts_with('.') {
        return refuse("must not start with '.' (such names are reserved)".to_string());
    }
    Ok(())
}

fn too_large(
    field: &str,
    actual: usize,
    limit: usize,
    unit: &'static str,
    fix: &'static str,
) -> RegistryError {
    RegistryError::TooLarge {
        field: field.to_string(),
        actual: actual as u64,
        limit: limit as u64,
        unit,
        fix,
    }
}

fn check_text(field: &str, text: &str, limit: usize) -> Result<()> {
    if text.len() > limit {
        return Err(too_large(
            field,
            text.len(),
            limit,
            "bytes",
            "shorten the text",
        ));
    }
    Ok(())
}

/// A spec checked and converted, not yet prepared or given a version.
struct Validated {
    info: ModelInfo,
    body: ModelBody,
    model: Arc<dyn Model>,
    players: Players,
    background: Array2<f64>,
    reason_codes: Vec<String>,
    reason_statements: Vec<String>,
}

impl Validated {
    /// Derives the prepared model, with the row cost measured at
    /// registration.
    fn into_entry(self, row_cost_ns: f64) -> Result<Entry> {
        let prepared =
            PreparedModel::try_new(self.model, self.players, self.background, row_cost_ns)?;
        let mut info = self.info;
        info.row_cost_ns = row_cost_ns;
        info.preparation_ms = prepared.preparation().as_secs_f64() * 1e3;
        info.prepared_bytes = prepared.derived_bytes() as u64;
        Ok(Entry {
            info,
            body: self.body,
            prepared: Arc::new(prepared),
            reason_codes: self.reason_codes,
            reason_statements: self.reason_statements,
        })
    }
}

/// Validates every part of `spec` and builds the model, players and
/// background. `checksum` is computed unless the caller already verified it.
fn validate(spec: ModelSpec, checksum: Option<String>) -> Result<Validated> {
    check_model_id(&spec.model_id)?;
    check_text("description", &spec.description, MAX_DESCRIPTION_BYTES)?;
    if spec.features.len() > MAX_FEATURES {
        return Err(too_large(
            "features",
            spec.features.len(),
            MAX_FEATURES,
            "features",
            "register fewer features",
        ));
    }
    for feature in &spec.features {
        check_text("features.name", &feature.name, MAX_TEXT_BYTES)?;
        check_text("features.group", &feature.group, MAX_TEXT_BYTES)?;
        check_text("features.reason_code", &feature.reason_code, MAX_TEXT_BYTES)?;
        check_text("features.reason_text", &feature.reason_text, MAX_TEXT_BYTES)?;
    }
    let names: Vec<String> = spec.features.iter().map(|f| f.name.clone()).collect();
    let groups: Vec<String> = spec.features.iter().map(|f| f.group.clone()).collect();
    let players = Players::try_new(&names, &groups)?;
    let reason_codes = per_player(&players, &spec.features, "features.reason_code", |f| {
        &f.reason_code
    })?;
    let reason_statements = per_player(&players, &spec.features, "features.reason_text", |f| {
        &f.reason_text
    })?;
    let link = Link::from(spec.link);
    let model = build_model(&spec.model, link, spec.features.len())?;
    check_background(&spec.background, &spec.features, model.accepts_missing())?;
    let checksum = match checksum {
        Some(checksum) => checksum,
        None => spec_checksum(&spec)?,
    };
    let ModelSpec {
        model_id,
        features,
        model: body,
        background,
        description,
        ..
    } = spec;
    let background_rows = background.rows;
    let background = Array2::from_shape_vec((background.rows, background.cols), background.values)
        .map_err(|error| {
            EngineError::new("background.values", format!("cannot be shaped: {error}"))
        })?;
    Ok(Validated {
        info: ModelInfo {
            model_id,
            version: 0,
            features,
            background_rows,
            model_kind: model.kind(),
            link,
            row_cost_ns: 0.0,
            preparation_ms: 0.0,
            prepared_bytes: 0,
            registered_unix_ms: 0,
            checksum,
            description,
        },
        body,
        model,
        players,
        background,
        reason_codes,
        reason_statements,
    })
}

/// The one non-empty value the features of each player give (members of a
/// group must not disagree), or empty.
fn per_player(
    players: &Players,
    features: &[FeatureSpec],
    field: &str,
    text: impl Fn(&FeatureSpec) -> &String,
) -> Result<Vec<String>> {
    let mut out = Vec::with_capacity(players.len());
    for player in 0..players.len() {
        let mut chosen: Option<&String> = None;
        for &member in players.members(player) {
            let candidate = text(&features[member]);
            if candidate.is_empty() {
                continue;
            }
            match chosen {
                Some(existing) if existing != candidate => {
                    return Err(EngineError::new(
                        field,
                        format!(
                            "group {:?} has two different values ({existing:?}, {candidate:?}); give its members the same one or leave all but one empty",
                            players.names()[player]
                        ),
                    )
                    .into());
                }
                _ => chosen = Some(candidate),
            }
        }
        out.push(chosen.cloned().unwrap_or_default());
    }
    Ok(out)
}

/// Shapes and sizes, and every value finite, except that NaN (missing) is
/// allowed where the model takes missing inputs.
fn check_background(
    background: &Background,
    features: &[FeatureSpec],
    accepts_missing: bool,
) -> Result<()> {
    if background.rows == 0 {
        return Err(EngineError::new(
            "background.rows",
            "needs at least one row; send a sample of typical inputs",
        )
        .into());
    }
    if background.cols != features.len() {
        return Err(EngineError::new(
            "background.cols",
            format!(
                "is {}, but {} features are registered; give one column per feature",
                background.cols,
                features.len()
            ),
        )
        .into());
    }
    if background.rows > MAX_BACKGROUND_ROWS {
        return Err(too_large(
            "background.rows",
            background.rows,
            MAX_BACKGROUND_ROWS,
            "rows",
            "send a random subsample of the background",
        ));
    }
    if background.rows.checked_mul(background.cols) != Some(background.values.len()) {
        return Err(EngineError::new(
            "background.values",
            format!(
                "has {} values, but rows × cols = {} × {}; send the rows back to back, row-major",
                background.values.len(),
                background.rows,
                background.cols
            ),
        )
        .into());
    }
    let bytes = background.values.len().saturating_mul(size_of::<f64>());
    if bytes > MAX_BACKGROUND_BYTES {
        return Err(too_large(
            "background.values",
            bytes,
            MAX_BACKGROUND_BYTES,
            "bytes",
            "send fewer background rows",
        ));
    }
    let refused = |v: &f64| v.is_infinite() || (v.is_nan() && !accepts_missing);
    if let Some(at) = background.values.iter().position(refused) {
        let (row, col) = (at / background.cols, at % background.cols);
        let why = if background.values[at].is_nan() {
            "is missing (NaN), and only tree models take missing values; impute or drop that row"
        } else {
            "is infinite; clip or drop that row"
        };
        return Err(EngineError::new(
            "background.values",
            format!("row {row}, column {col} ({:?}) {why}", features[col].name),
        )
        .into());
    }
    Ok(())
}

fn build_model(body: &ModelBody, link: Link, inputs: usize) -> Result<Arc<dyn Model>> {
    match body {
        ModelBody::Linear { weights, intercept } => {
            if weights.len() != inputs {
                return Err(EngineError::new(
                    "linear.weights",
                    format!(
                        "has {} weights for {inputs} features; give one weight per feature",
                        weights.len()
                    ),
                )
                .into());
            }
            Ok(Arc::new(LinearModel::try_new(
                weights.clone(),
                *intercept,
                link,
            )?))
        }
        ModelBody::Trees { trees, base_score } => {
            let nodes = trees
                .iter()
                .map(|tree| tree.left.len())
                .fold(0usize, usize::saturating_add);
            if nodes > MAX_TREE_NODES {
                return Err(too_large(
                    "trees",
                    nodes,
                    MAX_TREE_NODES,
                    "nodes",
                    "register a smaller ensemble",
                ));
            }
            let mut built = Vec::with_capacity(trees.len());
            for (index, tree) in trees.iter().enumerate() {
                // The tree checks thresholds and values only where it reads
                // them, but every number is persisted, and JSON has no
                // spelling for NaN or infinity.
                for (name, numbers) in [("threshold", &tree.threshold), ("value", &tree.value)] {
                    if let Some(node) = numbers.iter().position(|v| !v.is_finite()) {
                        return Err(EngineError::new(
                            format!("trees.{name}"),
                            format!("tree {index}, node {node} is not a finite number"),
                        )
                        .into());
                    }
                }
                let tree = Tree::try_new(
                    tree.feature.clone(),
                    tree.threshold.clone(),
                    tree.left.clone(),
                    tree.right.clone(),
                    tree.value.clone(),
                    tree.missing_left.clone(),
                    inputs,
                )
                .map_err(|error| {
                    EngineError::new(error.field, format!("tree {index}: {}", error.message))
                })?;
                built.push(tree);
            }
            Ok(Arc::new(TreeEnsemble::try_new(
                built,
                *base_score,
                link,
                inputs,
            )?))
        }
        ModelBody::Onnx {
            graph,
            output,
            column,
        } => build_onnx(graph, output, *column, link, inputs),
    }
}

#[cfg(feature = "onnx")]
fn build_onnx(
    graph: &[u8],
    output: &str,
    column: usize,
    link: Link,
    inputs: usize,
) -> Result<Arc<dyn Model>> {
    if graph.len() > MAX_ONNX_BYTES {
        return Err(too_large(
            "onnx",
            graph.len(),
            MAX_ONNX_BYTES,
            "bytes",
            "register a smaller graph",
        ));
    }
    check_text("onnx_output", output, MAX_TEXT_BYTES)?;
    Ok(Arc::new(crate::model::OnnxModel::try_new(
        graph, inputs, output, column, link,
    )?))
}

#[cfg(not(feature = "onnx"))]
fn build_onnx(_: &[u8], _: &str, _: usize, _: Link, _: usize) -> Result<Arc<dyn Model>> {
    Err(EngineError::new(
        "onnx",
        "this build has no ONNX runtime (built without the `onnx` feature)",
    )
    .into())
}

/// The model's outputs on its background must be numbers: a NaN or
/// infinite output would make every attribution meaningless.
fn check_outputs(model: &dyn Model, background: ArrayView2<'_, f64>) -> Result<()> {
    let mut out = vec![0.0; background.nrows()];
    model.predict(background, &mut out);
    match out.iter().position(|v| !v.is_finite()) {
        Some(row) => Err(EngineError::new(
            "model",
            format!(
                "gives {} on background row {row}; only finite outputs can be explained",
                out[row]
            ),
        )
        .into()),
        None => Ok(()),
    }
}

/// Nanoseconds per row of a batched prediction over `rows`, timed over
/// repeated passes until at least [`ROW_COST_MIN_TIME`] has elapsed. A
/// measurement for the planner, not a guarantee.
fn measure_row_cost(model: &dyn Model, rows: ArrayView2<'_, f64>) -> f64 {
    let mut out = vec![0.0; rows.nrows()];
    let start = Instant::now();
    let mut passes = 0u64;
    loop {
        model.predict(std::hint::black_box(rows), &mut out);
        std::hint::black_box(&mut out);
        passes += 1;
        if start.elapsed() >= ROW_COST_MIN_TIME || passes >= ROW_COST_MAX_PASSES {
            break;
        }
    }
    start.elapsed().as_nanos() as f64 / (passes as f64 * rows.nrows().max(1) as f64)
}

fn unix_ms_now() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|since| since.as_millis() as u64)
        .unwrap_or(0)
}

type Versions = BTreeMap<u64, Arc<Entry>>;

/// The registered models. Reads take a shared lock for a map lookup only;
/// writes are serialised by a separate mutex and do their file I/O without
/// holding the map lock.
pub struct Registry {
    store: Store,
    models: RwLock<BTreeMap<String, Versions>>,
    /// Highest version ever assigned per model id, on disk or in memory.
    writer: Mutex<HashMap<String, u64>>,
}

impl fmt::Debug for Registry {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        formatter
            .debug_struct("Registry")
            .field("dir", &self.store.root())
            .finish_non_exhaustive()
    }
}

impl Registry {
    /// Opens (creating if needed) the registry in `dir` and loads every
    /// record. Files that cannot be served are returned as problems.
    pub fn open(dir: impl AsRef<Path>) -> Result<(Registry, Vec<LoadProblem>)> {
        let store = Store::open(dir.as_ref())?;
        let mut scan = store.scan()?;
        let mut models: BTreeMap<String, Versions> = BTreeMap::new();
        for loaded in std::mem::take(&mut scan.records) {
            let record = loaded.record;
            let entry = validate(record.spec, Some(record.checksum))
                .and_then(|validated| validated.into_entry(record.row_cost_ns));
            match entry {
                Ok(mut entry) => {
                    entry.info.version = record.version;
                    entry.info.registered_unix_ms = record.registered_unix_ms;
                    models
                        .entry(record.model_id)
                        .or_default()
                        .insert(record.version, Arc::new(entry));
                }
                Err(error) => scan.problem(
                    &loaded.path,
                    &format!("the stored spec fails validation: {error}"),
                ),
            }
        }
        let registry = Registry {
            store,
            models: RwLock::new(models),
            writer: Mutex::new(scan.last_versions.into_iter().collect()),
        };
        Ok((registry, scan.problems))
    }

    /// Opens the registry in [`default_data_dir`].
    pub fn open_default() -> Result<(Registry, Vec<LoadProblem>)> {
        let dir = default_data_dir().ok_or_else(|| RegistryError::Io {
            path: PathBuf::from("$HOME"),
            action: "find a data directory",
            source: std::io::Error::new(
                std::io::ErrorKind::NotFound,
                "neither XDG_DATA_HOME nor HOME is set to an absolute path",
            ),
        })?;
        Registry::open(dir)
    }

    pub fn dir(&self) -> &Path {
        self.store.root()
    }

    /// Validates `spec`, measures its row cost, assigns the next version and
    /// persists it durably; only then is it served.
    pub fn register(&self, spec: ModelSpec) -> Result<ModelInfo> {
        let validated = validate(spec, None)?;
        check_outputs(validated.model.as_ref(), validated.background.view())?;
        let row_cost_ns = measure_row_cost(validated.model.as_ref(), validated.background.view());
        let mut entry = validated.into_entry(row_cost_ns)?;
        entry.info.registered_unix_ms = unix_ms_now();
        let model_id = entry.info.model_id.clone();

        let mut last_versions = self.writer.lock().unwrap_or_else(PoisonError::into_inner);
        // On a case-insensitive file system these would share a directory.
        if let Some(other) = last_versions
            .keys()
            .find(|other| **other != model_id && other.eq_ignore_ascii_case(&model_id))
        {
            return Err(EngineError::new(
                "model_id",
                format!("differs from the registered {other:?} only in letter case; use {other:?} or another name"),
            )
            .into());
        }
        let last = last_versions.get(&model_id).copied().unwrap_or(0);
        let Some(version) = last.checked_add(1) else {
            return Err(EngineError::new(
                "model_id",
                "has used up every version number; use a new id",
            )
            .into());
        };
        // Consumed even if the write fails: a file may have reached the disk.
        last_versions.insert(model_id.clone(), version);
        entry.info.version = version;

        let spec = entry.spec();
        let record = Record {
            format: "apportion-model".to_string(),
            format_version: FORMAT_VERSION,
            model_id: model_id.clone(),
            version,
            checksum: entry.info.checksum.clone(),
            registered_unix_ms: entry.info.registered_unix_ms,
            row_cost_ns,
            spec: &spec,
        };
        if let Err(error) = self.store.write_record(&record) {
            self.store.discard_record(&model_id, version);
            return Err(error);
        }
        drop(spec);
        let info = entry.info.clone();
        self.models
            .write()
            .unwrap_or_else(PoisonError::into_inner)
            .entry(model_id)
            .or_default()
            .insert(version, Arc::new(entry));
        Ok(info)
    }

    /// The given version, or the latest when `version` is 0.
    pub fn get(&self, model_id: &str, version: u64) -> Result<Arc<Entry>> {
        let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
        let versions = models.get(model_id);
        let found = match version {
            0 => versions.and_then(|versions| versions.values().next_back()),
            _ => versions.and_then(|versions| versions.get(&version)),
        };
        found.cloned().ok_or_else(|| RegistryError::NotFound {
            model_id: model_id.to_string(),
            version,
        })
    }

    /// Every served version, sorted by model id then version.
    pub fn list(&self) -> Vec<ModelInfo> {
        let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
        models
            .values()
            .flat_map(|versions| versions.values().map(|entry| entry.info.clone()))
            .collect()
    }

    /// Deletes one version, or all of them when `version` is 0, from disk
    /// (durably) and then from memory. Returns how many were deleted.
    pub fn delete(&self, model_id: &str, version: u64) -> Result<usize> {
        let last_versions = self.writer.lock().unwrap_or_else(PoisonError::into_inner);
        let doomed: Vec<u64> = {
            let models = self.models.read().unwrap_or_else(PoisonError::into_inner);
            match models.get(model_id) {
                Some(versions) if version == 0 => versions.keys().copied().collect(),
                Some(versions) if versions.contains_key(&version) => vec![version],
                _ => Vec::new(),
            }
        };
        if doomed.is_empty() {
            return Err(RegistryError::NotFound {
                model_id: model_id.to_string(),
                version,
            });
        }
        // Record the highest version first, so it outlives the files that
        // carried it.
        let last = last_versions.get(model_id).copied().unwrap_or(0);
        self.store.write_counter(model_id, last)?;
        let (removed, failure) = self.store.remove_records(model_id, &doomed);
        {
            let mut models = self.models.write().unwrap_or_else(PoisonError::into_inner);
            if let Some(versions) = models.get_mut(model_id) {
                for version in &removed {
                    versions.remove(version);
                }
                if versions.is_empty() {
                    models.remove(model_id);
                }
            }
        }
        drop(last_versions);
        match failure {
            Some(error) => Err(error),
            None => Ok(removed.len()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn model_ids_are_path_safe() {
        // Common practice, no source: ids become directory names, so path
        // separators, parent references and hidden names are refused.
        for good in ["rent-screening_v2.1", "A", &"x".repeat(MAX_MODEL_ID_CHARS)] {
            assert!(check_model_id(good).is_ok(), "{good}");
        }
        for bad in [
            "",
            "a/b",
            "a\\b",
            "..",
            ".hidden",
            "é",
            "a b",
            &"x".repeat(MAX_MODEL_ID_CHARS + 1),
        ] {
            assert_eq!(
                check_model_id(bad).unwrap_err().field,
                "model_id",
                "{bad:?}"
            );
        }
    }
}
