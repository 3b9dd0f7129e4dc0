//! One regression tree as it is written down: parallel node arrays, the
//! form model files, the API and the registry's records share. The engine
//! checks and compiles it into its own [`Tree`].

use serde::{Deserialize, Serialize};

use crate::engine::error::Result;
use crate::engine::trees::Tree;

/// One regression tree as parallel node arrays (see [`Tree::try_new`]).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct TreeBody {
    pub feature: Vec<i32>,
    pub threshold: Vec<f64>,
    pub left: Vec<i32>,
    pub right: Vec<i32>,
    pub value: Vec<f64>,
    /// Empty means NaN goes left at every node.
    pub missing_left: Vec<bool>,
}

impl TreeBody {
    /// The checked native tree over `inputs` features.
    pub fn into_tree(self, inputs: usize) -> Result<Tree> {
        Tree::try_new(
            self.feature,
            self.threshold,
            self.left,
            self.right,
            self.value,
            self.missing_left,
            inputs,
        )
    }
}

/// The node arrays of a native tree; a leaf's feature is written as -1.
impl From<&Tree> for TreeBody {
    fn from(tree: &Tree) -> TreeBody {
        let nodes = 0..tree.nodes();
        let split = |node: usize, index: usize| {
            if tree.is_leaf(node) { -1 } else { index as i32 }
        };
        TreeBody {
            feature: nodes.clone().map(|n| split(n, tree.feature(n))).collect(),
            threshold: nodes.clone().map(|n| tree.threshold(n)).collect(),
            left: nodes.clone().map(|n| split(n, tree.left(n))).collect(),
            right: nodes.clone().map(|n| split(n, tree.right(n))).collect(),
            value: nodes.clone().map(|n| tree.value(n)).collect(),
            missing_left: nodes.map(|n| tree.missing_left(n)).collect(),
        }
    }
}
