//! LightGBM's text model (what `save_model` writes), as LightGBM's
//! documentation and its model file reader (`Tree::Tree(const char*)` in
//! `src/io/tree.cpp`, decisions in `include/LightGBM/tree.h`) define it: a
//! header of `key=value` lines, then `Tree=k` blocks, then `end of trees`.

use std::collections::HashMap;

use super::{ImportedTrees, SourceNode, Split, build_tree, choose_class, negate, next_up};
use crate::engine::error::{EngineError, Result};
use crate::model::Link;
use crate::model::TreeBody;

const FIELD: &str = "lightgbm_text";

/// LightGBM's `kZeroThreshold` (a float, 1e-35f): under missing type Zero,
/// |x| ≤ this counts as zero, hence as missing.
const ZERO_THRESHOLD: f64 = 1e-35f32 as f64;

fn refuse(message: impl Into<String>) -> EngineError {
    EngineError::new(FIELD, message)
}

/// Reads a LightGBM text model into native trees giving the raw score of
/// `class_index` (see [`super::choose_class`] for the default).
pub fn lightgbm_text(bytes: &[u8], class_index: Option<u32>) -> Result<ImportedTrees> {
    let text = std::str::from_utf8(bytes).map_err(|e| {
        refuse(format!(
            "is not UTF-8 text ({e}); send the file `save_model` wrote"
        ))
    })?;
    let mut lines = text.lines().map(str::trim_end);
    if lines.next().map(str::trim) != Some("tree") {
        return Err(refuse(
            "does not start with the line `tree`; send the text file LightGBM's `save_model` writes",
        ));
    }
    let mut header = HashMap::new();
    let mut blocks: Vec<HashMap<&str, &str>> = Vec::new();
    let mut ended = false;
    for line in lines.by_ref() {
        if line == "end of trees" {
            ended = true;
            break;
        }
        if let Some(index) = line.strip_prefix("Tree=") {
            if index.parse::<usize>() != Ok(blocks.len()) {
                return Err(refuse(format!(
                    "has `Tree={index}` where tree {} was expected",
                    blocks.len()
                )));
            }
            blocks.push(HashMap::new());
        } else if !line.is_empty() {
            // Flags such as `average_output` stand alone, without `=`.
            let (key, value) = line.split_once('=').unwrap_or((line, ""));
            match blocks.last_mut() {
                Some(block) => block.insert(key, value),
                None => header.insert(key, value),
            };
        }
    }
    if !ended {
        return Err(refuse(format!(
            "has no `end of trees` line after {} trees; the file is truncated",
            blocks.len()
        )));
    }
    let get = |key: &str| {
        header
            .get(key)
            .copied()
            .ok_or_else(|| refuse(format!("has no `{key}=` line in its header")))
    };
    let number = |key: &str| -> Result<usize> {
        get(key)?.trim().parse::<usize>().map_err(|_| {
            refuse(format!(
                "header `{key}` is `{}`, not a count",
                get(key).unwrap_or("")
            ))
        })
    };
    let declared = get("tree_sizes")?.split_whitespace().count();
    if declared != blocks.len() {
        return Err(refuse(format!(
            "declares {declared} trees (tree_sizes) but holds {}; the file is truncated or damaged",
            blocks.len()
        )));
    }
    if header.contains_key("average_output") {
        return Err(refuse(
            "averages its trees (random-forest mode, `average_output`); only boosted sums are imported",
        ));
    }
    let objective = get("objective")?.trim().to_string();
    let mut words = objective.split_whitespace();
    let name = words.next().unwrap_or("");
    let options: Vec<&str> = words.collect();
    let classes = number("num_class")?;
    let per_iteration = number("num_tree_per_iteration")?;
    let (link, outputs) = match (name, options.as_slice()) {
        ("binary", ["sigmoid:1"]) => (Link::Logistic, 2),
        ("regression", []) => (Link::Identity, 1),
        ("multiclass", [option]) if *option == format!("num_class:{classes}") && classes >= 2 => {
            (Link::Identity, classes)
        }
        _ => {
            return Err(refuse(format!(
                "has the objective `{objective}`; imported are `binary sigmoid:1`, `regression` (squared error) and `multiclass`"
            )));
        }
    };
    let groups = if outputs > 2 { outputs } else { 1 };
    if per_iteration != groups || !blocks.len().is_multiple_of(groups) {
        return Err(refuse(format!(
            "has {per_iteration} trees per iteration and {} trees for {groups} output groups",
            blocks.len()
        )));
    }
    let class = choose_class(class_index, outputs, &objective)?;
    let group = if outputs > 2 { class as usize } else { 0 };
    let inputs = number("max_feature_idx")? + 1;
    let feature_names: Vec<String> = get("feature_names")?
        .split_whitespace()
        .map(str::to_string)
        .collect();
    if feature_names.len() != inputs {
        return Err(refuse(format!(
            "names {} features but max_feature_idx is {}",
            feature_names.len(),
            inputs - 1
        )));
    }

    let mut trees: Vec<TreeBody> = blocks
        .iter()
        .enumerate()
        // Multi-class trees are interleaved: tree t belongs to class t mod k.
        .filter(|(t, _)| t % groups == group)
        .map(|(t, block)| read_tree(t, block, inputs))
        .collect::<Result<_>>()?;
    if trees.is_empty() {
        return Err(refuse(format!("has no tree for class {class}")));
    }
    // Leaf values already hold the shrinkage and the initial score.
    let mut base_score = 0.0;
    if link == Link::Logistic && class == 0 {
        negate(&mut trees, &mut base_score);
    }
    Ok(ImportedTrees {
        trees,
        base_score,
        link,
        feature_names,
        objective,
        class_index: class,
    })
}

