//! Additive tree ensembles, the structure the exact tree algorithm reads: output = base_score + Σ tree(x), with an
//! identity or logistic link. Nodes are stored as parallel arrays; node 0 is
//! the root, `x[feature] < threshold` goes left, NaN goes the node's missing
//! direction, and a leaf has `left = right = -1`.

use ndarray::{ArrayView1, ArrayView2};

use super::model::{Link, Model, Structure};
use crate::engine::error::{EngineError, Result};

/// One regression tree. Construct with [`Tree::try_new`], which checks that
/// the arrays agree, indices are in range and every node is reached once
/// from the root (so the tree is acyclic).
#[derive(Debug, Clone, PartialEq)]
pub struct Tree {
    feature: Vec<usize>,
    threshold: Vec<f64>,
    left: Vec<i32>,
    right: Vec<i32>,
    value: Vec<f64>,
    missing_left: Vec<bool>,
}

impl Tree {
    /// `value` is read at leaves only; `feature` and `threshold` at inner
    /// nodes only. `missing_left` may be empty (NaN then goes left).
    pub fn try_new(
        feature: Vec<i32>,
        threshold: Vec<f64>,
        left: Vec<i32>,
        right: Vec<i32>,
        value: Vec<f64>,
        missing_left: Vec<bool>,
        inputs: usize,
    ) -> Result<Tree> {
        let nodes = left.len();
        let field = |name: &str| format!("trees.{name}");
        if nodes == 0 {
            return Err(EngineError::new(
                field("left"),
                "a tree needs at least one node",
            ));
        }
        for (name, len) in [
            ("feature", feature.len()),
            ("threshold", threshold.len()),
            ("right", right.len()),
            ("value", value.len()),
        ] {
            if len != nodes {
                return Err(EngineError::new(
                    field(name),
                    format!("has {len} entries; `left` has {nodes}"),
                ));
            }
        }
        if !missing_left.is_empty() && missing_left.len() != nodes {
            return Err(EngineError::new(
                field("missing_left"),
                format!(
                    "has {} entries; give none or one per node ({nodes})",
                    missing_left.len()
                ),
            ));
        }
        let mut reached = vec![false; nodes];
        let mut stack = vec![0usize];
        reached[0] = true;
        let mut features = Vec::with_capacity(nodes);
        while let Some(node) = stack.pop() {
            let (l, r) = (left[node], right[node]);
            if l == -1 && r == -1 {
                if !value[node].is_finite() {
                    return Err(EngineError::new(
                        field("value"),
                        format!("leaf {node} has a value that is not finite"),
                    ));
                }
                continue;
            }
            if feature[node] < 0 || feature[node] as usize >= inputs {
                return Err(EngineError::new(
                    field("feature"),
                    format!(
                        "node {node} splits on feature {} of {inputs}",
                        feature[node]
                    ),
                ));
            }
            if threshold[node].is_nan() {
                return Err(EngineError::new(
                    field("threshold"),
                    format!("node {node} has a NaN threshold"),
                ));
            }
            for child in [l, r] {
                if child < 0 || child as usize >= nodes {
                    return Err(EngineError::new(
                        field("left"),
                        format!(
                            "node {node} has child {child}, outside 0..{nodes} (-1 on both sides marks a leaf)"
                        ),
                    ));
                }
                if std::mem::replace(&mut reached[child as usize], true) {
                    return Err(EngineError::new(
                        field("left"),
                        format!(
                            "node {child} is reached twice; trees must not share or cycle nodes"
                        ),
                    ));
                }
                stack.push(child as usize);
            }
        }
        if let Some(node) = reached.iter().position(|r| !r) {
            return Err(EngineError::new(
                field("left"),
                format!("node {node} is not reachable from the root"),
            ));
        }
        for (node, f) in feature.iter().enumerate() {
            features.push(if left[node] == -1 { 0 } else { *f as usize });
        }
        let missing_left = if missing_left.is_empty() {
            vec![true; nodes]
        } else {
            missing_left
        };
        Ok(Tree {
            feature: features,
            threshold,
            left,
            right,
            value,
            missing_left,
        })
    }

    pub fn nodes(&self) -> usize {
        self.left.len()
    }

    pub fn is_leaf(&self, node: usize) -> bool {
        self.left[node] == -1
    }

    pub fn feature(&self, node: usize) -> usize {
        self.feature[node]
    }

    pub fn threshold(&self, node: usize) -> f64 {
        self.threshold[node]
    }

    pub fn left(&self, node: usize) -> usize {
        self.left[node] as usize
    }

    pub fn right(&self, node: usize) -> usize {
        self.right[node] as usize
    }

    pub fn value(&self, node: usize) -> f64 {
        self.value[node]
    }

