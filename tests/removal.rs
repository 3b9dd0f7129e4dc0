//! The five removal kinds and the linear closed form, checked through
//! `ModelGame` against values computed independently in the test: brute-force
//! averages, enumerated Shapley values, and multivariate-normal conditioning
//! done with nalgebra's matrix inverse.

use apportion::engine::coalition::all_coalitions;
use apportion::engine::estimate::{exact, linear};
use apportion::engine::removal::{
    ConditionalGaussian, ConditionalNeighbors, Fixed, GaussianFit, Independent, Marginal,
    inverse_scales,
};
use apportion::engine::{
    CachedGame, Coalition, Game, ModelGame, Players, Removal, Summary, Target,
};
use apportion::model::{LinearModel, Link, Model};
use nalgebra::{DMatrix, DVector};
use ndarray::{Array1, Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// A nonlinear test model: `x0·x1 + x2² − x3 (+ 0.5·x4 when there is one)`.
struct Interaction {
    inputs: usize,
}

impl Interaction {
    fn output(row: &[f64]) -> f64 {
        let tail = if row.len() > 4 { 0.5 * row[4] } else { 0.0 };
        row[0] * row[1] + row[2] * row[2] - row[3] + tail
    }
}

impl Model for Interaction {
    fn inputs(&self) -> usize {
        self.inputs
    }
    fn link(&self) -> Link {
        Link::Identity
    }
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        for (row, slot) in rows.rows().into_iter().zip(out.iter_mut()) {
            *slot = Interaction::output(&row.to_vec());
        }
    }
    fn kind(&self) -> &'static str {
        "interaction"
    }
}

/// Output = x_feature², to see the conditional variance through the mean.
struct Square {
    feature: usize,
    inputs: usize,
}

impl Model for Square {
    fn inputs(&self) -> usize {
        self.inputs
    }
    fn link(&self) -> Link {
        Link::Identity
    }
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        for (row, slot) in rows.rows().into_iter().zip(out.iter_mut()) {
            *slot = row[self.feature] * row[self.feature];
        }
    }
    fn kind(&self) -> &'static str {
        "square"
    }
}

fn strings(items: &[&str]) -> Vec<String> {
    items.iter().map(|s| s.to_string()).collect()
}

/// Five features in four players: `g` = {b, d}.
fn grouped_players() -> Players {
    Players::try_new(
        &strings(&["a", "b", "c", "d", "e"]),
        &strings(&["", "g", "", "g", ""]),
    )
    .unwrap()
}

/// Rows of `mean + L z`, z standard normal, L lower triangular: a correlated
/// normal sample with covariance `L Lᵀ`.
fn correlated_normal(rows: usize, seed: u64) -> Array2<f64> {
    let mixing = [
        [1.0, 0.0, 0.0, 0.0, 0.0],
        [0.8, 0.6, 0.0, 0.0, 0.0],
        [-0.5, 0.3, 0.9, 0.0, 0.0],
        [0.2, -0.7, 0.4, 0.5, 0.0],
        [0.6, 0.1, -0.3, 0.2, 0.7],
    ];
    let mean = [1.0, -2.0, 0.5, 3.0, 0.0];
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut background = Array2::zeros((rows, 5));
    for mut row in background.rows_mut() {
        let z: Vec<f64> = (0..5).map(|_| rng.sample(StandardNormal)).collect();
        for i in 0..5 {
            row[i] = mean[i] + (0..=i).map(|k| mixing[i][k] * z[k]).sum::<f64>();
        }
    }
    background
}

fn present_of(players: &Players, coalition: Coalition) -> Vec<bool> {
    (0..players.features())
        .map(|j| coalition.contains(players.player_of(j)))
        .collect()
}

fn row_with(x: &[f64], present: &[bool], other: &[f64]) -> Vec<f64> {
    (0..x.len())
        .map(|j| if present[j] { x[j] } else { other[j] })
        .collect()
}