/// Missing types, bits 2–3 of `decision_type` (LightGBM's `MissingType`).
#[derive(Debug, Clone, Copy, PartialEq)]
enum Missing {
    None,
    Zero,
    NaN,
}

fn read_tree(t: usize, block: &HashMap<&str, &str>, inputs: usize) -> Result<TreeBody> {
    let key = |k: &str| {
        block
            .get(k)
            .copied()
            .ok_or_else(|| refuse(format!("tree {t} has no `{k}=` line")))
    };
    let parse_all = |k: &str| -> Result<Vec<f64>> {
        key(k)?
            .split_whitespace()
            .map(|v| {
                v.parse::<f64>()
                    .map_err(|_| refuse(format!("tree {t} `{k}` holds `{v}`, not a number")))
            })
            .collect()
    };
    let ints = |k: &str| -> Result<Vec<i64>> {
        key(k)?
            .split_whitespace()
            .map(|v| {
                v.parse::<i64>()
                    .map_err(|_| refuse(format!("tree {t} `{k}` holds `{v}`, not an integer")))
            })
            .collect()
    };
    let leaves = key("num_leaves")?
        .parse::<usize>()
        .ok()
        .filter(|n| *n >= 1)
        .ok_or_else(|| refuse(format!("tree {t} has num_leaves `{}`", block["num_leaves"])))?;
    if block.get("num_cat").is_some_and(|n| *n != "0") {
        return Err(refuse(format!(
            "tree {t} has categorical splits (num_cat {}); categorical splits are not imported",
            block["num_cat"]
        )));
    }
    if block.get("is_linear").is_some_and(|n| *n != "0") {
        return Err(refuse(format!(
            "tree {t} is a linear tree (is_linear {}); linear-tree leaves are not imported",
            block["is_linear"]
        )));
    }
    let leaf_value = parse_all("leaf_value")?;
    if leaf_value.len() != leaves {
        return Err(refuse(format!(
            "tree {t} has {} leaf values for {leaves} leaves",
            leaf_value.len()
        )));
    }
    if leaves == 1 {
        // A one-leaf tree has no split arrays.
        return build_tree(FIELD, t, 1, 0, |_| Ok(SourceNode::Leaf(leaf_value[0])));
    }
    let inner = leaves - 1;
    let feature = ints("split_feature")?;
    let threshold = parse_all("threshold")?;
    let decision = ints("decision_type")?;
    let left = ints("left_child")?;
    let right = ints("right_child")?;
    for (k, len) in [
        ("split_feature", feature.len()),
        ("threshold", threshold.len()),
        ("decision_type", decision.len()),
        ("left_child", left.len()),
        ("right_child", right.len()),
    ] {
        if len != inner {
            return Err(refuse(format!(
                "tree {t} `{k}` has {len} entries for {inner} inner nodes"
            )));
        }
    }
    // Source indices: inner nodes 0..inner, then leaf j at inner + j.
    let child = |node: usize, c: i64| -> Result<usize> {
        if c >= 0 && (c as usize) < inner {
            Ok(c as usize)
        } else if c < 0 && ((!c) as usize) < leaves {
            Ok(inner + (!c) as usize)
        } else {
            Err(refuse(format!(
                "tree {t} node {node} has child {c}, out of range"
            )))
        }
    };
    build_tree(FIELD, t, inner + leaves, 0, |node| {
        if node >= inner {
            return Ok(SourceNode::Leaf(leaf_value[node - inner]));
        }
        let d = decision[node];
        if d & 1 != 0 {
            return Err(refuse(format!(
                "tree {t} node {node} is a categorical split (decision_type {d}); categorical splits are not imported"
            )));
        }
        let missing = match (d >> 2) & 3 {
            0 => Missing::None,
            1 => Missing::Zero,
            2 => Missing::NaN,
            other => {
                return Err(refuse(format!(
                    "tree {t} node {node} has the unknown missing type {other} (decision_type {d})"
                )));
            }
        };
        let f = feature[node];
        if f < 0 || f as usize >= inputs {
            return Err(refuse(format!(
                "tree {t} node {node} splits on feature {f} of {inputs}"
            )));
        }
        if threshold[node].is_nan() {
            return Err(refuse(format!(
                "tree {t} node {node} has the threshold {}",
                threshold[node]
            )));
        }
        let (l, r) = (child(node, left[node])?, child(node, right[node])?);
        Ok(SourceNode::Split(split(
            f as i32,
            threshold[node],
            missing,
            d & 2 != 0,
            l,
            r,
        )))
    })
}