    pub fn missing_left(&self, node: usize) -> bool {
        self.missing_left[node]
    }

    /// Whether a row with value `x` at this inner node's feature goes left.
    pub fn goes_left(&self, node: usize, x: f64) -> bool {
        if x.is_nan() {
            self.missing_left[node]
        } else {
            x < self.threshold[node]
        }
    }

    /// The leaf value `row` reaches.
    pub fn predict(&self, row: ArrayView1<'_, f64>) -> f64 {
        let mut node = 0;
        while !self.is_leaf(node) {
            node = if self.goes_left(node, row[self.feature[node]]) {
                self.left(node)
            } else {
                self.right(node)
            };
        }
        self.value[node]
    }

    /// Deepest root-to-leaf path, in edges.
    pub fn depth(&self) -> usize {
        fn below(tree: &Tree, node: usize) -> usize {
            if tree.is_leaf(node) {
                0
            } else {
                1 + below(tree, tree.left(node)).max(below(tree, tree.right(node)))
            }
        }
        below(self, 0)
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct TreeEnsemble {
    trees: Vec<Tree>,
    base_score: f64,
    link: Link,
    inputs: usize,
}

impl TreeEnsemble {
    pub fn try_new(
        trees: Vec<Tree>,
        base_score: f64,
        link: Link,
        inputs: usize,
    ) -> Result<TreeEnsemble> {
        if trees.is_empty() {
            return Err(EngineError::new(
                "trees.trees",
                "an ensemble needs at least one tree",
            ));
        }
        if !base_score.is_finite() {
            return Err(EngineError::new(
                "trees.base_score",
                "must be a finite number",
            ));
        }
        if let Some(t) = trees.iter().position(|t| {
            t.feature
                .iter()
                .zip(&t.left)
                .any(|(f, l)| *l != -1 && *f >= inputs)
        }) {
            return Err(EngineError::new(
                "trees.feature",
                format!("tree {t} splits on a feature beyond the model's {inputs} inputs"),
            ));
        }
        Ok(TreeEnsemble {
            trees,
            base_score,
            link,
            inputs,
        })
    }

    pub fn trees(&self) -> &[Tree] {
        &self.trees
    }

    pub fn base_score(&self) -> f64 {
        self.base_score
    }
}

impl Model for TreeEnsemble {
    fn inputs(&self) -> usize {
        self.inputs
    }

    fn link(&self) -> Link {
        self.link
    }

    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        for (row, slot) in rows.rows().into_iter().zip(out.iter_mut()) {
            *slot = self.base_score + self.trees.iter().map(|t| t.predict(row)).sum::<f64>();
        }
    }

    fn accepts_missing(&self) -> bool {
        true
    }

    fn structure(&self) -> Structure<'_> {
        Structure::Trees(self)
    }

    fn kind(&self) -> &'static str {
        "trees"
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    /// A stump on feature 0 at 0.5 (NaN right) whose right child splits on
    /// feature 1 at 2.0 (NaN left).
    fn small_tree() -> Tree {
        Tree::try_new(
            vec![0, -1, 1, -1, -1],
            vec![0.5, 0.0, 2.0, 0.0, 0.0],
            vec![1, -1, 3, -1, -1],
            vec![2, -1, 4, -1, -1],
            vec![0.0, 1.0, 0.0, 2.0, 3.0],
            vec![false, false, true, false, false],
            2,
        )
        .unwrap()
    }

    #[test]
    fn rows_follow_thresholds_and_missing_directions() {
        let model = TreeEnsemble::try_new(vec![small_tree()], 10.0, Link::Identity, 2).unwrap();
        let rows = array![[0.1, 9.0], [0.5, 1.0], [0.7, 2.0], [f64::NAN, f64::NAN]];
        let mut out = [0.0; 4];
        model.predict(rows.view(), &mut out);
        // Hand-traced: strict `<` goes left, so 0.5 and 2.0 go right.
        assert_eq!(out, [11.0, 12.0, 13.0, 12.0]);
        assert_eq!(small_tree().depth(), 2);
    }

    #[test]
    fn malformed_trees_are_refused() {
        let cycle = Tree::try_new(
            vec![0, 0],
            vec![0.0, 0.0],
            vec![1, 0],
            vec![1, 0],
            vec![0.0, 0.0],
            vec![],
            1,
        );
        assert_eq!(cycle.unwrap_err().field, "trees.left");
        let out_of_range = Tree::try_new(
            vec![3, -1, -1],
            vec![0.0; 3],
            vec![1, -1, -1],
            vec![2, -1, -1],
            vec![0.0; 3],
            vec![],
            2,
        );
        assert_eq!(out_of_range.unwrap_err().field, "trees.feature");
    }
}
