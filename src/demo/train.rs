//! Trainers for the demo's two models: ridge-penalised logistic regression by
//! Newton's method, and gradient-boosted trees with logistic loss. Small and
//! fast enough to run at demo start-up; not a general training library.
//!
//! Missing values: trees route NaN by a direction learned at each node, but a
//! linear model cannot take NaN, so [`logistic_regression`] refuses it. The
//! demo's only NaN column is `months_rental_history`, NaN for first-time
//! renters, who truly have zero months of rental history; the logistic model
//! is therefore trained and explained on [`impute_for_linear`]`(rows)`, the
//! same columns with NaN read as 0.

use nalgebra::{DMatrix, DVector};
use ndarray::{Array2, ArrayView2};
use rand::SeedableRng;
use rand::seq::index::sample;
use rand_chacha::ChaCha8Rng;

use crate::engine::error::{EngineError, Result};
use crate::model::{LinearModel, Link, TreeBody, TreeEnsemble, logistic};

/// Newton steps allowed before the logistic fit gives up.
const MAX_NEWTON_STEPS: usize = 100;
/// Penalty on squared leaf values (λ of "XGBoost: a scalable tree boosting
/// system", KDD 2016).
pub const LEAF_PENALTY: f64 = 1.0;
/// A child must carry at least this much hessian (about four rows at
/// p = 0.5), so leaves are not fitted to a handful of applicants.
pub const MIN_CHILD_HESSIAN: f64 = 1.0;
/// At most this many value bins per feature; split thresholds are the bin
/// edges (every distinct value when there are few, quantiles otherwise).
pub const MAX_BINS: usize = 64;
/// Share of the features each tree may split on, drawn per tree from the
/// seed (column subsampling, as in the KDD 2016 paper).
pub const FEATURE_SHARE: f64 = 0.8;
/// Deepest tree [`boosted_trees`] accepts.
pub const MAX_DEPTH: usize = 16;

/// `rows` with every NaN replaced by 0, for the logistic model (see the
/// module documentation for why 0 is the honest value in this scenario).
pub fn impute_for_linear(rows: ArrayView2<'_, f64>) -> Array2<f64> {
    rows.mapv(|x| if x.is_nan() { 0.0 } else { x })
}

/// Logistic regression maximising the mean log likelihood minus
/// `ridge / 2 · Σ_j (sd_j w_j)²`, i.e. a ridge penalty on the weights of
/// standardised columns (population sd; a constant column counts as sd 1)
/// and none on the intercept. Returns weights in the original units.
pub fn logistic_regression(
    rows: ArrayView2<'_, f64>,
    labels: &[f64],
    ridge: f64,
) -> Result<LinearModel> {
    check_training_data(rows, labels, false)?;
    if !(ridge.is_finite() && ridge >= 0.0) {
        return Err(EngineError::new("ridge", "must be a finite number ≥ 0"));
    }
    let (n, p) = rows.dim();
    let count = n as f64;
    let means: Vec<f64> = rows
        .columns()
        .into_iter()
        .map(|c| c.sum() / count)
        .collect();
    let scales: Vec<f64> = rows
        .columns()
        .into_iter()
        .zip(&means)
        .map(|(c, m)| {
            let sd = (c.iter().map(|x| (x - m).powi(2)).sum::<f64>() / count).sqrt();
            if sd > 0.0 { sd } else { 1.0 }
        })
        .collect();
    // Standardising keeps Newton's method well conditioned when columns
    // differ by orders of magnitude (income in dollars beside shares).
    let design = DMatrix::from_fn(n, p + 1, |i, j| {
        if j == 0 {
            1.0
        } else {
            (rows[[i, j - 1]] - means[j - 1]) / scales[j - 1]
        }
    });
    let y = DVector::from_column_slice(labels);
    let penalised_likelihood = |beta: &DVector<f64>| {
        let eta = &design * beta;
        let likelihood = eta
            .iter()
            .zip(y.iter())
            .map(|(e, y)| y * e - softplus(*e))
            .sum::<f64>()
            / count;
        likelihood - 0.5 * ridge * beta.rows(1, p).norm_squared()
    };

    let label_mean = y.mean();
    let mut beta = DVector::zeros(p + 1);
    beta[0] = (label_mean / (1.0 - label_mean)).ln();
    let mut converged = false;
    for _ in 0..MAX_NEWTON_STEPS {
        let probability = (&design * &beta).map(logistic);
        let mut gradient = design.tr_mul(&(&y - &probability)) / count;
        let mut weighted = design.clone();
        for (mut row, q) in weighted.row_iter_mut().zip(probability.iter()) {
            row *= q * (1.0 - q);
        }
        let mut hessian = design.tr_mul(&weighted) / count;
        for j in 1..=p {
            gradient[j] -= ridge * beta[j];
            hessian[(j, j)] += ridge;
        }
        let step = hessian.cholesky().map(|c| c.solve(&gradient)).ok_or_else(|| {
            EngineError::new(
                "ridge",
                "the fit is singular (a constant or duplicated column, or separable classes); use ridge > 0",
            )
        })?;
        // Halve the step until the objective does not fall, so a poor start
        // cannot overshoot.
        let current = penalised_likelihood(&beta);
        let mut fraction = 1.0;
        let mut candidate = &beta + &step;
        while penalised_likelihood(&candidate) < current && fraction > 1e-10 {
            fraction *= 0.5;
            candidate = &beta + &step * fraction;
        }
        beta = candidate;
        if (&step * fraction).amax() < 1e-10 {
            converged = true;
            break;
        }
    }
    if !converged {
        return Err(EngineError::new(
            "ridge",
            format!(
                "no convergence in {MAX_NEWTON_STEPS} Newton steps (the classes may be separable); increase ridge"
            ),
        ));
    }
    let weights: Vec<f64> = (0..p).map(|j| beta[j + 1] / scales[j]).collect();
    let intercept = beta[0] - weights.iter().zip(&means).map(|(w, m)| w * m).sum::<f64>();
    LinearModel::try_new(weights, intercept, Link::Logistic)
}

