//! The model kinds the service registers, each implementing the engine's
//! [`Model`] interface: linear models here, ONNX graphs in the graph runtime
//! (feature `onnx`). Tree ensembles are the engine's own structure
//! ([`crate::engine::trees`]), since the exact tree algorithm reads their
//! nodes; they are re-exported here beside the other kinds. [`import`] reads
//! XGBoost and LightGBM files into that native form.

pub mod import;
mod linear;
mod nodes;
#[cfg(feature = "onnx")]
mod onnx;

pub use crate::engine::model::{LinearForm, Link, Model, Structure, logistic};
pub use crate::engine::trees::{Tree, TreeEnsemble};
pub use linear::LinearModel;
pub use nodes::TreeBody;
#[cfg(feature = "onnx")]
pub use onnx::OnnxModel;
