//! XGBoost's JSON model (what `save_model` writes to a `.json` file), as
//! described in XGBoost's documentation "Introduction to Model IO" and its
//! JSON schema (`doc/model.schema`): the learner's objective and base score,
//! and per tree the node arrays, with a leaf's value in `split_conditions`.

use serde_json::Value;

use super::{ImportedTrees, SourceNode, Split, build_tree, choose_class, negate};
use crate::engine::error::{EngineError, Result};
use crate::model::{Link, TreeBody};

const FIELD: &str = "xgboost_json";

fn refuse(message: impl Into<String>) -> EngineError {
    EngineError::new(FIELD, message)
}

/// Reads an XGBoost JSON model into native trees giving the margin of
/// `class_index` (see [`super::choose_class`] for the default).
pub fn xgboost_json(bytes: &[u8], class_index: Option<u32>) -> Result<ImportedTrees> {
    let root: Value = serde_json::from_slice(bytes).map_err(|e| {
        refuse(format!(
            "is not JSON ({e}); save the model with a `.json` file name (the binary UBJSON form is not read)"
        ))
    })?;
    let learner = &root["learner"];
    let objective = text(&learner["objective"]["name"], "learner.objective.name")?.to_string();
    let param = &learner["learner_model_param"];
    let inputs = count(&param["num_feature"], "learner_model_param.num_feature")?;
    let classes = count(&param["num_class"], "learner_model_param.num_class")?;
    if let Some(targets) = param.get("num_target") {
        let targets = count(targets, "learner_model_param.num_target")?;
        if targets > 1 {
            return Err(refuse(format!(
                "has {targets} targets; only single-target models are imported"
            )));
        }
    }
    let (link, outputs, logistic) = match objective.as_str() {
        "binary:logistic" => (Link::Logistic, 2, true),
        "reg:squarederror" | "reg:linear" => (Link::Identity, 1, false),
        "multi:softmax" | "multi:softprob" if classes >= 2 => (Link::Identity, classes, false),
        _ => {
            return Err(refuse(format!(
                "has the objective `{objective}`; imported are binary:logistic, reg:squarederror, multi:softmax and multi:softprob"
            )));
        }
    };
    let class = choose_class(class_index, outputs, &objective)?;
    // Trees are grouped by output: one group for binary and regression.
    let group = if outputs > 2 { class } else { 0 };

    let booster = &learner["gradient_booster"];
    let booster_name = text(&booster["name"], "gradient_booster.name")?;
    if booster_name != "gbtree" {
        return Err(refuse(format!(
            "has the booster `{booster_name}`; only `gbtree` (no dart weights, no linear booster) is imported"
        )));
    }
    let model = &booster["model"];
    let declared = count(
        &model["gbtree_model_param"]["num_trees"],
        "gbtree_model_param.num_trees",
    )?;
    let trees = array(&model["trees"], "gradient_booster.model.trees")?;
    let tree_info = array(&model["tree_info"], "gradient_booster.model.tree_info")?;
    if trees.len() != declared || tree_info.len() != declared {
        return Err(refuse(format!(
            "declares {declared} trees but holds {} trees and {} tree_info entries; the file is truncated or damaged",
            trees.len(),
            tree_info.len()
        )));
    }
    let feature_types = learner["feature_types"]
        .as_array()
        .cloned()
        .unwrap_or_default();
    if let Some(j) = feature_types.iter().position(|t| t.as_str() == Some("c")) {
        return Err(refuse(format!(
            "feature {j} is categorical (feature type `c`); categorical splits are not imported"
        )));
    }
    let feature_names = match learner["feature_names"].as_array() {
        Some(names) if !names.is_empty() => {
            if names.len() != inputs {
                return Err(refuse(format!(
                    "names {} features but num_feature is {inputs}",
                    names.len()
                )));
            }
            names
                .iter()
                .map(|n| text(n, "learner.feature_names").map(str::to_string))
                .collect::<Result<Vec<_>>>()?
        }
        // XGBoost's own names for unnamed inputs.
        _ => (0..inputs).map(|j| format!("f{j}")).collect(),
    };

    let base = base_scores(&param["base_score"])?;
    let base = match base.len() {
        1 => base[0],
        n if n == outputs && outputs > 2 => base[group as usize],
        n => {
            return Err(refuse(format!(
                "learner_model_param.base_score has {n} values for {outputs} outputs"
            )));
        }
    };
    let mut base_score = if logistic {
        // A logistic objective stores the base score as a probability
        // (XGBoost documentation, parameter `base_score`); the margin is its
        // log-odds, taken in double.
        let p = f64::from(base);
        if !(p > 0.0 && p < 1.0) {
            return Err(refuse(format!(
                "learner_model_param.base_score is {base}, not a probability in (0, 1) as binary:logistic stores it"
            )));
        }
        (p / (1.0 - p)).ln()
    } else {
        f64::from(base)
    };

    let mut native = Vec::new();
    for (t, (tree, info)) in trees.iter().zip(tree_info).enumerate() {
        let info = info
            .as_u64()
            .ok_or_else(|| refuse(format!("tree_info[{t}] is not a class number")))?;
        let groups = if outputs > 2 { outputs as u64 } else { 1 };
        if info >= groups {
            return Err(refuse(format!(
                "tree_info[{t}] is {info}, outside the model's output groups"
            )));
        }
        if info == u64::from(group) {
            native.push(read_tree(t, tree, inputs)?);
        }
    }
    if native.is_empty() {
        return Err(refuse(format!("has no tree for class {class}")));
    }
    if logistic && class == 0 {
        negate(&mut native, &mut base_score);
    }
    Ok(ImportedTrees {
        trees: native,
        base_score,
        link,
        feature_names,
        objective,
        class_index: class,
    })
}