/// `v(S)` for every coalition, through the engine.
fn game_values(
    model: &dyn Model,
    removal: &dyn Removal,
    players: &Players,
    x: &[f64],
) -> Vec<(Coalition, f64)> {
    let game = ModelGame::try_new(model, removal, players, x, &Target::Output).unwrap();
    let coalitions: Vec<Coalition> = all_coalitions(players.len()).collect();
    let mut values = vec![0.0; coalitions.len()];
    game.values(&coalitions, &mut values);
    coalitions.into_iter().zip(values).collect()
}

fn factorial(n: usize) -> f64 {
    (1..=n).map(|k| k as f64).product()
}

/// Shapley values by the defining formula
/// Σ_S |S|! (p − |S| − 1)! / p! [v(S ∪ i) − v(S)]
/// ("A value for n-person games", Contributions to the Theory of Games II,
/// 1953), over values indexed by coalition bits.
fn naive_shapley(values: &[(Coalition, f64)], players: usize) -> Vec<f64> {
    let value = |c: Coalition| values[c.bits() as usize].1;
    (0..players)
        .map(|i| {
            all_coalitions(players)
                .filter(|s| !s.contains(i))
                .map(|s| {
                    let weight =
                        factorial(s.len()) * factorial(players - s.len() - 1) / factorial(players);
                    weight * (value(s.with(i)) - value(s))
                })
                .sum()
        })
        .collect()
}

/// Raw Banzhaf values: the mean marginal contribution over the 2^(p−1)
/// coalitions of the others ("Weighted voting doesn't work: a mathematical
/// analysis", Rutgers Law Review 19, 1965).
fn naive_banzhaf(values: &[(Coalition, f64)], players: usize) -> Vec<f64> {
    let value = |c: Coalition| values[c.bits() as usize].1;
    (0..players)
        .map(|i| {
            all_coalitions(players)
                .filter(|s| !s.contains(i))
                .map(|s| value(s.with(i)) - value(s))
                .sum::<f64>()
                / 2f64.powi(players as i32 - 1)
        })
        .collect()
}

fn column_means(background: &Array2<f64>) -> Vec<f64> {
    background
        .columns()
        .into_iter()
        .map(|c| c.iter().sum::<f64>() / c.len() as f64)
        .collect()
}

#[test]
fn marginal_and_fixed_values_equal_a_brute_force_average() {
    // Interventional removal averages the model over the background with the
    // present features held at x; fixed removal evaluates one reference row
    // ("A unified approach to interpreting model predictions", NeurIPS
    // 2017). The reference here is the plain loop over rows.
    let background = correlated_normal(12, 1);
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let model = Interaction { inputs: 5 };
    let reference = [1.0, 2.0, -1.0, 0.5, 3.0];
    let marginal = Marginal::try_new(background.view()).unwrap();
    let fixed = Fixed::try_new(reference.to_vec(), 5).unwrap();
    for players in [Players::singletons(5), grouped_players()] {
        for (coalition, value) in game_values(&model, &marginal, &players, &x) {
            let present = present_of(&players, coalition);
            let expected = background
                .rows()
                .into_iter()
                .map(|z| Interaction::output(&row_with(&x, &present, &z.to_vec())))
                .sum::<f64>()
                / background.nrows() as f64;
            assert!(
                (value - expected).abs() < 1e-12,
                "{coalition:?}: {value} vs {expected}"
            );
        }
        for (coalition, value) in game_values(&model, &fixed, &players, &x) {
            let present = present_of(&players, coalition);
            let expected = Interaction::output(&row_with(&x, &present, &reference));
            assert!(
                (value - expected).abs() < 1e-12,
                "{coalition:?}: {value} vs {expected}"
            );
        }
    }
}