/// LightGBM's numerical decision (`Tree::NumericalDecision`): a NaN under
/// missing types None and Zero becomes 0.0; under Zero, |x| ≤ kZeroThreshold
/// goes the default way, and under NaN a NaN does; otherwise `x <= t` goes
/// left.
fn split(feature: i32, t: f64, missing: Missing, default_left: bool, l: usize, r: usize) -> Split {
    // `x <= t` is `x < next_up(t)`; for t = +inf every number goes left.
    let below = (t != f64::INFINITY).then(|| next_up(t));
    let compared = |x: f64| match below {
        Some(bound) if x >= bound => r,
        _ => l,
    };
    let default = if default_left { l } else { r };
    let band_end = next_up(ZERO_THRESHOLD);
    let goes = |x: f64| {
        if missing == Missing::Zero && (-ZERO_THRESHOLD..band_end).contains(&x) {
            default
        } else {
            compared(x)
        }
    };
    let mut bounds: Vec<f64> = below.into_iter().collect();
    if missing == Missing::Zero {
        bounds.extend([-ZERO_THRESHOLD, band_end]);
    }
    bounds.sort_by(f64::total_cmp);
    bounds.dedup();
    // The decision is constant between consecutive bounds, so it is read at
    // each region's lower end and equal neighbours are merged.
    let mut pieces: Vec<(f64, usize)> = Vec::new();
    let mut lower = f64::NEG_INFINITY;
    for &bound in &bounds {
        let child = goes(lower);
        match pieces.last_mut() {
            Some(last) if last.1 == child => last.0 = bound,
            _ => pieces.push((bound, child)),
        }
        lower = bound;
    }
    let last = goes(lower);
    while pieces.last().is_some_and(|p| p.1 == last) {
        pieces.pop();
    }
    let missing = match missing {
        // The default-left bit is ignored: NaN is compared as 0.0.
        Missing::None => compared(0.0),
        Missing::Zero | Missing::NaN => default,
    };
    Split {
        feature,
        pieces,
        last,
        missing,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// LightGBM's decision written out from `Tree::NumericalDecision`
    /// (include/LightGBM/tree.h), the reference the native pieces must match.
    fn lightgbm_goes_left(x: f64, t: f64, missing: Missing, default_left: bool) -> bool {
        let mut x = x;
        if x.is_nan() && missing != Missing::NaN {
            x = 0.0;
        }
        let is_zero = (-ZERO_THRESHOLD..=ZERO_THRESHOLD).contains(&x);
        if (missing == Missing::Zero && is_zero) || (missing == Missing::NaN && x.is_nan()) {
            return default_left;
        }
        x <= t
    }

    fn native_goes_left(split: &Split, x: f64) -> bool {
        let child = if x.is_nan() {
            split.missing
        } else {
            split
                .pieces
                .iter()
                .find(|p| x < p.0)
                .map_or(split.last, |p| p.1)
        };
        child == 0
    }

    #[test]
    fn every_missing_type_decides_as_lightgbm_at_every_edge() {
        let thresholds = [
            f64::INFINITY,
            f64::NEG_INFINITY,
            f64::MAX,
            -1.5,
            -ZERO_THRESHOLD,
            -1e-40,
            0.0,
            1e-40,
            ZERO_THRESHOLD,
            0.25,
            3.0,
        ];
        for t in thresholds {
            for missing in [Missing::None, Missing::Zero, Missing::NaN] {
                for default_left in [false, true] {
                    let s = split(0, t, missing, default_left, 0, 1);
                    let mut probes = vec![f64::NAN, 0.0, -0.0, f64::INFINITY, f64::NEG_INFINITY];
                    for edge in [t, ZERO_THRESHOLD, -ZERO_THRESHOLD, 0.0, 1.0, -1.0] {
                        probes.extend([edge, next_up(edge), -next_up(-edge)]);
                    }
                    for x in probes {
                        assert_eq!(
                            native_goes_left(&s, x),
                            lightgbm_goes_left(x, t, missing, default_left),
                            "t {t:e} {missing:?} default_left {default_left} x {x:e}"
                        );
                    }
                }
            }
        }
    }
}