/// One tree's node arrays, checked, into a native tree.
fn read_tree(t: usize, tree: &Value, inputs: usize) -> Result<TreeBody> {
    let at = |name: &str| format!("trees[{t}].{name}");
    let param = &tree["tree_param"];
    if let Some(size) = param.get("size_leaf_vector") {
        let size = count(size, &at("tree_param.size_leaf_vector"))?;
        if size > 1 {
            return Err(refuse(format!(
                "tree {t} has vector leaves (size_leaf_vector {size}); only scalar leaves are imported"
            )));
        }
    }
    let ints = |name: &str| -> Result<Vec<i64>> {
        array(&tree[name], &at(name))?
            .iter()
            .map(|v| {
                v.as_i64()
                    .or_else(|| v.as_bool().map(i64::from))
                    .ok_or_else(|| refuse(format!("{} holds {v}, not an integer", at(name))))
            })
            .collect()
    };
    let left = ints("left_children")?;
    let right = ints("right_children")?;
    let feature = ints("split_indices")?;
    let default_left = ints("default_left")?;
    let conditions = array(&tree["split_conditions"], &at("split_conditions"))?
        .iter()
        .map(|v| {
            // Shortest decimals of float32 values: the nearest double is far
            // closer to that float32 than half its ulp, so narrowing it
            // gives the float32 back exactly.
            v.as_f64().map(|x| x as f32).ok_or_else(|| {
                refuse(format!(
                    "{} holds {v}, not a number",
                    at("split_conditions")
                ))
            })
        })
        .collect::<Result<Vec<f32>>>()?;
    let nodes = left.len();
    if let Some(declared) = param.get("num_nodes") {
        let declared = count(declared, &at("tree_param.num_nodes"))?;
        if declared != nodes {
            return Err(refuse(format!(
                "tree {t} declares {declared} nodes but its arrays hold {nodes}"
            )));
        }
    }
    for (name, len) in [
        ("right_children", right.len()),
        ("split_indices", feature.len()),
        ("default_left", default_left.len()),
        ("split_conditions", conditions.len()),
    ] {
        if len != nodes {
            return Err(refuse(format!(
                "{} has {len} entries; left_children has {nodes}",
                at(name)
            )));
        }
    }
    if nodes == 0 {
        return Err(refuse(format!("tree {t} has no nodes")));
    }
    if let Some(types) = tree.get("split_type").and_then(Value::as_array)
        && let Some(node) = types.iter().position(|v| v.as_i64() != Some(0))
    {
        return Err(refuse(format!(
            "tree {t} node {node} is a categorical split (split_type {}); categorical splits are not imported",
            types[node]
        )));
    }
    if let Some(categories) = tree.get("categories_nodes").and_then(Value::as_array)
        && !categories.is_empty()
    {
        return Err(refuse(format!(
            "tree {t} has categorical splits (categories_nodes); categorical splits are not imported"
        )));
    }
    let child = |node: usize, c: i64| -> Result<usize> {
        if c < 0 || c as usize >= nodes {
            Err(refuse(format!(
                "tree {t} node {node} has child {c}, outside 0..{nodes}"
            )))
        } else {
            Ok(c as usize)
        }
    };
    build_tree(FIELD, t, nodes, 0, |node| {
        let (l, r) = (left[node], right[node]);
        if l == -1 && r == -1 {
            return Ok(SourceNode::Leaf(f64::from(conditions[node])));
        }
        let f = feature[node];
        if f < 0 || f as usize >= inputs {
            return Err(refuse(format!(
                "tree {t} node {node} splits on feature {f} of {inputs}"
            )));
        }
        let threshold = conditions[node];
        if !threshold.is_finite() {
            return Err(refuse(format!(
                "tree {t} node {node} has the threshold {threshold}"
            )));
        }
        let (l, r) = (child(node, l)?, child(node, r)?);
        Ok(SourceNode::Split(Split {
            feature: f as i32,
            pieces: vec![(float32_threshold(threshold), l)],
            last: r,
            missing: if default_left[node] != 0 { l } else { r },
        }))
    })
}

