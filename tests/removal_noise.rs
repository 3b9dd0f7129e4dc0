//! Removal noise in the std errors: INDEPENDENT and CONDITIONAL_GAUSSIAN
//! removal make every coalition value a mean of random draws, and exact
//! enumeration (and the samplers) must say how far that noise can move the
//! answer. Checked against closed-form games of the expected values: over
//! many seeds, ±1.96 std errors must cover the closed form in 88–99% of
//! trials (TESTING.md's rule), and the std errors must shrink as draws grow.

use apportion::engine::estimate::{exact, msr, permutation, regression};
use apportion::engine::removal::{ConditionalGaussian, GaussianFit, Independent};
use apportion::engine::{
    CachedGame, Coalition, Estimate, FnGame, Kernel, ModelGame, Players, Removal, Stopping,
    Summary, Target,
};
use apportion::model::{LinearModel, Link, Model};
use nalgebra::{DMatrix, DVector};
use ndarray::{Array2, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

const FEATURES: usize = 8;
const SEEDS: u64 = 200;

fn players() -> Players {
    let names: Vec<String> = (0..FEATURES).map(|j| format!("x{j}")).collect();
    Players::try_new(&names, &vec![String::new(); FEATURES]).unwrap()
}

/// A correlated normal sample: `x = L z` plus a mean, with a fixed banded
/// lower-triangular `L`.
fn background(rows: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut out = Array2::zeros((rows, FEATURES));
    for mut row in out.rows_mut() {
        let z: Vec<f64> = (0..FEATURES).map(|_| rng.sample(StandardNormal)).collect();
        for i in 0..FEATURES {
            let mixed: f64 = (0..=i)
                .map(|k| z[k] * if k == i { 1.0 } else { 0.6 / (i - k) as f64 })
                .sum();
            row[i] = 0.5 * i as f64 - 1.0 + mixed;
        }
    }
    out
}

fn linear() -> LinearModel {
    let weights = vec![1.5, -2.0, 0.7, 3.0, -0.4, 1.1, -1.3, 0.9];
    LinearModel::try_new(weights, 0.25, Link::Identity).unwrap()
}

const INSTANCE: [f64; FEATURES] = [1.2, -0.3, 2.5, 0.4, -1.7, 3.1, 0.8, -0.6];

/// Shapley values of a table of coalition values by the permutation
/// formula `Σ_S |S|! (p-|S|-1)! / p! (v(S ∪ i) - v(S))`, written out here
/// independently of the engine ("A value for n-person games", Contributions
/// to the Theory of Games II, 1953).
fn shapley_of(table: &[f64], players: usize) -> Vec<f64> {
    let factorial = |n: usize| (1..=n).map(|k| k as f64).product::<f64>();
    (0..players)
        .map(|i| {
            (0..table.len())
                .filter(|bits| bits >> i & 1 == 0)
                .map(|bits| {
                    let s = (bits as u64).count_ones() as usize;
                    factorial(s) * factorial(players - s - 1) / factorial(players)
                        * (table[bits | 1 << i] - table[bits])
                })
                .sum()
        })
        .collect()
}

/// Share of (seed, player) trials whose ±1.96 std errors cover `truth`.
fn coverage(estimates: &[Estimate], truth: &[f64]) -> f64 {
    let trials = estimates.len() * truth.len();
    let covered = estimates
        .iter()
        .flat_map(|e| e.values.iter().zip(&e.std_errors).zip(truth))
        .filter(|((value, se), t)| (*value - *t).abs() <= 1.96 * *se)
        .count();
    covered as f64 / trials as f64
}

fn mean_std_error(estimates: &[Estimate]) -> f64 {
    let all: Vec<f64> = estimates
        .iter()
        .flat_map(|e| e.std_errors.clone())
        .collect();
    all.iter().sum::<f64>() / all.len() as f64
}

fn check_coverage(name: &str, share: f64) {
    println!("{name}: coverage {:.1}%", 100.0 * share);
    assert!((0.88..=0.99).contains(&share), "{name}: coverage {share}");
}

/// Exact enumeration under INDEPENDENT removal of a linear model, against
/// the closed form: in expectation over the draws the game is marginal
/// removal, whose Shapley values are `w_i (x_i − mean_bg x_i)` ("A unified
/// approach to interpreting model predictions", NeurIPS 2017).
#[test]
fn exact_enumeration_under_independent_removal_covers_the_marginal_closed_form() {
    let model = linear();
    let players = players();
    let background = background(200, 3);
    let truth: Vec<f64> = (0..FEATURES)
        .map(|j| model.weights()[j] * (INSTANCE[j] - background.column(j).mean().unwrap()))
        .collect();
    let mut by_draws = Vec::new();
    for draws in [8, 32] {
        let estimates: Vec<Estimate> = (0..SEEDS)
            .map(|seed| {
                let removal = Independent::try_new(background.view(), draws, seed).unwrap();
                explain(&model, &removal, &players, Summary::Shapley)
            })
            .collect();
        // Std errors of about 0.1 against a tolerance of 1e-3.
        assert!(estimates.iter().all(|e| !e.converged));
        check_coverage(
            &format!("independent, {draws} draws"),
            coverage(&estimates, &truth),
        );
        by_draws.push(mean_std_error(&estimates));
    }
    // Four times the draws: half the std error (the square-root law; common
    // practice, no source), within sampling slack.
    let ratio = by_draws[1] / by_draws[0];
    println!("std error ratio, 32 vs 8 draws: {ratio:.3}");
    assert!((0.4..0.6).contains(&ratio), "{ratio}");
}

/// Every other exact summary under the same removal: the expected game is
/// additive (`v(S) = Σ_{i∈S} w_i x_i + Σ_{i∉S} w_i mean_i + b`), so
/// Banzhaf, leave-one-out, include-one and any kernel-weighted fit all equal
/// `w_i (x_i − mean_i)` too (an additive game's marginal contributions are
/// constant; the fit of an exactly additive game is that game; common
/// practice, no source). Selection is left out: its std errors are given
/// the greedy path and do not cover the choice of path.
#[test]
fn every_exact_summary_covers_the_additive_closed_form() {
    let model = linear();
    let players = players();
    let background = background(200, 3);
    let truth: Vec<f64> = (0..FEATURES)
        .map(|j| model.weights()[j] * (INSTANCE[j] - background.column(j).mean().unwrap()))
        .collect();
    for summary in [
        Summary::Banzhaf,
        Summary::LeaveOneOut,
        Summary::IncludeOne,
        Summary::LinearFit(Kernel::Shapley),
        Summary::LinearFit(Kernel::Exponential { width: 1.5 }),
    ] {
        let estimates: Vec<Estimate> = (0..SEEDS)
            .map(|seed| {
                let removal = Independent::try_new(background.view(), 8, seed).unwrap();
                explain(&model, &removal, &players, summary)
            })
            .collect();
        check_coverage(&format!("{summary:?}"), coverage(&estimates, &truth));
    }
}

/// The samplers under the same removal, with the cap below `2^p` so that
/// coalitions are reused across samples: the expected game is additive, so
/// permutation and leverage regression have no sampling error at all and
/// everything their std errors must cover is removal noise, much of it in
/// values the cache hands to many samples. MSR's Banzhaf values of the
/// additive game are the same closed form. Paired regression draws pairs
/// with replacement, so at p = 8 many are drawn more than once.
#[test]
fn samplers_cover_the_closed_form_when_cached_noisy_values_are_reused() {
    let model = linear();
    let players = players();
    let background = background(200, 3);
    let truth: Vec<f64> = (0..FEATURES)
        .map(|j| model.weights()[j] * (INSTANCE[j] - background.column(j).mean().unwrap()))
        .collect();
    type Sampler = fn(&CachedGame, &Stopping, u64) -> apportion::engine::Result<Estimate>;
    fn paired(
        game: &CachedGame,
        stopping: &Stopping,
        seed: u64,
    ) -> apportion::engine::Result<Estimate> {
        regression::paired(game, Kernel::Shapley, stopping, seed)
    }
    let samplers: [(&str, Sampler, u64); 5] = [
        ("permutation", permutation::shapley, 120),
        ("permutation, every coalition", permutation::shapley, 4096),
        ("paired", paired, 120),
        ("leverage", regression::leverage, 120),
        ("msr", msr::banzhaf, 120),
    ];
    for (name, sampler, cap) in samplers {
        let estimates: Vec<Estimate> = (0..SEEDS)
            .map(|seed| {
                let removal = Independent::try_new(background.view(), 8, seed).unwrap();
                let game =
                    ModelGame::try_new(&model, &removal, &players, &INSTANCE, &Target::Output)
                        .unwrap();
                let cached = CachedGame::new(&game);
                sampler(&cached, &Stopping::evaluations(cap), seed ^ 0x5eed).unwrap()
            })
            .collect();
        check_coverage(name, coverage(&estimates, &truth));
    }
}

/// A zero-width game (`v(all) = v(none)`) that is identically zero: every
/// sampler converges at once under the default tolerance instead of running
/// to the cap (the answer is exactly 0; common practice, no source).
#[test]
fn a_zero_game_converges_at_once() {
    let game = FnGame::new(6, |_: Coalition| 0.0);
    let tolerance = apportion::engine::estimate::default_tolerance(0.0, 0.0);
    assert!(tolerance > 0.0);
    type Sampler = fn(&CachedGame, &Stopping, u64) -> apportion::engine::Result<Estimate>;
    let samplers: [Sampler; 3] = [permutation::shapley, regression::leverage, msr::banzhaf];
    for sampler in samplers {
        let cached = CachedGame::new(&game);
        let stopping = Stopping {
            tolerance,
            ..Stopping::evaluations(1 << 20)
        };
        let estimate = sampler(&cached, &stopping, 1).unwrap();
        assert!(estimate.converged);
        assert!(estimate.values.iter().all(|v| *v == 0.0));
        assert!(cached.evaluations() <= 64, "{}", cached.evaluations());
    }
    let paired = CachedGame::new(&game);
    let stopping = Stopping {
        tolerance,
        ..Stopping::evaluations(1 << 20)
    };
    assert!(
        regression::paired(&paired, Kernel::Shapley, &stopping, 1)
            .unwrap()
            .converged
    );
    // Ends that coincide away from zero give a tolerance on the game's own
    // scale, not zero.
    assert_eq!(
        apportion::engine::estimate::default_tolerance(2.0, 2.0),
        0.01 * 2e-3
    );
    assert_eq!(
        apportion::engine::estimate::default_tolerance(1.0, 3.0),
        0.02
    );
}

/// The model of the Gaussian check: `w·x + Σ_j a_j x_j² + b`. Antithetic
/// pairs make a linear model's draws average exactly to the conditional
/// mean (no noise to report), so the squares are what carries the noise;
/// the closed form is still the normal's: `E[x_j² | x_S] = m_j² + C_jj`
/// with the conditional mean `m` and covariance `C`.
struct Quadratic {
    linear: LinearModel,
    squares: Vec<f64>,
}

impl Model for Quadratic {
    fn inputs(&self) -> usize {
        FEATURES
    }
    fn link(&self) -> Link {
        Link::Identity
    }
    fn predict(&self, rows: ArrayView2<'_, f64>, out: &mut [f64]) {
        self.linear.predict(rows, out);
        for (row, slot) in rows.rows().into_iter().zip(out.iter_mut()) {
            *slot += row
                .iter()
                .zip(&self.squares)
                .map(|(x, a)| a * x * x)
                .sum::<f64>();
        }
    }
    fn kind(&self) -> &'static str {
        "quadratic"
    }
}

