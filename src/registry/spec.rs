//! A registration as submitted, in the form it is stored in: the features,
//! the model body, the link and the background. Serde types only; checking
//! them is `validate`'s job.

use serde::{Deserialize, Serialize};

use super::store;
use crate::engine::Link;
pub use crate::model::TreeBody;
pub use crate::reasons::Decision;

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

/// The library file an imported model was read from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ImportFormat {
    /// The JSON XGBoost's `save_model` writes.
    XgboostJson,
    /// The text LightGBM's `save_model` writes.
    LightgbmText,
    /// An ONNX graph of one ai.onnx.ml tree or linear operator.
    Onnx,
}

impl ImportFormat {
    /// The name the API and the record use (the proto `oneof model` field).
    pub fn as_str(self) -> &'static str {
        match self {
            ImportFormat::XgboostJson => "xgboost_json",
            ImportFormat::LightgbmText => "lightgbm_text",
            ImportFormat::Onnx => "onnx",
        }
    }
}

/// Where an imported model came from. Imported models are stored as native
/// trees, so without this nothing would say which file, objective and class
/// the stored margin stands for.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct ImportSpec {
    pub format: ImportFormat,
    /// The objective as the file names it.
    pub objective: String,
    /// The class whose margin was imported (0 for one output).
    pub class_index: u32,
    /// For a graph, the score output whose margin is explained. Empty (and
    /// then not written, so earlier records keep their bytes) otherwise.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub output: String,
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
    /// Set for a model read from a library's file. Absent, it is not written
    /// at all, so records of native models keep the bytes, and so the
    /// checksums, they had before the field existed; records written before
    /// it existed read back as native.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub imported: Option<ImportSpec>,
    /// How the model's decision is taken; absent (and then not written, so
    /// earlier records keep their bytes): higher is favourable.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decision: Option<Decision>,
}
