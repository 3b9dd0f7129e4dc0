//! Model files as modelling libraries write them (XGBoost's JSON, LightGBM's
//! text, ONNX graphs of one ai.onnx.ml tree or linear operator), read into
//! the native tree and linear forms the registry stores. Each importer
//! converts every split so that the native `x < threshold` decides as the
//! library does for every double input, and refuses what it cannot map.

mod lightgbm;
mod onnx_ml;
mod onnx_schema;
mod xgboost;

pub use lightgbm::lightgbm_text;
pub use onnx_ml::{ImportedLinear, OnnxChoice, OnnxImport, onnx_graph};
pub use xgboost::xgboost_json;

use crate::engine::error::{EngineError, Result};
use crate::model::Link;
use crate::model::TreeBody;

/// A tree ensemble read from a library's file: output = base_score + Σ tree(x)
/// is the library's raw margin (of `class_index` for a multi-class model).
#[derive(Debug, Clone, PartialEq)]
pub struct ImportedTrees {
    pub trees: Vec<TreeBody>,
    pub base_score: f64,
    /// What the objective implies for the margin.
    pub link: Link,
    /// One per input, from the file (or the library's default names).
    pub feature_names: Vec<String>,
    /// The objective as the file names it.
    pub objective: String,
    /// The class whose margin this is (0 for regression).
    pub class_index: u32,
}

/// Most native nodes one imported tree may grow into: expanding LightGBM's
/// zero-as-missing splits copies subtrees, and a file must not be able to
/// make that unbounded.
const MAX_NODES_PER_TREE: usize = 1 << 20;

/// A source node, in a form both importers produce: either a leaf, or a
/// split read as intervals of the feature's value.
pub(crate) enum SourceNode {
    Leaf(f64),
    Split(Split),
}

/// A split on `feature`: non-missing `x` goes to `pieces[i].1` for the
/// first `i` with `x < pieces[i].0` (bounds increasing; possibly none),
/// else to `last`; NaN goes to `missing`. Children are source node indices.
pub(crate) struct Split {
    pub feature: i32,
    pub pieces: Vec<(f64, usize)>,
    pub last: usize,
    pub missing: usize,
}

/// Builds one native tree from the source node `root`, visiting nodes
/// reachable from it only (files may hold unreachable nodes). A split with
/// several pieces becomes a chain of native splits, each piece a fresh copy
/// of its subtree, so every native node is reached once.
pub(crate) fn build_tree(
    field: &str,
    tree: usize,
    source_nodes: usize,
    root: usize,
    node: impl Fn(usize) -> Result<SourceNode>,
) -> Result<TreeBody> {
    let mut out = TreeBody {
        feature: Vec::new(),
        threshold: Vec::new(),
        left: Vec::new(),
        right: Vec::new(),
        value: Vec::new(),
        missing_left: Vec::new(),
    };
    // (source node, depth, where to attach it: native parent and side).
    type Pending = (usize, usize, Option<(usize, bool)>);
    let mut stack: Vec<Pending> = vec![(root, 0, None)];
    while let Some((source, depth, slot)) = stack.pop() {
        if depth > source_nodes {
            return Err(EngineError::new(
                field,
                format!("tree {tree}: node {source} is its own ancestor (the child indices cycle)"),
            ));
        }
        let first = out.left.len();
        match node(source)? {
            SourceNode::Leaf(value) => push(&mut out, -1, 0.0, value, true),
            SourceNode::Split(split) => {
                let mut pieces = split.pieces;
                if pieces.is_empty() && split.last == split.missing {
                    // Everything goes one way: no native split at all.
                    stack.push((split.last, depth + 1, slot));
                    continue;
                }
                // NaN follows the chain until the first piece that leads
                // where NaN must go. If none does (every number goes
                // elsewhere), two splits at f64::MAX end the chain: numbers
                // below it go to `last`, f64::MAX and +inf go right to
                // `last` again, and NaN alone goes left to its own child.
                // (Stored thresholds must be finite: JSON has no infinity.)
                let mut nan_stop = pieces.iter().position(|p| p.1 == split.missing);
                if nan_stop.is_none() && split.last != split.missing {
                    pieces.push((f64::MAX, split.last));
                    pieces.push((f64::MAX, split.missing));
                    nan_stop = Some(pieces.len() - 1);
                }
                if let Some(bound) = pieces.iter().map(|p| p.0).find(|b| !b.is_finite()) {
                    return Err(EngineError::new(
                        field,
                        format!(
                            "tree {tree}: node {source} needs the native threshold {bound}, which cannot be stored; \
                             thresholds at ±f64::MAX cannot be imported exactly"
                        ),
                    ));
                }
                let chain = pieces.len();
                for (i, &(bound, child)) in pieces.iter().enumerate() {
                    let native = out.left.len();
                    push(&mut out, split.feature, bound, 0.0, nan_stop == Some(i));
                    stack.push((child, depth + 1, Some((native, true))));
                    if i + 1 < chain {
                        out.right[native] = native as i32 + 1;
                    } else {
                        stack.push((split.last, depth + 1, Some((native, false))));
                    }
                }
            }
        }
        if out.left.len() > MAX_NODES_PER_TREE {
            return Err(EngineError::new(
                field,
                format!(
                    "tree {tree} grows beyond {MAX_NODES_PER_TREE} native nodes; it cannot be imported"
                ),
            ));
        }
        if let Some((parent, left)) = slot {
            let side = if left { &mut out.left } else { &mut out.right };
            side[parent] = first as i32;
        }
    }
    Ok(out)
}