/// The sample mean and covariance (divisor n − 1), as the Gaussian fit
/// takes them.
fn moments(data: &Array2<f64>) -> (DVector<f64>, DMatrix<f64>) {
    let (rows, features) = data.dim();
    let mean = DVector::from_fn(features, |j, _| data.column(j).mean().unwrap());
    let mut covariance = DMatrix::zeros(features, features);
    for row in data.rows() {
        for a in 0..features {
            for b in 0..features {
                covariance[(a, b)] += (row[a] - mean[a]) * (row[b] - mean[b]);
            }
        }
    }
    (mean, covariance / (rows - 1) as f64)
}

/// `E[f(x) | x_S]` for the quadratic model by multivariate-normal
/// conditioning with an explicit inverse (any multivariate statistics text;
/// Artificial Intelligence 298, 2021, "Explaining individual predictions
/// when features are dependent: more accurate approximations to Shapley
/// values", for its use in attribution).
fn conditional_value(
    model: &Quadratic,
    mean: &DVector<f64>,
    covariance: &DMatrix<f64>,
    coalition: usize,
) -> f64 {
    let present: Vec<usize> = (0..FEATURES).filter(|j| coalition >> j & 1 == 1).collect();
    let missing: Vec<usize> = (0..FEATURES).filter(|j| coalition >> j & 1 == 0).collect();
    let pick = |rows: &[usize], cols: &[usize]| {
        DMatrix::from_fn(rows.len(), cols.len(), |i, k| {
            covariance[(rows[i], cols[k])]
        })
    };
    let mut m: Vec<f64> = INSTANCE.to_vec();
    let mut c = [0.0; FEATURES];
    if present.is_empty() {
        for j in 0..FEATURES {
            m[j] = mean[j];
            c[j] = covariance[(j, j)];
        }
    } else if !missing.is_empty() {
        let inverse = pick(&present, &present).try_inverse().unwrap();
        let gain = pick(&missing, &present) * inverse;
        let offset = DVector::from_fn(present.len(), |i, _| {
            INSTANCE[present[i]] - mean[present[i]]
        });
        let shift = &gain * offset;
        let conditional = pick(&missing, &missing) - &gain * pick(&present, &missing);
        for (k, &j) in missing.iter().enumerate() {
            m[j] = mean[j] + shift[k];
            c[j] = conditional[(k, k)];
        }
    }
    let weights = model.linear.weights();
    (0..FEATURES)
        .map(|j| weights[j] * m[j] + model.squares[j] * (m[j] * m[j] + c[j]))
        .sum::<f64>()
        + model.linear.intercept()
}