#[test]
fn the_linear_closed_form_equals_enumerated_shapley_and_banzhaf_values() {
    // phi_i = w_i (x_i − reference_i) for a linear model under marginal or
    // fixed removal ("A unified approach to interpreting model predictions",
    // NeurIPS 2017); the additive game makes Banzhaf values equal too.
    let background = correlated_normal(20, 2);
    let model =
        LinearModel::try_new(vec![1.5, -2.0, 0.25, 3.0, -0.75], 0.4, Link::Logistic).unwrap();
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let marginal = Marginal::try_new(background.view()).unwrap();
    let means = column_means(&background);
    let fixed_values = vec![-1.0, 0.5, 2.5, 0.0, 1.0];
    let fixed = Fixed::try_new(fixed_values.clone(), 5).unwrap();
    let cases: [(&dyn Removal, &[f64]); 2] = [(&marginal, &means), (&fixed, &fixed_values)];
    for players in [Players::singletons(5), grouped_players()] {
        for (removal, reference) in cases {
            let values = game_values(&model, removal, &players, &x);
            let closed = linear::explain(model.form(), &players, &x, reference).unwrap();
            let shapley = naive_shapley(&values, players.len());
            let banzhaf = naive_banzhaf(&values, players.len());
            for i in 0..players.len() {
                assert!(
                    (closed.values[i] - shapley[i]).abs() < 1e-12,
                    "{i}: {closed:?} {shapley:?}"
                );
                assert!(
                    (closed.values[i] - banzhaf[i]).abs() < 1e-12,
                    "{i}: {closed:?} {banzhaf:?}"
                );
            }
            let full = values.last().unwrap().1;
            assert!((closed.value_full - full).abs() < 1e-12);
            assert!((closed.value_empty - values[0].1).abs() < 1e-12);

            // The enumeration estimator agrees for every summary the additive
            // game makes equal to the closed form.
            let game = ModelGame::try_new(&model, removal, &players, &x, &Target::Output).unwrap();
            let cached = CachedGame::new(&game);
            for summary in [
                Summary::Shapley,
                Summary::Banzhaf,
                Summary::LeaveOneOut,
                Summary::IncludeOne,
            ] {
                let enumerated = exact::explain(&cached, summary).unwrap();
                for i in 0..players.len() {
                    assert!(
                        (closed.values[i] - enumerated.values[i]).abs() < 1e-12,
                        "{summary:?} {i}: {closed:?} {enumerated:?}"
                    );
                }
            }
        }
    }
}

/// Sample mean and covariance (denominator n − 1) of the background,
/// computed here independently of the removal.
fn sample_moments(background: &Array2<f64>) -> (DVector<f64>, DMatrix<f64>) {
    let (rows, features) = background.dim();
    let mean = DVector::from_vec(column_means(background));
    let mut covariance = DMatrix::zeros(features, features);
    for row in background.rows() {
        for a in 0..features {
            for b in 0..features {
                covariance[(a, b)] += (row[a] - mean[a]) * (row[b] - mean[b]);
            }
        }
    }
    (mean, covariance / (rows - 1) as f64)
}

/// Conditional mean and covariance of the missing features of a normal given
/// the present ones, with an explicit inverse of Σ_PP (any multivariate
/// statistics text; Artificial Intelligence 298, 2021, for its use in
/// attribution). Returns the full-length mean (x on the present features).
fn normal_conditional(
    mean: &DVector<f64>,
    covariance: &DMatrix<f64>,
    x: &[f64],
    present: &[bool],
) -> (Vec<f64>, DMatrix<f64>) {
    let p: Vec<usize> = (0..x.len()).filter(|&j| present[j]).collect();
    let m: Vec<usize> = (0..x.len()).filter(|&j| !present[j]).collect();
    let pick = |rows: &[usize], cols: &[usize]| {
        DMatrix::from_fn(rows.len(), cols.len(), |i, k| {
            covariance[(rows[i], cols[k])]
        })
    };
    let mut full = x.to_vec();
    if m.is_empty() {
        return (full, DMatrix::zeros(0, 0));
    }
    if p.is_empty() {
        return (mean.iter().copied().collect(), covariance.clone());
    }
    let inverse = pick(&p, &p).try_inverse().unwrap();
    let offset = DVector::from_fn(p.len(), |i, _| x[p[i]] - mean[p[i]]);
    let gain = pick(&m, &p) * inverse;
    let shift = &gain * offset;
    for (k, &j) in m.iter().enumerate() {
        full[j] = mean[j] + shift[k];
    }
    let conditional = pick(&m, &m) - &gain * pick(&p, &m);
    (full, conditional)
}

