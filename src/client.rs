//! The thin gRPC client behind `apportion register`, `apportion models` and
//! `apportion explain`: reads model files and instances (CSV or JSON lines)
//! and writes one JSON object per answer, for scripts and operators.

use std::path::{Path, PathBuf};

use serde::Deserialize;
use serde_json::{Value, json};
use tonic::transport::Channel;

use crate::service::proto::{
    self, attributions_client::AttributionsClient, registry_client::RegistryClient,
};

pub type Failure = Box<dyn std::error::Error + Send + Sync>;

async fn connect(address: &str) -> Result<Channel, Failure> {
    let endpoint = if address.contains("://") {
        address.to_string()
    } else {
        format!("http://{address}")
    };
    Ok(Channel::from_shared(endpoint)?.connect().await?)
}

/// What `models` and `register` print about one model version.
fn info_json(m: &proto::ModelInfo) -> Value {
    let mut info = json!({
        "model_id": m.model_id,
        "version": m.version,
        "model_kind": m.model_kind,
        "features": m.features.iter().map(|f| &f.name).collect::<Vec<_>>(),
        "background_rows": m.background_rows,
        "row_cost_ns": m.row_cost_ns,
        "registered_unix_ms": m.registered_unix_ms,
        "checksum": m.checksum,
    });
    // Only imported models say where they came from, so native ones print
    // as before.
    if !m.import_format.is_empty() {
        info["import_format"] = json!(m.import_format);
        info["import_objective"] = json!(m.import_objective);
        info["import_class_index"] = json!(m.import_class_index);
    }
    if !m.import_output.is_empty() {
        info["import_output"] = json!(m.import_output);
    }
    info
}

/// Every registered model version, one JSON object each.
pub async fn models(address: &str) -> Result<Vec<Value>, Failure> {
    let mut registry = RegistryClient::new(connect(address).await?);
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await?
        .into_inner();
    Ok(listed.models.iter().map(info_json).collect())
}

/// A model file for `apportion register`: one JSON object.
///
/// ```json
/// { "model_id": "screening", "description": "…", "link": "logistic",
///   "features": [{ "name": "income", "group": "", "reason_code": "R01",
///                  "reason_text": "Income is low for the rent" }, …],
///   "model": { "kind": "linear", "weights": [0.8, …], "intercept": -1.2 },
///   "background": [[3100.0, …], [2400.0, null, …]] }
/// ```
///
/// `model` may instead be `{ "kind": "trees", "base_score": 0.0, "trees":
/// [{ "feature", "threshold", "left", "right", "value", "missing_left" }] }`
/// with the node arrays of the API's `Tree` message, or `{ "kind": "onnx",
/// "path": "model.onnx", "output": "probabilities", "column": 1,
/// "class_index": 1 }` (all but the path optional; path
/// relative to the model file; output and column as in the API), or
/// `{ "kind": "xgboost", "path": "model.json", "class_index": 2 }` (the JSON
/// XGBoost's `save_model` writes) or `{ "kind": "lightgbm", "path":
/// "model.txt" }` (LightGBM's `save_model` text), whose `class_index` is
/// optional and whose `features` may be left out to take the file's names.
/// `link` defaults to `identity` (for those two: as the objective says); `group`, `reason_code`, `reason_text` and `description` may
/// be left out; `background` may be left out when a background file is
/// given. Rows are arrays of numbers, `null` for a missing value.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelFile {
    #[serde(default)]
    pub model_id: String,
    #[serde(default)]
    pub description: String,
    #[serde(default = "identity")]
    pub link: String,
    #[serde(default)]
    pub features: Vec<FeatureEntry>,
    pub model: ModelEntry,
    #[serde(default)]
    pub background: Option<Vec<Vec<Option<f64>>>>,
    /// `{ "favourable": "higher" | "lower", "space": "output" |
    /// "probability", "threshold": 0.2 }`, every member optional.
    #[serde(default)]
    pub decision: Option<DecisionEntry>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DecisionEntry {
    #[serde(default)]
    pub favourable: Option<String>,
    #[serde(default)]
    pub space: Option<String>,
    #[serde(default)]
    pub threshold: Option<f64>,
}

impl DecisionEntry {
    fn to_proto(&self) -> Result<proto::Decision, Failure> {
        let favourable = match self.favourable.as_deref() {
            None => proto::Favourable::Unspecified,
            Some("higher") => proto::Favourable::Higher,
            Some("lower") => proto::Favourable::Lower,
            Some(other) => {
                return Err(format!(
                    "decision.favourable: unknown direction {other:?}; use higher or lower"
                )
                .into());
            }
        };
        let space = match self.space.as_deref() {
            None => proto::DecisionSpace::Unspecified,
            Some("output") => proto::DecisionSpace::Output,
            Some("probability") => proto::DecisionSpace::Probability,
            Some(other) => {
                return Err(format!(
                    "decision.space: unknown space {other:?}; use output or probability"
                )
                .into());
            }
        };
        Ok(proto::Decision {
            favourable: favourable as i32,
            space: space as i32,
            threshold: self.threshold,
        })
    }
}

