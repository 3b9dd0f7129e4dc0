//! Checking a registration and building what it describes: limits on
//! every size, the model from its body, the players and their reason
//! statements, the background; then the row cost measured and the prepared
//! model derived. Nothing is registered until all of it succeeds.

use std::sync::Arc;
use std::time::{Duration, Instant};

use ndarray::{Array2, ArrayView2};

use super::spec::{Background, Decision, FeatureSpec, ImportFormat, ModelBody, ModelSpec};
use super::store::spec_checksum;
use super::{Entry, ModelInfo, RegistryError, Result};
use crate::engine::{EngineError, Players, PreparedModel};
use crate::model::{LinearModel, Link, Model, TreeEnsemble};
use crate::reasons::Space;

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

pub(super) fn too_large(
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
pub(super) struct Validated {
    info: ModelInfo,
    body: ModelBody,
    pub(super) model: Arc<dyn Model>,
    players: Players,
    pub(super) background: Array2<f64>,
    reason_codes: Vec<String>,
    reason_statements: Vec<String>,
}

impl Validated {
    /// Derives the prepared model, with the row cost measured at
    /// registration.
    pub(super) fn into_entry(self, row_cost_ns: f64) -> Result<Entry> {
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
pub(super) fn validate(spec: ModelSpec, checksum: Option<String>) -> Result<Validated> {
    check_model_id(&spec.model_id)?;
    check_text("description", &spec.description, MAX_DESCRIPTION_BYTES)?;
    if let Some(imported) = &spec.imported {
        check_text("imported.objective", &imported.objective, MAX_TEXT_BYTES)?;
        // Importers give trees, and linear models from ONNX graphs only;
        // anything else is a record edited by hand.
        let native = match spec.model {
            ModelBody::Trees { .. } => true,
            ModelBody::Linear { .. } => imported.format == ImportFormat::Onnx,
            _ => false,
        };
        if !native {
            return Err(EngineError::new(
                "imported",
                "is set, but the model is neither trees nor a linear model read from an ONNX graph",
            )
            .into());
        }
    }
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
    if let Some(decision) = &spec.decision {
        check_decision(decision, link)?;
    }
    let model = build_model(&spec.model, link, spec.features.len())?;
    check_background(&spec.background, &spec.features, model.accepts_missing())?;
    let checksum = match checksum {
        Some(checksum) => checksum,
        None => spec_checksum(&spec)?,
    };
    let graph_output = match &spec.model {
        ModelBody::Onnx { output, .. } => Some(output.clone()),
        _ => None,
    };
    let ModelSpec {
        model_id,
        features,
        model: body,
        background,
        description,
        imported,
        decision,
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
            imported,
            graph_output,
            decision,
        },
        body,
        model,
        players,
        background,
        reason_codes,
        reason_statements,
    })
}

/// A probability decision needs probabilities; a threshold needs a space
/// to be read in and a finite value.
fn check_decision(decision: &Decision, link: Link) -> Result<()> {
    if decision.space == Some(Space::Probability) && link != Link::Logistic {
        return Err(EngineError::new(
            "decision.space",
            "is DECISION_SPACE_PROBABILITY, but the model has the identity link; register it with LINK_LOGISTIC or take the decision on the output",
        )
        .into());
    }
    if let Some(threshold) = decision.threshold {
        if decision.space.is_none() {
            return Err(EngineError::new(
                "decision.threshold",
                "needs decision.space: say whether the threshold is on the output or the probability",
            )
            .into());
        }
        if !threshold.is_finite() {
            return Err(EngineError::new(
                "decision.threshold",
                format!("must be finite; got {threshold}"),
            )
            .into());
        }
    }
    Ok(())
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
                let tree = tree.clone().into_tree(inputs).map_err(|error| {
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
pub(super) fn check_outputs(model: &dyn Model, background: ArrayView2<'_, f64>) -> Result<()> {
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
pub(super) fn measure_row_cost(model: &dyn Model, rows: ArrayView2<'_, f64>) -> f64 {
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