#[test]
fn gaussian_removal_of_a_linear_model_gives_the_conditional_mean() {
    // For a linear model the coalition value is w · E[x | x_S] + b, with the
    // multivariate-normal conditional mean (any multivariate statistics text;
    // Artificial Intelligence 298, 2021). One antithetic pair averages to
    // the conditional mean exactly.
    let background = correlated_normal(300, 3);
    let (mean, covariance) = sample_moments(&background);
    let weights = vec![1.5, -2.0, 0.25, 3.0, -0.75];
    let model = LinearModel::try_new(weights.clone(), 0.4, Link::Identity).unwrap();
    let x = [1.5, -1.0, 0.0, 2.0, 0.7];
    let fit = GaussianFit::try_new(background.view()).unwrap();
    for draws in [2, 6] {
        let removal = ConditionalGaussian::try_new(&fit, draws, 11).unwrap();
        for players in [Players::singletons(5), grouped_players()] {
            for (coalition, value) in game_values(&model, &removal, &players, &x) {
                let present = present_of(&players, coalition);
                let (conditional, _) = normal_conditional(&mean, &covariance, &x, &present);
                for (mine, theirs) in fit.conditional_mean(&x, &present).iter().zip(&conditional) {
                    assert!(
                        (mine - theirs).abs() < 1e-9,
                        "{coalition:?}: {mine} vs {theirs}"
                    );
                }
                let expected = 0.4
                    + weights
                        .iter()
                        .zip(&conditional)
                        .map(|(w, v)| w * v)
                        .sum::<f64>();
                assert!(
                    (value - expected).abs() < 1e-9,
                    "{coalition:?}: {value} vs {expected}"
                );
            }
        }
    }
}

#[test]
fn gaussian_draws_carry_the_conditional_variance() {
    // E[X²] = mean² + variance for a normal X (any statistics text), with the
    // conditional mean and variance computed here by explicit inversion. An
    // antithetic pair averages to mean² + a² with a ~ N(0, σ²), whose
    // variance is 2σ⁴: that gives the std error of the average.
    let background = correlated_normal(200, 4);
    let (mean, covariance) = sample_moments(&background);
    let x = [1.5, -1.0, 0.0, 2.0, 0.7];
    let draws = 20_000;
    let fit = GaussianFit::try_new(background.view()).unwrap();
    let removal = ConditionalGaussian::try_new(&fit, draws, 5).unwrap();
    let players = Players::singletons(5);
    let feature = 3;
    let model = Square { feature, inputs: 5 };
    let game = ModelGame::try_new(&model, &removal, &players, &x, &Target::Output).unwrap();
    for present_players in [vec![], vec![0], vec![0, 2], vec![0, 1, 2, 4]] {
        let coalition = present_players
            .iter()
            .fold(Coalition::EMPTY, |c, &i| c.with(i));
        let present = present_of(&players, coalition);
        let (conditional, conditional_covariance) =
            normal_conditional(&mean, &covariance, &x, &present);
        let position = (0..feature).filter(|&j| !present[j]).count();
        let variance = conditional_covariance[(position, position)];
        let expected = conditional[feature].powi(2) + variance;
        let std_error = (2.0 * variance * variance / (draws / 2) as f64).sqrt();
        let mut value = [0.0];
        game.values(&[coalition], &mut value);
        assert!(
            (value[0] - expected).abs() < 4.0 * std_error,
            "{coalition:?}: {} vs {expected} ± {std_error}",
            value[0]
        );
    }
}