/// Gradient boosting with logistic loss ("Greedy function approximation: a
/// gradient boosting machine", Annals of Statistics 29(5), 2001) and the
/// second-order leaf values and split gain of "XGBoost: a scalable tree
/// boosting system", KDD 2016: a leaf gets `−learning_rate · ΣG / (ΣH + λ)`
/// with `G = p − y`, `H = p (1 − p)`, `λ = LEAF_PENALTY`. Splits are chosen
/// greedily over each feature's bin edges; at every split, rows with NaN
/// are tried on both sides and sent where the gain is larger (to the
/// heavier child when the node has none). `x < threshold` goes left. The
/// seed picks the features each tree may use ([`FEATURE_SHARE`]).
pub fn boosted_trees(
    rows: ArrayView2<'_, f64>,
    labels: &[f64],
    trees: usize,
    depth: usize,
    learning_rate: f64,
    seed: u64,
) -> Result<TreeEnsemble> {
    boost(rows, labels, trees, depth, learning_rate, seed).map(|(ensemble, _margins)| ensemble)
}

/// The ensemble and the training margins the trainer tracked while
/// building it (kept so tests can compare them with the model's own
/// predictions).
fn boost(
    rows: ArrayView2<'_, f64>,
    labels: &[f64],
    trees: usize,
    depth: usize,
    learning_rate: f64,
    seed: u64,
) -> Result<(TreeEnsemble, Vec<f64>)> {
    check_training_data(rows, labels, true)?;
    if trees == 0 {
        return Err(EngineError::new("trees", "at least one tree is required"));
    }
    if depth == 0 || depth > MAX_DEPTH {
        return Err(EngineError::new(
            "depth",
            format!("must be between 1 and {MAX_DEPTH}"),
        ));
    }
    if !(learning_rate.is_finite() && learning_rate > 0.0 && learning_rate <= 1.0) {
        return Err(EngineError::new("learning_rate", "must be in (0, 1]"));
    }
    let (n, p) = rows.dim();
    let bins = Bins::new(rows);
    let label_mean = labels.iter().sum::<f64>() / n as f64;
    let base_score = (label_mean / (1.0 - label_mean)).ln();
    let mut margins = vec![base_score; n];
    let mut gradient = vec![0.0; n];
    let mut hessian = vec![0.0; n];
    let allowed_count = ((p as f64 * FEATURE_SHARE).ceil() as usize).clamp(1, p);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut ensemble = Vec::with_capacity(trees);
    for _ in 0..trees {
        for i in 0..n {
            let q = logistic(margins[i]);
            gradient[i] = q - labels[i];
            hessian[i] = q * (1.0 - q);
        }
        let mut allowed = sample(&mut rng, p, allowed_count).into_vec();
        allowed.sort_unstable();
        let mut grower = Grower {
            bins: &bins,
            gradient: &gradient,
            hessian: &hessian,
            allowed: &allowed,
            depth,
            learning_rate,
            margins: &mut margins,
            histogram: Vec::with_capacity(MAX_BINS + 1),
            nodes: TreeBody::default(),
        };
        grower.grow((0..n).collect(), 0);
        ensemble.push(grower.nodes.into_tree(p)?);
    }
    Ok((
        TreeEnsemble::try_new(ensemble, base_score, Link::Logistic, p)?,
        margins,
    ))
}