/// Appends a node; an inner node's children are set when they are built.
fn push(out: &mut TreeBody, feature: i32, threshold: f64, value: f64, missing_left: bool) {
    let leaf = feature < 0;
    out.feature.push(if leaf { -1 } else { feature });
    out.threshold.push(threshold);
    out.left.push(if leaf { -1 } else { 0 });
    out.right.push(if leaf { -1 } else { 0 });
    out.value.push(value);
    out.missing_left.push(missing_left);
}

/// The class whose margin is imported: `requested`, else the positive class
/// of a binary model; required for more than two classes.
pub(crate) fn choose_class(requested: Option<u32>, classes: usize, objective: &str) -> Result<u32> {
    match (requested, classes) {
        (None, 1) => Ok(0),
        (None, 2) => Ok(1),
        (None, _) => Err(EngineError::new(
            "class_index",
            format!(
                "is required for the multi-class objective `{objective}` ({classes} classes): give the class whose margin to explain"
            ),
        )),
        (Some(k), 1) if k != 0 => Err(EngineError::new(
            "class_index",
            format!(
                "is {k}, but the objective `{objective}` has one output; give 0 or leave it unset"
            ),
        )),
        (Some(k), _) if k as usize >= classes.max(1) => Err(EngineError::new(
            "class_index",
            format!(
                "is {k}, out of range for the objective `{objective}` with {classes} classes (0..{})",
                classes - 1
            ),
        )),
        (Some(k), _) => Ok(k),
    }
}

/// Class 0 of a binary logistic model: its margin is the negated positive
/// margin (σ(−m) = 1 − σ(m)), exact in double.
pub(crate) fn negate(trees: &mut [TreeBody], base_score: &mut f64) {
    for tree in trees {
        for value in &mut tree.value {
            *value = -*value;
        }
    }
    *base_score = -*base_score;
}

/// The next double above `x` (finite `x`).
pub(crate) fn next_up(x: f64) -> f64 {
    if x == 0.0 {
        f64::from_bits(1)
    } else if x > 0.0 {
        f64::from_bits(x.to_bits() + 1)
    } else {
        f64::from_bits(x.to_bits() - 1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// IEEE 754 neighbours, checked against the standard library's own
    /// `f64::next_up` semantics written out (common practice, no source).
    #[test]
    fn next_up_steps_one_ulp() {
        assert_eq!(next_up(1.0), 1.0 + f64::EPSILON);
        assert_eq!(next_up(-0.0), f64::from_bits(1));
        assert_eq!(next_up(-f64::from_bits(1)), -0.0);
        assert!(next_up(-1.0) > -1.0 && next_up(-1.0) < -1.0 + f64::EPSILON);
    }

    #[test]
    fn class_choice_is_never_silent() {
        assert_eq!(choose_class(None, 2, "b").unwrap(), 1);
        assert_eq!(choose_class(None, 1, "r").unwrap(), 0);
        assert_eq!(choose_class(None, 3, "m").unwrap_err().field, "class_index");
        assert_eq!(
            choose_class(Some(3), 3, "m").unwrap_err().field,
            "class_index"
        );
        assert_eq!(
            choose_class(Some(1), 1, "r").unwrap_err().field,
            "class_index"
        );
        assert_eq!(choose_class(Some(2), 3, "m").unwrap(), 2);
    }
}