#[test]
fn independent_removal_of_an_additive_model_converges_to_marginal() {
    // For an additive model, drawing each missing feature independently from
    // its background marginal has the same expectation as marginal removal;
    // a draw's output variance is Σ_{j missing} w_j² var_j (population
    // variance of the background column), so the std error of the average is
    // known (central limit theorem; any statistics text).
    let background = correlated_normal(40, 6);
    let weights = vec![1.5, -2.0, 0.25, 3.0, -0.75];
    let model = LinearModel::try_new(weights.clone(), 0.4, Link::Identity).unwrap();
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let players = Players::singletons(5);
    let means = column_means(&background);
    let variances: Vec<f64> = background
        .columns()
        .into_iter()
        .zip(&means)
        .map(|(c, m)| c.iter().map(|v| (v - m).powi(2)).sum::<f64>() / c.len() as f64)
        .collect();
    let marginal = Marginal::try_new(background.view()).unwrap();
    let exact = game_values(&model, &marginal, &players, &x);
    let mut largest_errors = Vec::new();
    for draws in [100, 10_000] {
        let removal = Independent::try_new(background.view(), draws, 21).unwrap();
        let mut largest_error = 0.0f64;
        for ((coalition, value), (_, marginal_value)) in game_values(&model, &removal, &players, &x)
            .into_iter()
            .zip(&exact)
        {
            let present = present_of(&players, coalition);
            let draw_variance: f64 = (0..5)
                .filter(|&j| !present[j])
                .map(|j| weights[j] * weights[j] * variances[j])
                .sum();
            let std_error = (draw_variance / draws as f64).sqrt();
            let error = (value - marginal_value).abs();
            assert!(
                error <= 4.0 * std_error + 1e-9,
                "{coalition:?} at {draws}: {error} > 4 × {std_error}"
            );
            largest_error = largest_error.max(error);
        }
        largest_errors.push(largest_error);
    }
    assert!(largest_errors[1] < largest_errors[0], "{largest_errors:?}");
}

fn filled_rows(
    removal: &dyn Removal,
    x: &[f64],
    present: &[bool],
    coalition: Coalition,
) -> Array2<f64> {
    let mut rows = Array2::zeros((removal.rows_per_coalition(), x.len()));
    let mut weights = vec![0.0; removal.rows_per_coalition()];
    removal.fill(
        Array1::from(x.to_vec()).view(),
        present,
        coalition,
        rows.view_mut(),
        &mut weights,
    );
    rows
}

#[test]
fn random_removals_are_seeded_by_coalition() {
    // The per-request cache relies on a coalition always getting the same
    // rows, and reruns must agree bit for bit (TESTING.md, statistical
    // honesty); a different seed must change the draws (common practice, no
    // source).
    let background = correlated_normal(30, 7);
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let players = Players::singletons(5);
    let coalition = Coalition::singleton(1).with(3);
    let other = Coalition::singleton(1);
    let present = present_of(&players, coalition);
    let independent = Independent::try_new(background.view(), 16, 1).unwrap();
    let independent_again = Independent::try_new(background.view(), 16, 1).unwrap();
    let independent_reseeded = Independent::try_new(background.view(), 16, 2).unwrap();
    let fit = GaussianFit::try_new(background.view()).unwrap();
    let fit_again = GaussianFit::try_new(background.view()).unwrap();
    let gaussian = ConditionalGaussian::try_new(&fit, 16, 1).unwrap();
    let gaussian_again = ConditionalGaussian::try_new(&fit_again, 16, 1).unwrap();
    let gaussian_reseeded = ConditionalGaussian::try_new(&fit, 16, 2).unwrap();
    for (removal, again, reseeded) in [
        (
            &independent as &dyn Removal,
            &independent_again as &dyn Removal,
            &independent_reseeded as &dyn Removal,
        ),
        (&gaussian, &gaussian_again, &gaussian_reseeded),
    ] {
        let first = filled_rows(removal, &x, &present, coalition);
        // Another coalition in between must not disturb the stream.
        let _ = filled_rows(removal, &x, &present_of(&players, other), other);
        assert_eq!(first, filled_rows(removal, &x, &present, coalition));
        assert_eq!(first, filled_rows(again, &x, &present, coalition));
        assert_ne!(first, filled_rows(reseeded, &x, &present, coalition));
        // The same present features under another coalition label get other
        // draws: the seed follows the coalition.
        assert_ne!(
            first,
            filled_rows(removal, &x, &present, Coalition::singleton(4))
        );
    }
}

