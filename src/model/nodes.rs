//! One regression tree as it is written down: parallel node arrays, the
//! form model files, the API and the registry's records share. The engine
//! checks and compiles it into its own [`Tree`].

use serde::{Deserialize, Serialize};

#[cfg(doc)]
use crate::engine::Tree;

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
