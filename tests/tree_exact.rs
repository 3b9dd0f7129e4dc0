//! The exact tree algorithm against brute-force enumeration of every
//! coalition, on random ensembles with repeated features on a path, missing
//! values, random missing directions and grouped features.
//!
//! TESTING.md: "Tree ensembles, marginal removal: the exact tree algorithm
//! must equal brute-force enumeration over all coalitions to 1e-9". The
//! algorithm is from "From local explanations to global understanding with
//! explainable AI for trees", Nature Machine Intelligence 2(1), 2020. The
//! reference here uses only the model's own predictions and the textbook
//! definitions of the Shapley value ("A value for n-person games",
//! Contributions to the Theory of Games II, 1953) and the raw Banzhaf value
//! ("Weighted voting doesn't work: a mathematical analysis", Rutgers Law
//! Review 19, 1965).
//!
//! The compiled form (`CompiledTrees`, background summarised per leaf by
//! follow pattern) is held to the same brute force, and to the per-row pass
//! on ensembles too large to enumerate.

use apportion::engine::estimate::tree::{CompiledTrees, explain};
use apportion::engine::{Players, Summary};
use apportion::model::{Link, Model, Tree, TreeEnsemble};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const FEATURES: usize = 8;

/// Node arrays of a tree under construction.
#[derive(Default)]
struct Nodes {
    feature: Vec<i32>,
    threshold: Vec<f64>,
    left: Vec<i32>,
    right: Vec<i32>,
    value: Vec<f64>,
    missing_left: Vec<bool>,
}

/// Grows a random subtree and returns its root index. Features already on the
/// path are reused often, so that players have several splits on one path.
fn grow(rng: &mut ChaCha8Rng, nodes: &mut Nodes, depth_left: usize, path: &mut Vec<i32>) -> i32 {
    let index = nodes.left.len();
    nodes.feature.push(-1);
    nodes.threshold.push(0.0);
    nodes.left.push(-1);
    nodes.right.push(-1);
    nodes.value.push(rng.random_range(-2.0..2.0));
    nodes.missing_left.push(rng.random_bool(0.5));
    if depth_left == 0 || (!path.is_empty() && rng.random_bool(0.15)) {
        return index as i32;
    }
    let feature = if !path.is_empty() && rng.random_bool(0.4) {
        path[rng.random_range(0..path.len())]
    } else {
        rng.random_range(0..FEATURES as i32)
    };
    nodes.feature[index] = feature;
    nodes.threshold[index] = rng.random_range(0.1..0.9);
    path.push(feature);
    let left = grow(rng, nodes, depth_left - 1, path);
    let right = grow(rng, nodes, depth_left - 1, path);
    path.pop();
    nodes.left[index] = left;
    nodes.right[index] = right;
    index as i32
}

fn random_ensemble(rng: &mut ChaCha8Rng) -> TreeEnsemble {
    let trees = (0..rng.random_range(5..=20))
        .map(|_| {
            let mut nodes = Nodes::default();
            let depth = rng.random_range(1..=5);
            grow(rng, &mut nodes, depth, &mut Vec::new());
            Tree::try_new(
                nodes.feature,
                nodes.threshold,
                nodes.left,
                nodes.right,
                nodes.value,
                nodes.missing_left,
                FEATURES,
            )
            .expect("generated trees are well formed")
        })
        .collect();
    let base_score = rng.random_range(-1.0..1.0);
    TreeEnsemble::try_new(trees, base_score, Link::Identity, FEATURES).expect("valid ensemble")
}

/// A row of uniform values in [0, 1), each missing (NaN) with `missing` odds.
fn random_row(rng: &mut ChaCha8Rng, missing: f64) -> Vec<f64> {
    (0..FEATURES)
        .map(|_| {
            if rng.random_bool(missing) {
                f64::NAN
            } else {
                rng.random::<f64>()
            }
        })
        .collect()
}

fn random_references(rng: &mut ChaCha8Rng, rows: usize) -> Array2<f64> {
    let mut references = Array2::zeros((rows, FEATURES));
    for mut row in references.rows_mut() {
        for (slot, value) in row.iter_mut().zip(random_row(rng, 0.1)) {
            *slot = value;
        }
    }
    references
}