#[test]
fn neighbors_with_a_huge_width_equal_marginal() {
    // As width → ∞ the kernel exp(−d²/(2 width²)) → 1 for every row, which
    // is uniform weighting, i.e. marginal removal (limit of the Gaussian
    // kernel; common practice, no source). Compared with the brute-force
    // marginal average.
    let background = correlated_normal(25, 8);
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let model = Interaction { inputs: 5 };
    let scales = inverse_scales(background.view()).unwrap();
    let neighbors = ConditionalNeighbors::try_new(background.view(), &scales, 1e8).unwrap();
    for players in [Players::singletons(5), grouped_players()] {
        for (coalition, value) in game_values(&model, &neighbors, &players, &x) {
            let present = present_of(&players, coalition);
            let expected = background
                .rows()
                .into_iter()
                .map(|z| Interaction::output(&row_with(&x, &present, &z.to_vec())))
                .sum::<f64>()
                / background.nrows() as f64;
            assert!(
                (value - expected).abs() < 1e-9,
                "{coalition:?}: {value} vs {expected}"
            );
        }
    }
}

#[test]
fn neighbors_with_a_tiny_width_follow_the_nearest_row() {
    // As width → 0 the kernel puts all weight on the background row nearest
    // to x on the present features (distance standardised by each feature's
    // background std), so v(S) is the model at x_S completed by that row
    // (nearest-neighbour limit of kernel weighting, as in the empirical
    // approach of Artificial Intelligence 298, 2021). The nearest row is
    // found here by a direct search.
    let background = correlated_normal(25, 9);
    let x = [0.3, -1.2, 2.0, 0.7, -0.4];
    let model = Interaction { inputs: 5 };
    let stds: Vec<f64> = background
        .columns()
        .into_iter()
        .map(|c| {
            let m = c.iter().sum::<f64>() / c.len() as f64;
            (c.iter().map(|v| (v - m).powi(2)).sum::<f64>() / c.len() as f64).sqrt()
        })
        .collect();
    let width = 1e-4;
    let scales = inverse_scales(background.view()).unwrap();
    let neighbors = ConditionalNeighbors::try_new(background.view(), &scales, width).unwrap();
    let players = Players::singletons(5);
    for (coalition, value) in game_values(&model, &neighbors, &players, &x) {
        if coalition.is_empty() {
            continue;
        }
        let present = present_of(&players, coalition);
        let mut distances: Vec<(f64, usize)> = background
            .rows()
            .into_iter()
            .enumerate()
            .map(|(r, z)| {
                let d: f64 = (0..5)
                    .filter(|&j| present[j])
                    .map(|j| ((x[j] - z[j]) / stds[j]).powi(2))
                    .sum();
                (d / coalition.len() as f64, r)
            })
            .collect();
        distances.sort_by(|a, b| a.0.total_cmp(&b.0));
        // The runner-up must be far enough that its weight
        // exp(−gap / (2 width²)) is negligible.
        assert!(
            distances[1].0 - distances[0].0 > 1e-6,
            "{coalition:?}: rows too close to separate"
        );
        let nearest = background.row(distances[0].1).to_vec();
        let expected = Interaction::output(&row_with(&x, &present, &nearest));
        assert!(
            (value - expected).abs() < 1e-9,
            "{coalition:?}: {value} vs {expected}"
        );
    }
}