fn identity() -> String {
    "identity".into()
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureEntry {
    pub name: String,
    #[serde(default)]
    pub group: String,
    #[serde(default)]
    pub reason_code: String,
    #[serde(default)]
    pub reason_text: String,
}

#[derive(Debug, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum ModelEntry {
    Linear {
        weights: Vec<f64>,
        intercept: f64,
    },
    Trees {
        trees: Vec<TreeEntry>,
        #[serde(default)]
        base_score: f64,
    },
    /// An ONNX file, its path relative to the model file.
    Onnx {
        path: PathBuf,
        #[serde(default)]
        output: String,
        #[serde(default)]
        column: u32,
        #[serde(default)]
        class_index: Option<u32>,
    },
    /// An XGBoost JSON model file, its path relative to the model file.
    Xgboost {
        path: PathBuf,
        #[serde(default)]
        class_index: Option<u32>,
    },
    /// A LightGBM text model file, its path relative to the model file.
    Lightgbm {
        path: PathBuf,
        #[serde(default)]
        class_index: Option<u32>,
    },
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TreeEntry {
    pub feature: Vec<i32>,
    pub threshold: Vec<f64>,
    pub left: Vec<i32>,
    pub right: Vec<i32>,
    pub value: Vec<f64>,
    #[serde(default)]
    pub missing_left: Vec<bool>,
}

/// What `apportion register` sends: the model file, its `model_id`
/// replaced when `model_id` is given, its background replaced by the rows
/// of `background` when that is given. The server validates the rest.
pub fn registration(
    model_file: &Path,
    background: Option<&Path>,
    model_id: Option<&str>,
) -> Result<proto::RegisterModelRequest, Failure> {
    let text = std::fs::read_to_string(model_file)
        .map_err(|e| format!("{}: cannot read: {e}", model_file.display()))?;
    let file: ModelFile = serde_json::from_str(&text)
        .map_err(|e| format!("{}: not a model file: {e}", model_file.display()))?;
    let rows = match (background, file.background) {
        (Some(path), _) => read_instances(path)?,
        (None, Some(rows)) => rows
            .into_iter()
            .map(|row| row.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect())
            .collect(),
        (None, None) => {
            return Err(format!(
                "{}: has no \"background\"; add one or pass --background",
                model_file.display()
            )
            .into());
        }
    };
    // An imported model may leave its features to the file; the server
    // checks the background's width against it then.
    let cols = if file.features.is_empty() {
        rows.first().map_or(0, Vec::len)
    } else {
        file.features.len()
    };
    if let Some((at, row)) = rows.iter().enumerate().find(|(_, row)| row.len() != cols) {
        return Err(format!(
            "background row {}: has {} values for {cols} features",
            at + 1,
            row.len()
        )
        .into());
    }
    let link = proto::Link::from_str_name(&format!("LINK_{}", file.link.to_uppercase()))
        .ok_or_else(|| {
            format!(
                "link: unknown link {:?}; use identity or logistic",
                file.link
            )
        })?;
    let (mut onnx_output, mut onnx_output_column) = (String::new(), 0);
    let mut class_index = None;
    let beside = |path: PathBuf| -> Result<Vec<u8>, Failure> {
        let path = model_file.parent().unwrap_or(Path::new("")).join(path);
        std::fs::read(&path).map_err(|e| format!("{}: cannot read: {e}", path.display()).into())
    };
    let model = match file.model {
        ModelEntry::Xgboost {
            path,
            class_index: class,
        } => {
            class_index = class;
            proto::register_model_request::Model::XgboostJson(beside(path)?)
        }
        ModelEntry::Lightgbm {
            path,
            class_index: class,
        } => {
            class_index = class;
            proto::register_model_request::Model::LightgbmText(beside(path)?)
        }
        ModelEntry::Onnx {
            path,
            output,
            column,
            class_index: class,
        } => {
            (onnx_output, onnx_output_column) = (output, column);
            class_index = class;
            proto::register_model_request::Model::Onnx(beside(path)?)
        }
        ModelEntry::Linear { weights, intercept } => {
            proto::register_model_request::Model::Linear(proto::LinearModel { weights, intercept })
        }
        ModelEntry::Trees { trees, base_score } => {
            proto::register_model_request::Model::Trees(proto::TreeEnsemble {
                trees: trees
                    .into_iter()
                    .map(|t| proto::Tree {
                        feature: t.feature,
                        threshold: t.threshold,
                        left: t.left,
                        right: t.right,
                        value: t.value,
                        missing_left: t.missing_left,
                    })
                    .collect(),
                base_score,
            })
        }
    };
    let too_many = |_| {
        format!(
            "background: {} rows are more than a request can carry",
            rows.len()
        )
    };
    let matrix_rows = u32::try_from(rows.len()).map_err(too_many)?;
    Ok(proto::RegisterModelRequest {
        model_id: model_id.map_or(file.model_id, str::to_string),
        features: file
            .features
            .into_iter()
            .map(|f| proto::Feature {
                name: f.name,
                group: f.group,
                reason_code: f.reason_code,
                reason_text: f.reason_text,
            })
            .collect(),
        model: Some(model),
        link: link as i32,
        background: Some(proto::Matrix {
            rows: matrix_rows,
            cols: u32::try_from(cols).map_err(|_| "features: too many")?,
            values: rows.into_iter().flatten().collect(),
        }),
        description: file.description,
        onnx_output,
        onnx_output_column,
        class_index,
        decision: file
            .decision
            .as_ref()
            .map(DecisionEntry::to_proto)
            .transpose()?,
    })
}

/// Registers one model version; the answer is what `models` prints of it.
pub async fn register(
    address: &str,
    request: proto::RegisterModelRequest,
) -> Result<Vec<Value>, Failure> {
    let mut registry = RegistryClient::new(connect(address).await?);
    let info = registry.register_model(request).await?.into_inner();
    Ok(vec![info_json(&info)])
}

/// Explains each instance with the choices in `template` (its `instance`
/// is replaced), in order.
pub async fn explain(
    address: &str,
    template: proto::ExplainRequest,
    instances: Vec<Vec<f64>>,
) -> Result<Vec<Value>, Failure> {
    let mut attributions = AttributionsClient::new(connect(address).await?);
    let mut answers = Vec::with_capacity(instances.len());
    for (line, instance) in instances.into_iter().enumerate() {
        let request = proto::ExplainRequest {
            instance,
            request_id: format!("{}-{}", template.request_id, line + 1),
            ..template.clone()
        };
        let e = attributions.explain(request).await?.into_inner();
        let estimator =
            proto::Estimator::try_from(e.estimator_used).map_or("UNKNOWN", |k| k.as_str_name());
        answers.push(json!({
            "request_id": e.request_id,
            "model_id": e.model_id,
            "version": e.version,
            "value_full": e.value_full,
            "value_empty": e.value_empty,
            "attributions": e.attributions.iter().map(|a| json!({
                "name": a.name, "value": a.value, "std_error": a.std_error,
            })).collect::<Vec<_>>(),
            "estimator": estimator,
            "plan_reason": e.plan_reason,
            "converged": e.converged,
            "coalitions_evaluated": e.coalitions_evaluated,
            "elapsed_us": e.elapsed_us,
            "reasons": e.reasons.iter().map(|r| json!({
                "name": r.name, "code": r.reason_code, "statement": r.statement, "weight": r.weight,
            })).collect::<Vec<_>>(),
        }));
    }
    Ok(answers)
}

/// Instances from `path`: JSON lines (`.jsonl`/`.json`: one array of
/// numbers per line, `null` for missing) or CSV (anything else: a header
/// line is skipped when it is not numeric; empty, `NA` and `NaN` cells are
/// missing).
pub fn read_instances(path: &Path) -> Result<Vec<Vec<f64>>, Failure> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| format!("{}: cannot read: {e}", path.display()))?;
    let json_lines = matches!(
        path.extension().and_then(|e| e.to_str()),
        Some("jsonl" | "json")
    );
    let mut rows = Vec::new();
    for (number, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let at = |why: String| format!("{}:{}: {why}", path.display(), number + 1);
        let row = if json_lines {
            let values: Vec<Option<f64>> = serde_json::from_str(line)
                .map_err(|e| at(format!("expected an array of numbers or null: {e}")))?;
            values.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect()
        } else {
            let cells: Result<Vec<f64>, String> = line
                .split(',')
                .map(|cell| match cell.trim() {
                    "" | "NA" | "NaN" | "nan" => Ok(f64::NAN),
                    number => number
                        .parse()
                        .map_err(|_| format!("{number:?} is not a number")),
                })
                .collect();
            match cells {
                Ok(values) => values,
                Err(_) if rows.is_empty() && number == 0 => continue, // a header
                Err(why) => return Err(at(why).into()),
            }
        };
        rows.push(row);
    }
    if rows.is_empty() {
        return Err(format!("{}: no instances found", path.display()).into());
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_and_json_lines_read_alike_with_missing_values() {
        // Formats as described above (common practice, no source).
        let dir = std::env::temp_dir().join(format!("apportion-client-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let csv = dir.join("rows.csv");
        std::fs::write(&csv, "income,rent\n3000,0.3\n2500,\n").unwrap();
        let jsonl = dir.join("rows.jsonl");
        std::fs::write(&jsonl, "[3000, 0.3]\n[2500, null]\n").unwrap();
        for path in [&csv, &jsonl] {
            let rows = read_instances(path).unwrap();
            assert_eq!(rows.len(), 2);
            assert_eq!(rows[0], vec![3000.0, 0.3]);
            assert!(rows[1][1].is_nan());
        }
        std::fs::write(&csv, "1,2\n3,x\n").unwrap();
        let err = read_instances(&csv).unwrap_err().to_string();
        assert!(err.contains(":2:"), "{err}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