const MISSING_BIN: u8 = u8::MAX;

/// Each feature's split thresholds and every row's bin code, column-major.
/// Code `b` means exactly `b` thresholds are ≤ x, so `x < thresholds[k]`
/// iff `b ≤ k`: training on codes and predicting on raw values agree.
struct Bins {
    thresholds: Vec<Vec<f64>>,
    codes: Vec<u8>,
    rows: usize,
}

impl Bins {
    fn new(rows: ArrayView2<'_, f64>) -> Bins {
        let n = rows.nrows();
        let mut thresholds = Vec::with_capacity(rows.ncols());
        let mut codes = Vec::with_capacity(rows.len());
        for column in rows.columns() {
            let mut sorted: Vec<f64> = column.iter().copied().filter(|x| !x.is_nan()).collect();
            sorted.sort_by(f64::total_cmp);
            let edges = candidate_thresholds(&sorted);
            codes.extend(column.iter().map(|&x| {
                if x.is_nan() {
                    MISSING_BIN
                } else {
                    // At most MAX_BINS − 1 edges, so the code fits below MISSING_BIN.
                    edges.partition_point(|t| *t <= x) as u8
                }
            }));
            thresholds.push(edges);
        }
        Bins {
            thresholds,
            codes,
            rows: n,
        }
    }

    fn code(&self, feature: usize, row: usize) -> u8 {
        self.codes[feature * self.rows + row]
    }
}

/// Every distinct value above the minimum when there are at most
/// `MAX_BINS` of them, otherwise `MAX_BINS − 1` quantiles of `sorted`. A
/// threshold at the minimum would leave the left side empty, so it is
/// never offered.
fn candidate_thresholds(sorted: &[f64]) -> Vec<f64> {
    let Some(&smallest) = sorted.first() else {
        return Vec::new();
    };
    let mut distinct = sorted.to_vec();
    distinct.dedup();
    let mut edges = if distinct.len() <= MAX_BINS {
        distinct
    } else {
        (1..MAX_BINS)
            .map(|k| sorted[k * sorted.len() / MAX_BINS])
            .collect()
    };
    edges.dedup();
    edges.retain(|t| *t > smallest);
    edges
}

struct Split {
    feature: usize,
    /// Rows with a code ≤ this go left.
    last_left_code: usize,
    missing_left: bool,
    gain: f64,
}

struct Grower<'a> {
    bins: &'a Bins,
    gradient: &'a [f64],
    hessian: &'a [f64],
    allowed: &'a [usize],
    depth: usize,
    learning_rate: f64,
    margins: &'a mut [f64],
    /// Scratch (gradient, hessian) sums per bin, reused across nodes.
    histogram: Vec<(f64, f64)>,
    nodes: TreeBody,
}