/// Eight features as five players: two groups of two and three features, and
/// three lone features.
fn grouped_players() -> Players {
    let names: Vec<String> = (0..FEATURES).map(|j| format!("f{j}")).collect();
    let groups: Vec<String> = ["", "g1", "", "g1", "g2", "", "g2", "g1"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let players = Players::try_new(&names, &groups).expect("valid grouping");
    assert_eq!(players.len(), 5);
    players
}

/// v(S) for every coalition S (bit i = player i): the mean model output over
/// rows that take the instance on the features of players in S and the
/// reference row elsewhere (marginal removal, by definition).
fn coalition_values(
    model: &TreeEnsemble,
    players: &Players,
    instance: &[f64],
    references: &Array2<f64>,
) -> Vec<f64> {
    let mut outputs = vec![0.0; references.nrows()];
    (0..1usize << players.len())
        .map(|coalition| {
            let rows = hybrid_rows(players, instance, references, coalition);
            model.predict(rows.view(), &mut outputs);
            outputs.iter().sum::<f64>() / outputs.len() as f64
        })
        .collect()
}

/// The reference rows with the instance's values on the features of the
/// players in `coalition` (bit i = player i).
fn hybrid_rows(
    players: &Players,
    instance: &[f64],
    references: &Array2<f64>,
    coalition: usize,
) -> Array2<f64> {
    let mut rows = references.clone();
    for mut row in rows.rows_mut() {
        for (feature, slot) in row.iter_mut().enumerate() {
            if coalition >> players.player_of(feature) & 1 == 1 {
                *slot = instance[feature];
            }
        }
    }
    rows
}

fn factorial(n: usize) -> f64 {
    (1..=n).map(|k| k as f64).product()
}

/// Σ over S ∌ i of |S|!(p-|S|-1)!/p! [v(S ∪ i) - v(S)].
fn brute_shapley(values: &[f64], players: usize) -> Vec<f64> {
    (0..players)
        .map(|i| {
            (0..values.len())
                .filter(|s| s >> i & 1 == 0)
                .map(|s| {
                    let size = (s as u32).count_ones() as usize;
                    let weight =
                        factorial(size) * factorial(players - size - 1) / factorial(players);
                    weight * (values[s | 1 << i] - values[s])
                })
                .sum()
        })
        .collect()
}

/// Σ over S ∌ i of [v(S ∪ i) - v(S)] / 2^(p-1).
fn brute_banzhaf(values: &[f64], players: usize) -> Vec<f64> {
    (0..players)
        .map(|i| {
            let total: f64 = (0..values.len())
                .filter(|s| s >> i & 1 == 0)
                .map(|s| values[s | 1 << i] - values[s])
                .sum();
            total / 2f64.powi(players as i32 - 1)
        })
        .collect()
}

fn assert_close(actual: &[f64], expected: &[f64], tolerance: f64, what: &str) {
    assert_eq!(actual.len(), expected.len(), "{what}");
    for (player, (a, e)) in actual.iter().zip(expected).enumerate() {
        assert!(
            (a - e).abs() <= tolerance,
            "{what}: player {player} got {a}, brute force {e}"
        );
    }
}

#[test]
fn exact_tree_values_equal_brute_force_enumeration() {
    for seed in 0..6 {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let model = random_ensemble(&mut rng);
        let mut instance = random_row(&mut rng, 0.2);
        // Every run has at least one missing instance value to route.
        instance[seed as usize % FEATURES] = f64::NAN;
        let marginal = random_references(&mut rng, 12);
        let fixed = random_references(&mut rng, 1);
        for players in [Players::singletons(FEATURES), grouped_players()] {
            for (removal, references) in [("marginal", &marginal), ("fixed", &fixed)] {
                let values = coalition_values(&model, &players, &instance, references);
                let p = players.len();
                for (summary, expected) in [
                    (Summary::Shapley, brute_shapley(&values, p)),
                    (Summary::Banzhaf, brute_banzhaf(&values, p)),
                ] {
                    let what = format!("seed {seed}, {p} players, {removal}, {}", summary.name());
                    let estimate = explain(&model, &players, &instance, references.view(), summary)
                        .expect("valid request");
                    assert_close(&estimate.values, &expected, 1e-9, &what);
                    assert!((estimate.value_full - values[values.len() - 1]).abs() <= 1e-9);
                    assert!((estimate.value_empty - values[0]).abs() <= 1e-9);
                    assert!(estimate.std_errors.iter().all(|s| *s == 0.0) && estimate.converged);
                }
            }
        }
    }
}

#[test]
fn shapley_values_are_efficient() {
    // Efficiency is an axiom of the Shapley value ("A value for n-person
    // games", 1953); both ends come from the model's own predictions here.
    for seed in 10..14 {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let model = random_ensemble(&mut rng);
        let instance = random_row(&mut rng, 0.2);
        let references = random_references(&mut rng, 30);
        let estimate = explain(
            &model,
            &grouped_players(),
            &instance,
            references.view(),
            Summary::Shapley,
        )
        .expect("valid request");
        let mut full = [0.0];
        model.predict(
            ndarray::aview1(&instance).insert_axis(ndarray::Axis(0)),
            &mut full,
        );
        let mut outputs = vec![0.0; references.nrows()];
        model.predict(references.view(), &mut outputs);
        let empty = outputs.iter().sum::<f64>() / outputs.len() as f64;
        assert!((estimate.value_full - full[0]).abs() <= 1e-12);
        assert!((estimate.value_empty - empty).abs() <= 1e-12);
        let sum: f64 = estimate.values.iter().sum();
        assert!(
            (sum - (full[0] - empty)).abs() <= 1e-12,
            "seed {seed}: sum {sum}, gap {}",
            full[0] - empty
        );
    }
}

#[test]
fn wrong_summary_and_instance_length_name_their_field() {
    let mut rng = ChaCha8Rng::seed_from_u64(99);
    let model = random_ensemble(&mut rng);
    let players = Players::singletons(FEATURES);
    let instance = random_row(&mut rng, 0.0);
    let references = random_references(&mut rng, 3);
    for summary in [Summary::LeaveOneOut, Summary::Selection { fraction: 0.9 }] {
        let err = explain(&model, &players, &instance, references.view(), summary).unwrap_err();
        assert_eq!(err.field, "summary");
    }
    let short = &instance[..FEATURES - 1];
    let err = explain(&model, &players, short, references.view(), Summary::Shapley).unwrap_err();
    assert_eq!(err.field, "instance");
}

/// A tree with no split: it adds a constant that no player is credited for.
fn single_leaf(value: f64, features: usize) -> Tree {
    Tree::try_new(
        vec![-1],
        vec![0.0],
        vec![-1],
        vec![-1],
        vec![value],
        vec![],
        features,
    )
    .expect("a lone leaf is a tree")
}

/// `random_ensemble` plus a single-leaf tree.
fn random_ensemble_with_stump(rng: &mut ChaCha8Rng) -> TreeEnsemble {
    let model = random_ensemble(rng);
    let mut trees = model.trees().to_vec();
    trees.push(single_leaf(0.75, FEATURES));
    TreeEnsemble::try_new(trees, model.base_score(), Link::Identity, FEATURES)
        .expect("valid ensemble")
}

/// The three ways of compiling: every tree in pattern form, the per-tree
/// choice from costs, and a memory limit of 0 (every tree per row).
/// `describable`: trees whose leaves have at most 64 path players.
fn compiled_forms(
    model: &TreeEnsemble,
    players: &Players,
    references: &Array2<f64>,
    describable: usize,
) -> Vec<(&'static str, CompiledTrees)> {
    let patterns = CompiledTrees::compile_all_patterns(model, players, references.view())
        .expect("valid background");
    assert_eq!(patterns.pattern_trees(), describable);
    let rows = CompiledTrees::compile(model, players, references.view(), 0).expect("valid");
    assert_eq!((rows.pattern_trees(), rows.memory_bytes()), (0, 0));
    let chosen =
        CompiledTrees::compile(model, players, references.view(), usize::MAX).expect("valid");
    vec![
        ("patterns", patterns),
        ("chosen", chosen),
        ("per-row", rows),
    ]
}

#[test]
fn compiled_tree_values_equal_brute_force_enumeration() {
    // Background sizes from one row to 2,000, NaN in instance and
    // background, repeated and contradictory splits on a path (random
    // thresholds on reused features), a single-leaf tree, groups.
    for (seed, rows) in [(20, 1), (21, 2), (22, 9), (23, 60), (24, 300), (25, 2000)] {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let model = random_ensemble_with_stump(&mut rng);
        let mut instance = random_row(&mut rng, 0.2);
        instance[seed as usize % FEATURES] = f64::NAN;
        let references = random_references(&mut rng, rows);
        for players in [Players::singletons(FEATURES), grouped_players()] {
            let values = coalition_values(&model, &players, &instance, &references);
            let p = players.len();
            for (form, compiled) in
                compiled_forms(&model, &players, &references, model.trees().len())
            {
                for (summary, expected) in [
                    (Summary::Shapley, brute_shapley(&values, p)),
                    (Summary::Banzhaf, brute_banzhaf(&values, p)),
                ] {
                    let what = format!(
                        "seed {seed}, {rows} rows, {p} players, {form}, {}",
                        summary.name()
                    );
                    let estimate = compiled
                        .explain(&model, &players, references.view(), &instance, summary)
                        .expect("valid request");
                    assert_close(&estimate.values, &expected, 1e-9, &what);
                    assert!((estimate.value_full - values[values.len() - 1]).abs() <= 1e-9);
                    assert!((estimate.value_empty - values[0]).abs() <= 1e-9);
                    assert!(estimate.std_errors.iter().all(|s| *s == 0.0) && estimate.converged);
                }
            }
        }
    }
}

/// Node arrays of a complete tree of `depth` on `features` features, with
/// thresholds around the middle of the data and random missing directions.
fn complete_tree(rng: &mut ChaCha8Rng, depth: usize, features: usize) -> Tree {
    fn grow_complete(
        rng: &mut ChaCha8Rng,
        nodes: &mut Nodes,
        depth: usize,
        features: usize,
    ) -> i32 {
        let index = nodes.left.len();
        nodes.feature.push(-1);
        nodes.threshold.push(0.0);
        nodes.left.push(-1);
        nodes.right.push(-1);
        nodes.value.push(rng.random_range(-2.0..2.0));
        nodes.missing_left.push(rng.random_bool(0.5));
        if depth > 0 {
            nodes.feature[index] = rng.random_range(0..features as i32);
            nodes.threshold[index] = rng.random_range(0.2..0.8);
            let left = grow_complete(rng, nodes, depth - 1, features);
            let right = grow_complete(rng, nodes, depth - 1, features);
            nodes.left[index] = left;
            nodes.right[index] = right;
        }
        index as i32
    }
    let mut nodes = Nodes::default();
    grow_complete(rng, &mut nodes, depth, features);
    Tree::try_new(
        nodes.feature,
        nodes.threshold,
        nodes.left,
        nodes.right,
        nodes.value,
        nodes.missing_left,
        features,
    )
    .expect("generated trees are well formed")
}

/// A chain: every inner node has one leaf child, and the path to the
/// deepest leaf splits on `length` distinct features (more than a u64 mask
/// holds once `length` passes 64).
fn chain_tree(rng: &mut ChaCha8Rng, length: usize, features: usize) -> Tree {
    let mut order: Vec<i32> = (0..features as i32).collect();
    for i in (1..order.len()).rev() {
        order.swap(i, rng.random_range(0..=i));
    }
    let mut nodes = Nodes::default();
    let push = |nodes: &mut Nodes, feature: i32, left: i32, right: i32, rng: &mut ChaCha8Rng| {
        nodes.feature.push(feature);
        nodes.threshold.push(rng.random_range(0.05..0.95));
        nodes.left.push(left);
        nodes.right.push(right);
        nodes.value.push(rng.random_range(-2.0..2.0));
        nodes.missing_left.push(rng.random_bool(0.5));
    };
    // Inner node i sits at 2i, its leaf child at 2i + 1, the next inner
    // node at 2i + 2; the chain continues on a random side.
    for step in 0..length {
        let (next, leaf) = (2 * step as i32 + 2, 2 * step as i32 + 1);
        let (left, right) = if rng.random_bool(0.5) {
            (next, leaf)
        } else {
            (leaf, next)
        };
        push(&mut nodes, order[step % features], left, right, rng);
        push(&mut nodes, -1, -1, -1, rng);
    }
    push(&mut nodes, -1, -1, -1, rng);
    Tree::try_new(
        nodes.feature,
        nodes.threshold,
        nodes.left,
        nodes.right,
        nodes.value,
        nodes.missing_left,
        features,
    )
    .expect("chains are well formed")
}

/// Correlated rows: a shared factor plus noise, in [0, 1) mostly, some NaN.
fn correlated_rows(rng: &mut ChaCha8Rng, rows: usize, features: usize) -> Array2<f64> {
    let mut out = Array2::zeros((rows, features));
    for mut row in out.rows_mut() {
        let shared: f64 = rng.random();
        for slot in row.iter_mut() {
            *slot = if rng.random_bool(0.05) {
                f64::NAN
            } else {
                0.6 * shared + 0.4 * rng.random::<f64>()
            };
        }
    }
    out
}

#[test]
fn compiled_trees_equal_the_per_row_pass_on_larger_ensembles() {
    // Too many players to enumerate: the reference is the per-row pass,
    // itself held to brute force above. Complete trees to depth 8 (dense
    // and sparse leaves), chains of 20 distinct features (leaves counted by
    // sorting) and of 70 (beyond a u64 mask: per-row whatever is asked).
    let features = 80;
    for (seed, rows) in [(30, 5), (31, 150), (32, 700)] {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut trees: Vec<Tree> = (0..24)
            .map(|i| complete_tree(&mut rng, 2 + i % 7, 30))
            .collect();
        trees.push(chain_tree(&mut rng, 20, features));
        trees.push(chain_tree(&mut rng, 70, features));
        trees.push(single_leaf(-0.5, features));
        let model = TreeEnsemble::try_new(trees, 0.1, Link::Identity, features).expect("valid");
        let references = correlated_rows(&mut rng, rows, features);
        let instance = correlated_rows(&mut rng, 1, features).row(0).to_vec();
        let names: Vec<String> = (0..features).map(|j| format!("f{j}")).collect();
        let groups: Vec<String> = (0..features)
            .map(|j| {
                if j % 2 == 0 && j < 40 {
                    "g".to_string()
                } else {
                    String::new()
                }
            })
            .collect();
        let grouped = Players::try_new(&names, &groups).expect("valid grouping");
        // The 70-feature chain has more path players than a u64 mask holds,
        // unless the group (20 features, at least 10 on any chain of 70 of
        // the 80) folds them into at most 61.
        let trees = model.trees().len();
        for (players, describable) in [(Players::singletons(features), trees - 1), (grouped, trees)]
        {
            let forms = compiled_forms(&model, &players, &references, describable);
            let limit = CompiledTrees::compile(
                &model,
                &players,
                references.view(),
                forms[0].1.memory_bytes() / 2,
            )
            .expect("valid");
            assert!(limit.memory_bytes() <= forms[0].1.memory_bytes() / 2);
            assert!(limit.pattern_trees() < forms[0].1.pattern_trees());
            for summary in [Summary::Shapley, Summary::Banzhaf] {
                let expected = explain(&model, &players, &instance, references.view(), summary)
                    .expect("valid request");
                for (form, compiled) in forms.iter().chain([&("half memory", limit.clone())]) {
                    let what = format!("seed {seed}, {rows} rows, {form}, {}", summary.name());
                    let estimate = compiled
                        .explain(&model, &players, references.view(), &instance, summary)
                        .expect("valid request");
                    assert_close(&estimate.values, &expected.values, 1e-12, &what);
                    assert_eq!(estimate.value_full, expected.value_full, "{what}");
                    assert!((estimate.value_empty - expected.value_empty).abs() <= 1e-12);
                }
            }
        }
    }
}

#[test]
fn a_rebuilt_compilation_answers_bit_for_bit_the_same() {
    // The registry recompiles after a restart; answers must not move.
    let mut rng = ChaCha8Rng::seed_from_u64(40);
    let model = random_ensemble_with_stump(&mut rng);
    let references = random_references(&mut rng, 400);
    let instance = random_row(&mut rng, 0.2);
    let players = grouped_players();
    let answers: Vec<Vec<f64>> = (0..2)
        .map(|_| {
            let compiled = CompiledTrees::compile(&model, &players, references.view(), usize::MAX)
                .expect("valid");
            compiled
                .explain(
                    &model,
                    &players,
                    references.view(),
                    &instance,
                    Summary::Shapley,
                )
                .expect("valid request")
                .values
        })
        .collect();
    assert_eq!(answers[0], answers[1]);
}

#[test]
fn a_compilation_refuses_another_background_and_bad_requests() {
    let mut rng = ChaCha8Rng::seed_from_u64(41);
    let model = random_ensemble(&mut rng);
    let players = Players::singletons(FEATURES);
    let references = random_references(&mut rng, 10);
    let instance = random_row(&mut rng, 0.0);
    let compiled =
        CompiledTrees::compile(&model, &players, references.view(), usize::MAX).expect("valid");
    let other = random_references(&mut rng, 11);
    let explain_with = |background: &Array2<f64>, instance: &[f64], summary| {
        compiled
            .explain(&model, &players, background.view(), instance, summary)
            .unwrap_err()
            .field
    };
    assert_eq!(
        explain_with(&other, &instance, Summary::Shapley),
        "background"
    );
    assert_eq!(
        explain_with(&references, &instance[1..], Summary::Shapley),
        "instance"
    );
    assert_eq!(
        explain_with(&references, &instance, Summary::LeaveOneOut),
        "summary"
    );
    let empty = Array2::<f64>::zeros((0, FEATURES));
    let err = CompiledTrees::compile(&model, &players, empty.view(), usize::MAX).unwrap_err();
    assert_eq!(err.field, "background");
}

/// Through the front door: a prepared tree model answers TREE_EXACT from the
/// ensemble compiled at preparation, and it equals exact enumeration over
/// the same game (model predictions averaged over the background, by
/// definition) to 1e-9, under marginal and FIXED removal.
#[test]
fn prepared_tree_models_answer_from_the_compiled_form() {
    use std::sync::Arc;
    use std::time::{Duration, Instant};

    use apportion::engine::estimate::EstimatorKind;
    use apportion::engine::{PreparedModel, RemovalChoice, Request, prepare};

    let mut rng = ChaCha8Rng::seed_from_u64(31);
    let model = random_ensemble_with_stump(&mut rng);
    let references = random_references(&mut rng, 400);
    let instance = random_row(&mut rng, 0.2);
    // The background has missing values, so FIXED removal needs its values.
    let reference = random_row(&mut rng, 0.0);
    let players = grouped_players();
    let prepared = Arc::new(
        PreparedModel::try_new(Arc::new(model), players, references, 100.0).expect("prepares"),
    );
    let compiled = prepared.compiled_trees().expect("compiled at preparation");
    assert!(compiled.pattern_trees() > 0, "400 rows favour patterns");
    let answer = |request: Request| {
        prepare(&prepared, request)
            .expect("valid request")
            .run(Instant::now() + Duration::from_secs(60))
            .expect("an explanation")
    };
    for removal in [
        RemovalChoice::Marginal,
        RemovalChoice::Fixed(Some(reference)),
    ] {
        for summary in [Summary::Shapley, Summary::Banzhaf] {
            let mut request = Request::new(instance.clone());
            request.removal = removal.clone();
            request.summary = summary;
            request.budget = Duration::from_secs(60);
            let fast = answer(request.clone());
            assert_eq!(fast.estimator, EstimatorKind::TreeExact);
            request.estimator = Some(EstimatorKind::Exact);
            let slow = answer(request);
            let what = format!("{removal:?} {}", summary.name());
            assert_close(&fast.estimate.values, &slow.estimate.values, 1e-9, &what);
            assert!((fast.estimate.value_empty - slow.estimate.value_empty).abs() <= 1e-9);
        }
    }
}

/// The tree walk's coalition table (all 2^p values of a game at once, for
/// targets the exact tree algorithm does not take) equals evaluating every
/// hybrid row — the marginal or fixed game by its definition — to 1e-12,
/// for the probability, a loss and the raw output, with groups and missing
/// values; and through the front door, an EXACT probability answer taken
/// from it equals the textbook Shapley value of those brute-force values.
#[test]
fn the_tree_walk_table_equals_every_hybrid_row_evaluated() {
    use std::sync::Arc;
    use std::time::{Duration, Instant};

    use apportion::engine::estimate::EstimatorKind;
    use apportion::engine::estimate::tree_table::TreeTable;
    use apportion::engine::target::loss;
    use apportion::engine::{Coalition, Game, PreparedModel, Request, Stopping, Target, prepare};

    for seed in 0..6 {
        let mut rng = ChaCha8Rng::seed_from_u64(100 + seed);
        let model = random_ensemble(&mut rng);
        let mut instance = random_row(&mut rng, 0.2);
        instance[seed as usize % FEATURES] = f64::NAN;
        let marginal = random_references(&mut rng, 9);
        let fixed = random_references(&mut rng, 1);
        for players in [Players::singletons(FEATURES), grouped_players()] {
            let p = players.len();
            for references in [&marginal, &fixed] {
                let mut outputs = vec![0.0; references.nrows()];
                // Per coalition, the model's raw outputs at every hybrid row.
                let hybrid: Vec<Vec<f64>> = (0..1usize << p)
                    .map(|coalition| {
                        let rows = hybrid_rows(&players, &instance, references, coalition);
                        model.predict(rows.view(), &mut outputs);
                        outputs.clone()
                    })
                    .collect();
                let mean = |xs: &[f64], f: &dyn Fn(f64) -> f64| {
                    xs.iter().map(|x| f(*x)).sum::<f64>() / xs.len() as f64
                };
                let logistic = Link::Logistic;
                for (target, link, expected) in [
                    (
                        Target::Output,
                        Link::Identity,
                        hybrid.iter().map(|o| mean(o, &|x| x)).collect::<Vec<_>>(),
                    ),
                    (
                        Target::Probability,
                        Link::Logistic,
                        hybrid
                            .iter()
                            .map(|o| mean(o, &|x| logistic.apply(x)))
                            .collect(),
                    ),
                    (
                        Target::Loss { label: 1.0 },
                        Link::Logistic,
                        hybrid
                            .iter()
                            .map(|o| loss(logistic, 1.0, mean(o, &|x| logistic.apply(x))))
                            .collect(),
                    ),
                ] {
                    let table = TreeTable::build(
                        &model,
                        link,
                        &players,
                        &instance,
                        references.view(),
                        &target,
                        &Stopping::unbounded(),
                    )
                    .expect("a table");
                    let coalitions: Vec<Coalition> =
                        (0..1u128 << p).map(Coalition::from_bits).collect();
                    let mut got = vec![0.0; coalitions.len()];
                    table.values(&coalitions, &mut got);
                    let what = format!(
                        "seed {seed}, {p} players, {} rows, {}",
                        references.nrows(),
                        target.name()
                    );
                    for (coalition, (g, e)) in got.iter().zip(&expected).enumerate() {
                        assert!(
                            (g - e).abs() <= 1e-12 * e.abs().max(1.0),
                            "{what}: coalition {coalition:b} got {g}, hybrid rows {e}"
                        );
                    }
                }
            }
        }
        // Through the front door, as a logistic model's probability.
        let logistic = TreeEnsemble::try_new(
            model.trees().to_vec(),
            model.base_score(),
            Link::Logistic,
            FEATURES,
        )
        .expect("valid ensemble");
        let players = grouped_players();
        let prepared = Arc::new(
            PreparedModel::try_new(
                Arc::new(logistic.clone()),
                players.clone(),
                marginal.clone(),
                1e4,
            )
            .expect("prepares"),
        );
        let mut request = Request::new(instance.clone());
        request.target = Target::Probability;
        request.estimator = Some(EstimatorKind::Exact);
        request.budget = Duration::from_secs(60);
        let answer = prepare(&prepared, request)
            .expect("valid request")
            .run(Instant::now() + Duration::from_secs(60))
            .expect("an explanation");
        assert_eq!(
            answer.model_rows_evaluated,
            marginal.nrows() as u64,
            "a table at 10 µs a model row: walked once per background row"
        );
        let mut outputs = vec![0.0; marginal.nrows()];
        let values: Vec<f64> = (0..1usize << players.len())
            .map(|coalition| {
                let rows = hybrid_rows(&players, &instance, &marginal, coalition);
                logistic.predict(rows.view(), &mut outputs);
                outputs
                    .iter()
                    .map(|o| Link::Logistic.apply(*o))
                    .sum::<f64>()
                    / outputs.len() as f64
            })
            .collect();
        let expected = brute_shapley(&values, players.len());
        assert_close(
            &answer.estimate.values,
            &expected,
            1e-12,
            "EXACT probability from the table",
        );
    }
}