/// The double threshold equivalent to XGBoost's test `(float) x < t`: the
/// smallest double that rounds to `t` or above. Rounding double → float32 is
/// to nearest, ties to even (IEEE 754-2019, §4.3.1), and monotone, so the
/// doubles rounding to `t` or above are exactly those from the midpoint
/// between `t` and the float32 below it (when the midpoint rounds up to `t`,
/// i.e. `t` is the even neighbour), or from the next double after it.
pub(crate) fn float32_threshold(t: f32) -> f64 {
    let below = f64::from(t.next_down());
    let at = f64::from(t);
    // Below f32::MIN the float32 neighbour is -inf; the overflow point is
    // half an ulp below, as if the float32 format went on.
    let midpoint = if below.is_finite() {
        (below + at) / 2.0 // exact: both have 24 significant bits
    } else {
        at - (f64::from(t.next_up()) - at) / 2.0
    };
    if (midpoint as f32) >= t {
        midpoint
    } else {
        super::next_up(midpoint)
    }
}

fn text<'a>(value: &'a Value, name: &str) -> Result<&'a str> {
    value
        .as_str()
        .ok_or_else(|| refuse(format!("{name} is missing or not a string")))
}

fn array<'a>(value: &'a Value, name: &str) -> Result<&'a Vec<Value>> {
    value
        .as_array()
        .ok_or_else(|| refuse(format!("{name} is missing or not an array")))
}

/// XGBoost writes its integer parameters as strings ("30").
fn count(value: &Value, name: &str) -> Result<usize> {
    value
        .as_str()
        .and_then(|s| s.parse::<usize>().ok())
        .or_else(|| value.as_u64().map(|v| v as usize))
        .ok_or_else(|| refuse(format!("{name} is {value}, not a count")))
}

/// `base_score` as `"[v]"`, `"[v1,v2,…]"` or a bare `"v"`: float32 values.
fn base_scores(value: &Value) -> Result<Vec<f32>> {
    let raw = text(value, "learner_model_param.base_score")?;
    let inner = raw.trim().trim_start_matches('[').trim_end_matches(']');
    inner
        .split(',')
        .map(|v| {
            v.trim()
                .parse::<f32>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| {
                    refuse(format!(
                        "learner_model_param.base_score is `{raw}`, not finite numbers"
                    ))
                })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The definition, checked by brute force with the language's own
    /// round-to-nearest-even cast (IEEE 754-2019, §4.3.1): `d` is the
    /// threshold, `prev(d)` is not.
    fn is_smallest_rounding_up(t: f32, d: f64) -> bool {
        let prev = {
            let bits = d.to_bits();
            if d > 0.0 {
                f64::from_bits(bits - 1)
            } else if d == 0.0 {
                -f64::from_bits(1)
            } else {
                f64::from_bits(bits + 1)
            }
        };
        (d as f32) >= t && (prev as f32) < t
    }

    #[test]
    fn float32_thresholds_match_the_cast_at_every_tie() {
        let mut cases = vec![
            0.1f32,
            1.0,
            -1.0,
            0.0,
            -0.0,
            1.5,
            3.0,
            16_777_217.0,
            f32::MIN_POSITIVE,
            -f32::MIN_POSITIVE,
            f32::from_bits(1),
            f32::MAX,
            f32::MIN,
        ];
        // Even and odd mantissas on both signs.
        for bits in [0x3f80_0001u32, 0x3f80_0002, 0xbf80_0001, 0xbf80_0002] {
            cases.push(f32::from_bits(bits));
        }
        for t in cases {
            let d = float32_threshold(t);
            assert!(is_smallest_rounding_up(t, d), "t = {t:e}, d = {d:e}");
        }
    }

    #[test]
    fn base_score_forms() {
        let one = |s: &str| base_scores(&Value::String(s.to_string())).unwrap();
        assert_eq!(one("[5E-1]"), vec![0.5]);
        assert_eq!(one("0.5"), vec![0.5]);
        assert_eq!(one("[1E0,2E0]"), vec![1.0, 2.0]);
        assert!(base_scores(&Value::String("[nan]".into())).is_err());
    }
}