impl Grower<'_> {
    /// Grows the subtree for `rows` at `level` and returns its node index.
    fn grow(&mut self, rows: Vec<usize>, level: usize) -> i32 {
        let node = self.nodes.left.len();
        self.nodes.feature.push(-1);
        self.nodes.threshold.push(0.0);
        self.nodes.left.push(-1);
        self.nodes.right.push(-1);
        self.nodes.value.push(0.0);
        self.nodes.missing_left.push(true);

        let gradient_sum: f64 = rows.iter().map(|&i| self.gradient[i]).sum();
        let hessian_sum: f64 = rows.iter().map(|&i| self.hessian[i]).sum();
        let split = if level < self.depth {
            self.best_split(&rows, gradient_sum, hessian_sum)
        } else {
            None
        };
        match split {
            Some(split) => {
                let (left_rows, right_rows): (Vec<usize>, Vec<usize>) =
                    rows.iter().partition(|&&i| {
                        let code = self.bins.code(split.feature, i);
                        if code == MISSING_BIN {
                            split.missing_left
                        } else {
                            usize::from(code) <= split.last_left_code
                        }
                    });
                let left = self.grow(left_rows, level + 1);
                let right = self.grow(right_rows, level + 1);
                self.nodes.feature[node] = split.feature as i32;
                self.nodes.threshold[node] =
                    self.bins.thresholds[split.feature][split.last_left_code];
                self.nodes.left[node] = left;
                self.nodes.right[node] = right;
                self.nodes.missing_left[node] = split.missing_left;
            }
            None => {
                let value = -self.learning_rate * gradient_sum / (hessian_sum + LEAF_PENALTY);
                self.nodes.value[node] = value;
                for &i in &rows {
                    self.margins[i] += value;
                }
            }
        }
        node as i32
    }

    fn best_split(&mut self, rows: &[usize], gradient_sum: f64, hessian_sum: f64) -> Option<Split> {
        let score = |g: f64, h: f64| g * g / (h + LEAF_PENALTY);
        let parent_score = score(gradient_sum, hessian_sum);
        let mut best: Option<Split> = None;
        for &feature in self.allowed {
            let edges = self.bins.thresholds[feature].len();
            if edges == 0 {
                continue;
            }
            self.histogram.clear();
            self.histogram.resize(edges + 1, (0.0, 0.0));
            let (mut missing_gradient, mut missing_hessian, mut missing_rows) = (0.0, 0.0, 0usize);
            for &i in rows {
                let code = self.bins.code(feature, i);
                if code == MISSING_BIN {
                    missing_rows += 1;
                    missing_gradient += self.gradient[i];
                    missing_hessian += self.hessian[i];
                } else {
                    let cell = &mut self.histogram[usize::from(code)];
                    cell.0 += self.gradient[i];
                    cell.1 += self.hessian[i];
                }
            }
            let present_gradient = gradient_sum - missing_gradient;
            let present_hessian = hessian_sum - missing_hessian;
            let (mut left_gradient, mut left_hessian) = (0.0, 0.0);
            for (last_left_code, &(g, h)) in self.histogram[..edges].iter().enumerate() {
                left_gradient += g;
                left_hessian += h;
                let right_gradient = present_gradient - left_gradient;
                let right_hessian = present_hessian - left_hessian;
                let directions: &[bool] = if missing_rows > 0 {
                    &[true, false]
                } else {
                    // No NaN here: send future NaN with the majority.
                    if left_hessian >= right_hessian {
                        &[true]
                    } else {
                        &[false]
                    }
                };
                for &missing_left in directions {
                    let (gl, hl, gr, hr) = if missing_left {
                        (
                            left_gradient + missing_gradient,
                            left_hessian + missing_hessian,
                            right_gradient,
                            right_hessian,
                        )
                    } else {
                        (
                            left_gradient,
                            left_hessian,
                            right_gradient + missing_gradient,
                            right_hessian + missing_hessian,
                        )
                    };
                    if hl < MIN_CHILD_HESSIAN || hr < MIN_CHILD_HESSIAN {
                        continue;
                    }
                    let gain = 0.5 * (score(gl, hl) + score(gr, hr) - parent_score);
                    // A tiny floor keeps rounding noise from forcing splits.
                    if gain > best.as_ref().map_or(1e-12, |b| b.gain) {
                        best = Some(Split {
                            feature,
                            last_left_code,
                            missing_left,
                            gain,
                        });
                    }
                }
            }
        }
        best
    }
}