/// Exact enumeration under CONDITIONAL_GAUSSIAN removal: the Shapley values
/// of the closed-form game (enumerated here) must be covered. For the
/// linear part alone the antithetic pairs leave no noise, so a linear model
/// must come out at the closed form with std errors of rounding size.
#[test]
fn exact_enumeration_under_gaussian_removal_covers_the_conditional_closed_form() {
    let players = players();
    let background = background(400, 5);
    let fit = GaussianFit::try_new(background.view()).unwrap();
    let (mean, covariance) = moments(&background);
    let model = Quadratic {
        linear: linear(),
        squares: vec![0.3, -0.2, 0.5, 0.1, -0.4, 0.25, 0.2, -0.15],
    };
    let table: Vec<f64> = (0..1usize << FEATURES)
        .map(|bits| conditional_value(&model, &mean, &covariance, bits))
        .collect();
    let truth = shapley_of(&table, FEATURES);
    let mut by_draws = Vec::new();
    for draws in [8, 32] {
        let estimates: Vec<Estimate> = (0..SEEDS)
            .map(|seed| {
                let removal = ConditionalGaussian::try_new(&fit, draws, seed).unwrap();
                explain(&model, &removal, &players, Summary::Shapley)
            })
            .collect();
        check_coverage(
            &format!("gaussian, {draws} draws"),
            coverage(&estimates, &truth),
        );
        by_draws.push(mean_std_error(&estimates));
    }
    let ratio = by_draws[1] / by_draws[0];
    println!("std error ratio, 32 vs 8 draws: {ratio:.3}");
    assert!((0.4..0.6).contains(&ratio), "{ratio}");

    // The quadratic model with no squares is the linear model itself.
    let plain = Quadratic {
        linear: linear(),
        squares: vec![0.0; FEATURES],
    };
    let linear_table: Vec<f64> = (0..1usize << FEATURES)
        .map(|bits| conditional_value(&plain, &mean, &covariance, bits))
        .collect();
    let linear_truth = shapley_of(&linear_table, FEATURES);
    let removal = ConditionalGaussian::try_new(&fit, 8, 1).unwrap();
    let estimate = explain(&plain.linear, &removal, &players, Summary::Shapley);
    for ((value, se), t) in estimate
        .values
        .iter()
        .zip(&estimate.std_errors)
        .zip(&linear_truth)
    {
        assert!(
            (value - t).abs() < 1e-9 && *se < 1e-9,
            "{value} ± {se} vs {t}"
        );
    }
    assert!(estimate.converged);
}

/// Exact enumeration's answer over `removal`, with the default tolerance.
fn explain(
    model: &dyn Model,
    removal: &dyn Removal,
    players: &Players,
    summary: Summary,
) -> Estimate {
    let game = ModelGame::try_new(model, removal, players, &INSTANCE, &Target::Output).unwrap();
    let cached = CachedGame::new(&game);
    let stopping = Stopping {
        tolerance: 1e-3,
        ..Stopping::unbounded()
    };
    exact::explain_within(&cached, summary, &stopping).unwrap()
}