#[test]
fn bad_settings_are_refused_with_their_field() {
    // Field names as the API spells them (DESIGN.md); common practice, no
    // source.
    let background = correlated_normal(5, 10);
    let one_row = background.slice(ndarray::s![..1, ..]);
    let no_rows = background.slice(ndarray::s![..0, ..]);
    assert_eq!(
        Fixed::try_new(vec![0.0; 4], 5).unwrap_err().field,
        "fixed_values"
    );
    assert_eq!(
        Fixed::background_mean(no_rows).unwrap_err().field,
        "background"
    );
    assert_eq!(Marginal::try_new(no_rows).unwrap_err().field, "background");
    assert_eq!(
        Independent::try_new(no_rows, 4, 0).unwrap_err().field,
        "background"
    );
    assert_eq!(
        Independent::try_new(background.view(), 0, 0)
            .unwrap_err()
            .field,
        "draws"
    );
    let fit = GaussianFit::try_new(background.view()).unwrap();
    assert_eq!(
        ConditionalGaussian::try_new(&fit, 3, 0).unwrap_err().field,
        "draws"
    );
    assert_eq!(
        GaussianFit::try_new(one_row).unwrap_err().field,
        "background"
    );
    let scales = inverse_scales(background.view()).unwrap();
    assert_eq!(
        ConditionalNeighbors::try_new(background.view(), &scales, 0.0)
            .unwrap_err()
            .field,
        "width"
    );
    assert_eq!(
        ConditionalNeighbors::try_new(background.view(), &scales, -2.0)
            .unwrap_err()
            .field,
        "width"
    );
    assert_eq!(
        ConditionalNeighbors::try_new(background.view(), &scales[..4], 1.0)
            .unwrap_err()
            .field,
        "background"
    );
    assert_eq!(inverse_scales(no_rows).unwrap_err().field, "background");
}

/// Income in currency units (~N(5e4, 1e4²)), a ratio (~N(0.3, 0.01²))
/// correlated with it at 0.8, and a third feature (~N(10, 3²)) made exactly
/// uncorrelated with both in the sample by Gram–Schmidt, so that the
/// bivariate conditional mean holds whether it is present or not. Feature
/// variances differ by 10^12.
fn currency_and_ratio(rows: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut data = Array2::zeros((rows, 3));
    for mut row in data.rows_mut() {
        let z: [f64; 3] = [
            rng.sample(StandardNormal),
            rng.sample(StandardNormal),
            rng.sample(StandardNormal),
        ];
        row[0] = 5e4 + 1e4 * z[0];
        row[1] = 0.3 + 0.01 * (0.8 * z[0] + 0.6 * z[1]);
        row[2] = 3.0 * z[2];
    }
    let centred = |column: Vec<f64>| {
        let mean = column.iter().sum::<f64>() / column.len() as f64;
        column.into_iter().map(|v| v - mean).collect::<Vec<f64>>()
    };
    let dot = |a: &[f64], b: &[f64]| a.iter().zip(b).map(|(u, v)| u * v).sum::<f64>();
    let minus_projection = |target: &mut Vec<f64>, basis: &[f64]| {
        let k = dot(target, basis) / dot(basis, basis);
        for (t, b) in target.iter_mut().zip(basis) {
            *t -= k * b;
        }
    };
    let first = centred(data.column(0).to_vec());
    let mut second = centred(data.column(1).to_vec());
    minus_projection(&mut second, &first);
    let mut third = centred(data.column(2).to_vec());
    minus_projection(&mut third, &first);
    minus_projection(&mut third, &second);
    for (slot, value) in data.column_mut(2).iter_mut().zip(&third) {
        *slot = 10.0 + value;
    }
    data
}