/// Checks shared by both trainers. NaN is refused unless `allow_missing`;
/// infinities always.
fn check_training_data(
    rows: ArrayView2<'_, f64>,
    labels: &[f64],
    allow_missing: bool,
) -> Result<()> {
    let (n, p) = rows.dim();
    if n == 0 || p == 0 {
        return Err(EngineError::new(
            "rows",
            "at least one row and one feature column are required",
        ));
    }
    if labels.len() != n {
        return Err(EngineError::new(
            "labels",
            format!("{} labels given for {n} rows", labels.len()),
        ));
    }
    if let Some(i) = labels.iter().position(|&y| y != 0.0 && y != 1.0) {
        return Err(EngineError::new(
            "labels",
            format!("label {i} is {}; labels must be 0 or 1", labels[i]),
        ));
    }
    let positives = labels.iter().filter(|&&y| y == 1.0).count();
    if positives == 0 || positives == n {
        return Err(EngineError::new(
            "labels",
            "both classes (0 and 1) must occur",
        ));
    }
    for ((i, j), &x) in rows.indexed_iter() {
        if x.is_infinite() || (x.is_nan() && !allow_missing) {
            let hint = if x.is_nan() {
                "; impute it first (see impute_for_linear)"
            } else {
                ""
            };
            return Err(EngineError::new(
                "rows",
                format!("row {i}, column {j} is {x}{hint}"),
            ));
        }
    }
    Ok(())
}

