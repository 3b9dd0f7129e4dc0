//! Production-size tree ensembles for benchmarks: correlated background
//! rows with missing cells, and complete trees whose thresholds are values
//! the data takes. Bench data only (common practice, no source).

use apportion::model::{Link, TreeEnsemble};
use apportion::registry::{Background, FeatureSpec, LinkSpec, ModelBody, ModelSpec, TreeBody};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

pub const FEATURES: usize = 30;

/// Correlated normals (each feature shares a factor with its neighbour and
/// one with all others), 2% missing: bench data only.
pub fn background_rows(seed: u64, rows: usize) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Array2::zeros((rows, FEATURES));
    for mut row in out.rows_mut() {
        let common: f64 = StandardNormal.sample(&mut rng);
        let mut previous: f64 = StandardNormal.sample(&mut rng);
        for slot in row.iter_mut() {
            let own: f64 = StandardNormal.sample(&mut rng);
            previous = 0.6 * previous + 0.8 * own;
            *slot = if rng.random_bool(0.02) {
                f64::NAN
            } else {
                0.5 * common + 0.85 * previous
            };
        }
    }
    out
}

/// A complete subtree of `depth` whose thresholds are values the rows
/// reaching the node take at its feature, as a trained tree's are.
pub fn grow(
    nodes: &mut TreeBody,
    rng: &mut ChaCha8Rng,
    depth: usize,
    data: &Array2<f64>,
    reach: &[usize],
    features: usize,
) -> i32 {
    let node = nodes.feature.len();
    nodes.feature.push(-1);
    nodes.threshold.push(0.0);
    nodes.left.push(-1);
    nodes.right.push(-1);
    nodes.value.push(0.1 * rng.random_range(-1.0..1.0));
    nodes.missing_left.push(rng.random_bool(0.5));
    if depth == 0 {
        return node as i32;
    }
    let feature = rng.random_range(0..features);
    let mut pool: &[usize] = if reach.len() >= 2 { reach } else { &[] };
    let mut attempts = 0;
    let threshold = loop {
        // Rows sent here by a missing direction may all lack the
        // feature: then draw from all the data.
        attempts += 1;
        if attempts > 32 {
            pool = &[];
        }
        let row = if pool.is_empty() {
            rng.random_range(0..data.nrows())
        } else {
            pool[rng.random_range(0..pool.len())]
        };
        let value = data[[row, feature]];
        if !value.is_nan() {
            break value;
        }
    };
    let missing_left = nodes.missing_left[node];
    let goes_left = |row: &usize| {
        let x = data[[*row, feature]];
        if x.is_nan() {
            missing_left
        } else {
            x < threshold
        }
    };
    let (left_rows, right_rows): (Vec<usize>, Vec<usize>) =
        reach.iter().partition(|r| goes_left(r));
    nodes.feature[node] = feature as i32;
    nodes.threshold[node] = threshold;
    nodes.left[node] = grow(nodes, rng, depth - 1, data, &left_rows, features);
    nodes.right[node] = grow(nodes, rng, depth - 1, data, &right_rows, features);
    node as i32
}

/// `trees` complete trees of `depth` with thresholds from `data`.
pub fn ensemble(seed: u64, trees: usize, depth: usize, data: &Array2<f64>) -> TreeEnsemble {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let all: Vec<usize> = (0..data.nrows()).collect();
    let trees = (0..trees)
        .map(|_| {
            // Each tree sees a different half of the data, as in bagging.
            let reach: Vec<usize> = all
                .iter()
                .copied()
                .filter(|_| rng.random_bool(0.5))
                .collect();
            let mut nodes = TreeBody::default();
            grow(&mut nodes, &mut rng, depth, data, &reach, FEATURES);
            nodes
                .into_tree(FEATURES)
                .expect("generated trees are valid")
        })
        .collect();
    TreeEnsemble::try_new(trees, 0.0, Link::Identity, FEATURES).expect("valid ensemble")
}

/// Features `x0`, `x1`, … without groups or reasons.
pub fn feature_specs(count: usize) -> Vec<FeatureSpec> {
    (0..count)
        .map(|j| FeatureSpec {
            name: format!("x{j}"),
            group: String::new(),
            reason_code: String::new(),
            reason_text: String::new(),
        })
        .collect()
}

/// `rows` as a registration's background.
pub fn background_spec(rows: &Array2<f64>) -> Background {
    Background {
        rows: rows.nrows(),
        cols: rows.ncols(),
        values: rows.iter().copied().collect(),
    }
}

/// The registration of `model` over `background`, as a client would send it.
pub fn spec(model: &TreeEnsemble, background: &Array2<f64>) -> ModelSpec {
    let trees = model.trees().iter().map(TreeBody::from).collect();
    ModelSpec {
        model_id: "bench-trees".to_string(),
        features: feature_specs(FEATURES),
        model: ModelBody::Trees {
            trees,
            base_score: model.base_score(),
        },
        link: LinkSpec::Identity,
        background: background_spec(background),
        description: String::new(),
        imported: None,
        decision: None,
    }
}