#[test]
fn gaussian_conditional_means_hold_when_variances_differ_by_twelve_orders() {
    // E[x_t | x_g] = μ_t + (Σ_tg / Σ_gg)(x_g − μ_g), the bivariate normal
    // conditional mean (any multivariate statistics text; Artificial
    // Intelligence 298, 2021, for its use in attribution), with the sample
    // mean and covariance computed here. The third feature is uncorrelated
    // with both in the sample, so the same formula holds whether it is
    // present or missing, and when missing its conditional mean is its own
    // mean. Checked to 1e-9 of the shift E[x_t | x_g] − μ_t, which is
    // stricter than 1e-9 of the value.
    let data = currency_and_ratio(400, 12);
    let rows = data.nrows() as f64;
    let mean: Vec<f64> = (0..3).map(|j| data.column(j).sum() / rows).collect();
    let covariance = |a: usize, b: usize| {
        data.rows()
            .into_iter()
            .map(|r| (r[a] - mean[a]) * (r[b] - mean[b]))
            .sum::<f64>()
            / (rows - 1.0)
    };
    let fit = GaussianFit::try_new(data.view()).unwrap();
    // Two std deviations out on each feature, so every shift is sizeable.
    for x in [[3e4, 0.32, 4.0], [7e4, 0.28, 16.0]] {
        for (missing, given) in [(0, 1), (1, 0)] {
            for third_present in [false, true] {
                let mut present = [false; 3];
                present[given] = true;
                present[2] = third_present;
                let filled = fit.conditional_mean(&x, &present);
                let shift = covariance(missing, given) / covariance(given, given)
                    * (x[given] - mean[given]);
                let expected = mean[missing] + shift;
                let error = (filled[missing] - expected).abs();
                assert!(
                    error <= 1e-9 * shift.abs(),
                    "feature {missing} given {present:?}: {} vs {expected} (shift {shift})",
                    filled[missing]
                );
                assert_eq!(filled[given], x[given]);
                if third_present {
                    assert_eq!(filled[2], x[2]);
                } else {
                    assert!((filled[2] - mean[2]).abs() <= 1e-9 * mean[2]);
                }
            }
        }
    }
}

#[test]
fn rescaling_a_feature_rescales_only_its_own_conditional_mean() {
    // Conditioning commutes with rescaling a coordinate: if y_k = c x_k then
    // E[y_k | ·] = c E[x_k | ·] and the other conditional means do not move
    // (a linear change of variables in the multivariate normal; any
    // multivariate statistics text). Compared to 1e-9 of each feature's
    // sample std deviation.
    let background = correlated_normal(300, 13);
    let x = [1.5, -1.0, 0.0, 2.0, 0.7];
    let stds: Vec<f64> = (0..5)
        .map(|j| {
            let column = background.column(j);
            let m = column.sum() / column.len() as f64;
            (column.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (column.len() - 1) as f64).sqrt()
        })
        .collect();
    let fit = GaussianFit::try_new(background.view()).unwrap();
    let factor = 1e6;
    for scaled in 0..5 {
        let mut rescaled = background.clone();
        rescaled.column_mut(scaled).mapv_inplace(|v| v * factor);
        let mut y = x;
        y[scaled] *= factor;
        let rescaled_fit = GaussianFit::try_new(rescaled.view()).unwrap();
        for coalition in all_coalitions(5) {
            let present: Vec<bool> = (0..5).map(|j| coalition.contains(j)).collect();
            let original = fit.conditional_mean(&x, &present);
            let after = rescaled_fit.conditional_mean(&y, &present);
            for j in 0..5 {
                let unit = if j == scaled { factor } else { 1.0 };
                assert!(
                    (after[j] / unit - original[j]).abs() <= 1e-9 * stds[j],
                    "feature {scaled} × {factor}, {coalition:?}, feature {j}: {} vs {}",
                    after[j] / unit,
                    original[j]
                );
            }
        }
    }
}