/// ln(1 + e^t) without overflow.
fn softplus(t: f64) -> f64 {
    t.max(0.0) + (-t.abs()).exp().ln_1p()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::demo::applicants::generate;
    use crate::model::{Model, Tree};
    use ndarray::Array2;
    use rand::Rng;
    use rand_distr::StandardNormal;

    fn mean_log_loss(model: &dyn Model, rows: ArrayView2<'_, f64>, labels: &[f64]) -> f64 {
        let mut out = vec![0.0; rows.nrows()];
        model.predict(rows, &mut out);
        let total: f64 = out
            .iter()
            .zip(labels)
            .map(|(&m, &y)| {
                let p = 1.0 / (1.0 + (-m).exp());
                -(y * p.ln() + (1.0 - y) * (1.0 - p).ln())
            })
            .sum();
        total / labels.len() as f64
    }

    #[test]
    fn logistic_fit_meets_the_first_order_conditions() {
        // Source: common practice, no source — at the maximum of a smooth
        // concave objective its gradient vanishes. The gradient of the
        // documented objective is written out here from the definition:
        // (1/n) Σ (y − p) x_j − ridge sd_j² w_j, and (1/n) Σ (y − p).
        let data = generate(2000, 5);
        let rows = impute_for_linear(data.rows.view());
        let ridge = 0.01;
        let model = logistic_regression(rows.view(), &data.labels, ridge).expect("fit");
        let n = rows.nrows() as f64;
        let residual: Vec<f64> = rows
            .rows()
            .into_iter()
            .zip(&data.labels)
            .map(|(x, y)| {
                let margin = model.intercept()
                    + x.iter()
                        .zip(model.weights())
                        .map(|(a, w)| a * w)
                        .sum::<f64>();
                y - 1.0 / (1.0 + (-margin).exp())
            })
            .collect();
        assert!((residual.iter().sum::<f64>() / n).abs() < 1e-9);
        for (j, column) in rows.columns().into_iter().enumerate() {
            let mean = column.sum() / n;
            let sd = (column.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n).sqrt();
            let gradient = column
                .iter()
                .zip(&residual)
                .map(|(x, r)| x * r)
                .sum::<f64>()
                / n
                - ridge * sd * sd * model.weights()[j];
            // Measured per standard deviation, so columns in dollars and in
            // shares are held to the same standard.
            assert!(
                (gradient / sd).abs() < 1e-9,
                "column {j}: gradient {gradient}"
            );
        }
    }

    #[test]
    fn logistic_fit_recovers_known_coefficients() {
        // Source: common practice, no source — maximum likelihood is
        // consistent, so at n = 20,000 the fit lands near the generating
        // coefficients (standard errors here are about 0.01–0.03).
        let mut rng = ChaCha8Rng::seed_from_u64(17);
        let n = 20_000;
        let (truth, intercept) = ([1.0, -0.3, 0.5], -2.0);
        let mut rows = Array2::zeros((n, 3));
        let mut labels = Vec::with_capacity(n);
        for mut row in rows.rows_mut() {
            let a: f64 = rng.sample(StandardNormal);
            let b: f64 = rng.sample(StandardNormal);
            row[0] = a;
            row[1] = rng.random_range(0.0..10.0);
            row[2] = 5.0 + 2.0 * (0.6 * a + 0.8 * b);
            let margin = intercept + row.iter().zip(&truth).map(|(x, w)| x * w).sum::<f64>();
            labels.push(if rng.random::<f64>() < 1.0 / (1.0 + (-margin).exp()) {
                1.0
            } else {
                0.0
            });
        }
        let model = logistic_regression(rows.view(), &labels, 0.0).expect("fit");
        for (estimate, expected) in model.weights().iter().zip(&truth) {
            assert!(
                (estimate - expected).abs() < 0.1,
                "{estimate} vs {expected}"
            );
        }
        assert!(
            (model.intercept() - intercept).abs() < 0.2,
            "{}",
            model.intercept()
        );
    }

    #[test]
    fn bad_training_input_is_refused_by_field() {
        // Source: the crate's error contract (bad input is an EngineError
        // naming the field).
        let rows = ndarray::array![[0.0, 1.0], [1.0, f64::NAN], [2.0, 0.5], [3.0, 0.0]];
        let labels = [0.0, 1.0, 0.0, 1.0];
        let field = |r: Result<LinearModel>| r.unwrap_err().field;
        assert_eq!(
            field(logistic_regression(rows.view(), &labels, 0.1)),
            "rows"
        );
        let complete = impute_for_linear(rows.view());
        assert_eq!(
            field(logistic_regression(complete.view(), &labels[..3], 0.1)),
            "labels"
        );
        assert_eq!(
            field(logistic_regression(
                complete.view(),
                &[0.0, 0.5, 1.0, 1.0],
                0.1
            )),
            "labels"
        );
        assert_eq!(
            field(logistic_regression(complete.view(), &[1.0; 4], 0.1)),
            "labels"
        );
        assert_eq!(
            field(logistic_regression(complete.view(), &labels, -1.0)),
            "ridge"
        );
        // Perfectly separated classes have no finite unpenalised optimum.
        let separable = ndarray::array![[-2.0], [-1.0], [1.0], [2.0]];
        assert_eq!(
            field(logistic_regression(
                separable.view(),
                &[0.0, 0.0, 1.0, 1.0],
                0.0
            )),
            "ridge"
        );
        assert!(logistic_regression(separable.view(), &[0.0, 0.0, 1.0, 1.0], 0.1).is_ok());

        let trees = |t, d, rate| {
            boosted_trees(rows.view(), &labels, t, d, rate, 0)
                .unwrap_err()
                .field
        };
        assert_eq!(trees(0, 2, 0.1), "trees");
        assert_eq!(trees(5, 0, 0.1), "depth");
        assert_eq!(trees(5, MAX_DEPTH + 1, 0.1), "depth");
        assert_eq!(trees(5, 2, 0.0), "learning_rate");
        assert_eq!(trees(5, 2, f64::NAN), "learning_rate");
        let infinite = ndarray::array![[f64::INFINITY], [1.0], [2.0], [3.0]];
        assert_eq!(
            boosted_trees(infinite.view(), &labels, 5, 2, 0.1, 0)
                .unwrap_err()
                .field,
            "rows"
        );
        assert!(boosted_trees(rows.view(), &labels, 5, 2, 0.1, 0).is_ok());
    }

    #[test]
    fn each_tree_lowers_the_training_log_loss() {
        // Source: "Greedy function approximation: a gradient boosting
        // machine", Annals of Statistics 29(5), 2001 — every stage is a
        // descent step on the training loss. The loss of each prefix of the
        // ensemble is measured through the Model trait.
        let data = generate(1500, 3);
        let (ensemble, _) = boost(data.rows.view(), &data.labels, 40, 3, 0.3, 8).expect("train");
        let base = TreeEnsemble::try_new(
            vec![
                Tree::try_new(
                    vec![-1],
                    vec![0.0],
                    vec![-1],
                    vec![-1],
                    vec![0.0],
                    vec![],
                    9,
                )
                .expect("leaf"),
            ],
            ensemble.base_score(),
            Link::Logistic,
            9,
        )
        .expect("base");
        let mut previous = mean_log_loss(&base, data.rows.view(), &data.labels);
        for k in 1..=ensemble.trees().len() {
            let prefix = TreeEnsemble::try_new(
                ensemble.trees()[..k].to_vec(),
                ensemble.base_score(),
                Link::Logistic,
                9,
            )
            .expect("prefix");
            let loss = mean_log_loss(&prefix, data.rows.view(), &data.labels);
            assert!(loss < previous, "tree {k}: {loss} after {previous}");
            previous = loss;
        }
        // Base score is the log-odds of the label mean (the constant that
        // minimises log loss).
        let mean = data.labels.iter().sum::<f64>() / data.labels.len() as f64;
        assert!((ensemble.base_score() - (mean / (1.0 - mean)).ln()).abs() < 1e-12);
    }

    #[test]
    fn model_predictions_match_the_trainer_margins() {
        // Source: the tree convention of the design (`x < threshold` goes
        // left, NaN follows the node's missing direction), which the trainer
        // applies to bin codes and the model to raw values.
        let data = generate(1200, 21);
        let (ensemble, margins) =
            boost(data.rows.view(), &data.labels, 30, 4, 0.2, 4).expect("train");
        let mut out = vec![0.0; data.labels.len()];
        ensemble.predict(data.rows.view(), &mut out);
        for (a, b) in out.iter().zip(&margins) {
            assert!((a - b).abs() < 1e-10, "{a} vs {b}");
        }
        assert!(ensemble.trees().iter().all(|t| t.depth() <= 4));
        assert!(ensemble.accepts_missing() && ensemble.link() == Link::Logistic);
    }

    #[test]
    fn a_stump_takes_the_brute_force_best_split() {
        // Source: "XGBoost: a scalable tree boosting system", KDD 2016 —
        // the split gain ½[G_L²/(H_L+λ) + G_R²/(H_R+λ) − G²/(H+λ)] and the
        // leaf weight −G/(H+λ), searched here by brute force over every
        // distinct value and both sides for NaN.
        let mut rng = ChaCha8Rng::seed_from_u64(31);
        let n = 60;
        let mut rows = Array2::zeros((n, 2));
        let mut labels = Vec::with_capacity(n);
        for i in 0..n {
            let signal: f64 = rng.random();
            rows[[i, 0]] = rng.random::<f64>();
            // A quarter of rows miss feature 1; they behave like high values.
            rows[[i, 1]] = if i % 4 == 0 { f64::NAN } else { signal };
            let high = i % 4 == 0 || signal > 0.6;
            labels.push(if high != (rng.random::<f64>() < 0.1) {
                1.0
            } else {
                0.0
            });
        }
        let (ensemble, _) = boost(rows.view(), &labels, 1, 1, 1.0, 0).expect("train");
        let tree = &ensemble.trees()[0];

        let base = ensemble.base_score();
        let p = 1.0 / (1.0 + (-base).exp());
        let (g, h): (Vec<f64>, Vec<f64>) = labels.iter().map(|y| (p - y, p * (1.0 - p))).unzip();
        let score = |gs: f64, hs: f64| gs * gs / (hs + LEAF_PENALTY);
        let (g_all, h_all) = (g.iter().sum::<f64>(), h.iter().sum::<f64>());
        let mut best = (f64::NEG_INFINITY, 0, 0.0, true, 0.0, 0.0);
        for feature in 0..2 {
            for threshold in rows.column(feature).iter().copied().filter(|x| !x.is_nan()) {
                for missing_left in [true, false] {
                    let left = |i: usize| {
                        let x = rows[[i, feature]];
                        if x.is_nan() {
                            missing_left
                        } else {
                            x < threshold
                        }
                    };
                    let gl: f64 = (0..n).filter(|&i| left(i)).map(|i| g[i]).sum();
                    let hl: f64 = (0..n).filter(|&i| left(i)).map(|i| h[i]).sum();
                    let (gr, hr) = (g_all - gl, h_all - hl);
                    if hl < MIN_CHILD_HESSIAN || hr < MIN_CHILD_HESSIAN {
                        continue;
                    }
                    let gain = 0.5 * (score(gl, hl) + score(gr, hr) - score(g_all, h_all));
                    if gain > best.0 {
                        best = (
                            gain,
                            feature,
                            threshold,
                            missing_left,
                            -gl / (hl + LEAF_PENALTY),
                            -gr / (hr + LEAF_PENALTY),
                        );
                    }
                }
            }
        }
        let (_, feature, threshold, missing_left, left_value, right_value) = best;
        assert_eq!(
            (tree.feature(0), tree.threshold(0), tree.missing_left(0)),
            (feature, threshold, missing_left)
        );
        assert_eq!(feature, 1);
        assert!(
            !missing_left,
            "NaN rows behave like high values and belong right"
        );
        assert!((tree.value(tree.left(0)) - left_value).abs() < 1e-12);
        assert!((tree.value(tree.right(0)) - right_value).abs() < 1e-12);
    }
}
