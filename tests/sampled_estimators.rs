//! The sampled estimators (permutation, paired and leverage regression,
//! maximum sample reuse) and the exact linear fit, checked against exact
//! values enumerated here, closed forms and a published game; plus the
//! statistical honesty of their std errors (shared/TESTING.md, "Statistical
//! honesty of sampled estimators").

use std::time::Instant;

use apportion::engine::estimate::{msr, permutation, regression};
use apportion::engine::{
    CachedGame, CancelFlag, Coalition, Estimate, FnGame, Game, Kernel, Result, Stopping,
};
use apportion::model::{Link, Model, Tree, TreeEnsemble};
use nalgebra::{DMatrix, DVector};
use ndarray::ArrayView2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

const EXPONENTIAL: Kernel = Kernel::Exponential { width: 1.5 };

/// The sampled estimators under test, by name.
#[derive(Clone, Copy, Debug)]
enum Sampler {
    Permutation,
    PairedShapley,
    PairedExponential,
    Leverage,
    Banzhaf,
}

const SAMPLERS: [Sampler; 5] = [
    Sampler::Permutation,
    Sampler::PairedShapley,
    Sampler::PairedExponential,
    Sampler::Leverage,
    Sampler::Banzhaf,
];

impl Sampler {
    fn run(self, game: &CachedGame, stopping: &Stopping, seed: u64) -> Result<Estimate> {
        match self {
            Sampler::Permutation => permutation::shapley(game, stopping, seed),
            Sampler::PairedShapley => regression::paired(game, Kernel::Shapley, stopping, seed),
            Sampler::PairedExponential => regression::paired(game, EXPONENTIAL, stopping, seed),
            Sampler::Leverage => regression::leverage(game, stopping, seed),
            Sampler::Banzhaf => msr::banzhaf(game, stopping, seed),
        }
    }

    /// The exact value this sampler estimates, from the full table of
    /// coalition values.
    fn reference(self, players: usize, table: &[f64]) -> Vec<f64> {
        match self {
            Sampler::Permutation | Sampler::PairedShapley | Sampler::Leverage => {
                naive_shapley(players, table)
            }
            Sampler::PairedExponential => direct_weighted_fit(players, table, EXPONENTIAL),
            Sampler::Banzhaf => naive_banzhaf(players, table),
        }
    }

    fn is_efficient(self) -> bool {
        !matches!(self, Sampler::Banzhaf)
    }
}

fn table_of(players: usize, value: impl Fn(Coalition) -> f64) -> Vec<f64> {
    (0u128..1 << players)
        .map(|bits| value(Coalition::from_bits(bits)))
        .collect()
}

fn binomial(n: usize, k: usize) -> f64 {
    (0..k).fold(1.0, |c, i| c * (n - i) as f64 / (i + 1) as f64)
}

/// Shapley values straight from the definition: the weighted mean of
/// marginal contributions, weight `s! (p - s - 1)! / p!` for a coalition of
/// size s without i ("A value for n-person games", Contributions to the
/// Theory of Games II, Annals of Mathematics Studies 28, 1953).
fn naive_shapley(players: usize, table: &[f64]) -> Vec<f64> {
    let factorial = |n: usize| (1..=n).map(|k| k as f64).product::<f64>();
    (0..players)
        .map(|i| {
            (0..table.len())
                .filter(|bits| bits >> i & 1 == 0)
                .map(|bits| {
                    let s = (bits as u64).count_ones() as usize;
                    let weight = factorial(s) * factorial(players - s - 1) / factorial(players);
                    weight * (table[bits | 1 << i] - table[bits])
                })
                .sum()
        })
        .collect()
}

/// Raw Banzhaf values from the definition: the plain mean of marginal
/// contributions over the 2^(p-1) coalitions without i ("Weighted voting
/// doesn't work: a mathematical analysis", Rutgers Law Review 19, 1965).
fn naive_banzhaf(players: usize, table: &[f64]) -> Vec<f64> {
    (0..players)
        .map(|i| {
            let total: f64 = (0..table.len())
                .filter(|bits| bits >> i & 1 == 0)
                .map(|bits| table[bits | 1 << i] - table[bits])
                .sum();
            total / (1u64 << (players - 1)) as f64
        })
        .collect()
}

/// The constrained weighted least-squares fit by a route independent of the
/// estimator's: substitute `phi_last = Δ - Σ_{k<last} phi_k`, scale each
/// coalition's row by the square root of its kernel weight and solve the
/// unconstrained problem by SVD (common practice, no source). Kernel weights
/// as documented on `Kernel`: Shapley `(p-1)/(C(p,s) s (p-s))` ("A unified
/// approach to interpreting model predictions", NeurIPS 2017), exponential
/// `exp(-|s - p/2| / width)`.
fn direct_weighted_fit(players: usize, table: &[f64], kernel: Kernel) -> Vec<f64> {
    let empty = table[0];
    let total = table[table.len() - 1] - empty;
    let last = players - 1;
    let rows = table.len() - 2;
    let mut design = DMatrix::<f64>::zeros(rows, last);
    let mut target = DVector::<f64>::zeros(rows);
    for (row, bits) in (1..table.len() - 1).enumerate() {
        let s = (bits as u64).count_ones() as usize;
        let weight = match kernel {
            Kernel::Shapley => {
                (players - 1) as f64 / (binomial(players, s) * (s * (players - s)) as f64)
            }
            Kernel::Exponential { width } => {
                (-(s as f64 - players as f64 / 2.0).abs() / width).exp()
            }
        };
        let root = weight.sqrt();
        let has_last = (bits >> last & 1) as f64;
        for k in 0..last {
            design[(row, k)] = root * ((bits >> k & 1) as f64 - has_last);
        }
        target[row] = root * (table[bits] - empty - has_last * total);
    }
    let solution = design.svd(true, true).solve(&target, 1e-12).unwrap();
    let mut phi: Vec<f64> = solution.iter().copied().collect();
    phi.push(total - phi.iter().sum::<f64>());
    phi
}

/// A game with random main effects, all pairwise interactions and some
/// three-way ones. Pairwise games alone would be too easy: antithetic
/// permutations are exact on them (each player's two marginal contributions
/// average to `a_i + Σ_j b_ij / 2`).
fn interaction_game(players: usize, seed: u64) -> impl Fn(Coalition) -> f64 + Sync {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let main: Vec<f64> = (0..players).map(|_| rng.random_range(-1.0..1.0)).collect();
    let pairs: Vec<Vec<f64>> = (0..players)
        .map(|_| (0..players).map(|_| rng.random_range(-0.5..0.5)).collect())
        .collect();
    let triples: Vec<([usize; 3], f64)> = (0..2 * players)
        .map(|_| {
            let mut t = [0; 3];
            for slot in &mut t {
                *slot = rng.random_range(0..players);
            }
            (t, rng.random_range(-1.5..1.5))
        })
        .collect();
    move |c: Coalition| {
        let mut v = 0.0;
        for i in c.members() {
            v += main[i];
            for j in c.members().filter(|&j| j > i) {
                v += pairs[i][j];
            }
        }
        for (t, w) in &triples {
            if t.iter().all(|&i| c.contains(i)) {
                v += w;
            }
        }
        v
    }
}

/// A random ensemble of depth-4 trees over `features` inputs, heap-ordered
/// (node k has children 2k+1 and 2k+2).
fn random_ensemble(features: usize, trees: usize, seed: u64) -> TreeEnsemble {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let depth = 4;
    let inner = (1 << depth) - 1;
    let nodes = (1 << (depth + 1)) - 1;
    let built = (0..trees)
        .map(|_| {
            let mut feature = vec![-1; nodes];
            let mut threshold = vec![0.0; nodes];
            let mut left = vec![-1; nodes];
            let mut right = vec![-1; nodes];
            let mut value = vec![0.0; nodes];
            for k in 0..nodes {
                if k < inner {
                    feature[k] = rng.random_range(0..features) as i32;
                    threshold[k] = rng.random_range(0.0..1.0);
                    left[k] = (2 * k + 1) as i32;
                    right[k] = (2 * k + 2) as i32;
                } else {
                    value[k] = rng.random_range(-1.0..1.0);
                }
            }
            Tree::try_new(feature, threshold, left, right, value, vec![], features).unwrap()
        })
        .collect();
    TreeEnsemble::try_new(built, 0.25, Link::Identity, features).unwrap()
}

/// A p = 12 tree-ensemble game: v(S) is the ensemble's output on the
/// instance with the features outside S taken from one reference row (fixed
/// removal, written out here).
fn tree_game_table(seed: u64) -> Vec<f64> {
    let features = 12;
    let ensemble = random_ensemble(features, 20, seed);
    let mut rng = ChaCha8Rng::seed_from_u64(seed + 1);
    let instance: Vec<f64> = (0..features).map(|_| rng.random_range(0.0..1.0)).collect();
    let reference: Vec<f64> = (0..features).map(|_| rng.random_range(0.0..1.0)).collect();
    table_of(features, |c| {
        let row: Vec<f64> = (0..features)
            .map(|j| {
                if c.contains(j) {
                    instance[j]
                } else {
                    reference[j]
                }
            })
            .collect();
        let mut out = [0.0];
        ensemble.predict(
            ArrayView2::from_shape((1, features), &row).unwrap(),
            &mut out,
        );
        out[0]
    })
}

fn run_on_table(
    sampler: Sampler,
    players: usize,
    table: &[f64],
    stopping: &Stopping,
    seed: u64,
) -> (Estimate, u64) {
    let game = FnGame::new(players, |c: Coalition| table[c.bits() as usize]);
    let cached = CachedGame::new(&game);
    let estimate = sampler.run(&cached, stopping, seed).unwrap();
    (estimate, cached.evaluations())
}

fn rms_error(actual: &[f64], expected: &[f64]) -> f64 {
    let total: f64 = actual
        .iter()
        .zip(expected)
        .map(|(a, e)| (a - e).powi(2))
        .sum();
    (total / actual.len() as f64).sqrt()
}

/// With the Shapley kernel the constrained fit over all coalitions is the
/// Shapley value ("A unified approach to interpreting model predictions",
/// NeurIPS 2017), here against the definition on random games and the
/// p = 12 tree game.
#[test]
fn exact_fit_with_the_shapley_kernel_is_the_shapley_value() {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut cases: Vec<(usize, Vec<f64>)> = (2..=8)
        .map(|p| {
            (
                p,
                (0..1 << p).map(|_| rng.random_range(-5.0..5.0)).collect(),
            )
        })
        .collect();
    cases.push((12, tree_game_table(5)));
    for (players, table) in cases {
        let game = FnGame::new(players, |c: Coalition| table[c.bits() as usize]);
        let cached = CachedGame::new(&game);
        let fit = regression::fit_all(&cached, Kernel::Shapley).unwrap();
        let expected = naive_shapley(players, &table);
        for (i, (a, e)) in fit.values.iter().zip(&expected).enumerate() {
            assert!(
                (a - e).abs() < 1e-9,
                "p = {players}, player {i}: {a} vs {e}"
            );
        }
        assert_eq!(cached.evaluations(), 1 << players);
    }
}

/// The exponential-kernel fit against the direct weighted least squares
/// above (common practice, no source), its efficiency, and two closed forms:
/// an additive game `v(S) = c + Σ_{i∈S} a_i` is fitted exactly by `a` under
/// any kernel (zero residual, and `Σ a = v(all) - v(∅)`); with two players
/// the fit splits the interaction equally, `phi_i = v({i}) - v(∅) + (v(all)
/// - v({0}) - v({1}) + v(∅)) / 2`, by symmetry of the two size-1 weights.
#[test]
fn exact_fit_with_the_exponential_kernel() {
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    for players in 3..=8 {
        let table: Vec<f64> = (0..1 << players)
            .map(|_| rng.random_range(-5.0..5.0))
            .collect();
        let game = FnGame::new(players, |c: Coalition| table[c.bits() as usize]);
        let cached = CachedGame::new(&game);
        for width in [0.5, 1.5, 10.0] {
            let kernel = Kernel::Exponential { width };
            let fit = regression::fit_all(&cached, kernel).unwrap();
            let expected = direct_weighted_fit(players, &table, kernel);
            for (a, e) in fit.values.iter().zip(&expected) {
                assert!(
                    (a - e).abs() < 1e-9,
                    "p = {players}, width {width}: {a} vs {e}"
                );
            }
            assert!(fit.efficiency_gap().abs() < 1e-9);
        }
    }

    let weights = [0.5, -1.25, 2.0, 0.0, 3.5, -0.75];
    let additive = FnGame::new(6, |c: Coalition| {
        4.0 + c.members().map(|i| weights[i]).sum::<f64>()
    });
    for kernel in [
        Kernel::Shapley,
        EXPONENTIAL,
        Kernel::Exponential { width: 0.2 },
    ] {
        let fit = regression::fit_all(&CachedGame::new(&additive), kernel).unwrap();
        for (a, w) in fit.values.iter().zip(&weights) {
            assert!((a - w).abs() < 1e-12, "{kernel:?}: {a} vs {w}");
        }
    }

    let two = [1.0, 3.0, -2.0, 7.0];
    let game = FnGame::new(2, |c: Coalition| two[c.bits() as usize]);
    let fit = regression::fit_all(&CachedGame::new(&game), EXPONENTIAL).unwrap();
    let interaction = (two[3] - two[1] - two[2] + two[0]) / 2.0;
    assert!((fit.values[0] - (two[1] - two[0] + interaction)).abs() < 1e-12);
    assert!((fit.values[1] - (two[2] - two[0] + interaction)).abs() < 1e-12);

    let bad = regression::fit_all(&CachedGame::new(&game), Kernel::Exponential { width: 0.0 });
    assert_eq!(bad.unwrap_err().field, "kernel_width");
}

/// Each sampler's error against the exact value (enumerated here) shrinks as
/// the evaluation cap grows, and is small at the largest, on a p = 12
/// tree-ensemble game. Errors are averaged over a few seeds; quadrupling the
/// samples should halve the error (√n law, common practice, no source), so
/// asking for a 1.5-fold drop per quadrupling leaves room for chance.
#[test]
fn errors_shrink_as_the_cap_grows_on_a_tree_ensemble_game() {
    let players = 12;
    let table = tree_game_table(21);
    for sampler in SAMPLERS {
        let exact = sampler.reference(players, &table);
        let mut errors = Vec::new();
        for cap in [512, 2048, 8192] {
            let mut total = 0.0;
            for seed in 0..4 {
                let (estimate, used) =
                    run_on_table(sampler, players, &table, &Stopping::evaluations(cap), seed);
                assert!(used <= cap, "{sampler:?} used {used} of {cap}");
                total += rms_error(&estimate.values, &exact);
            }
            errors.push(total / 4.0);
        }
        assert!(
            errors[1] < errors[0] / 1.5 && errors[2] < errors[1] / 1.5 || errors[2] < 1e-12,
            "{sampler:?}: errors {errors:?}"
        );
        // Maximum sample reuse averages v itself rather than marginal
        // contributions, so its error scales with the spread of v and is
        // larger at equal cost (AISTATS 2023, "Data Banzhaf").
        let small = match sampler {
            Sampler::Banzhaf => 0.06,
            _ => 0.03,
        };
        let scale = rms_error(&exact, &vec![0.0; players]);
        assert!(
            errors[2] < small * scale,
            "{sampler:?}: errors {errors:?}, scale {scale}"
        );
    }
}

/// Over 200 seeds the exact value lies within ±1.96 std errors in 88–99% of
/// (seed, player) trials, for each sampler (shared/TESTING.md, "Statistical
/// honesty of sampled estimators"; 1.96 is the two-sided 95% normal
/// quantile). Two games: the interaction game at p = 10, and the p = 12
/// tree-ensemble game, whose marginal contributions are sparse and lumpy. A
/// margin of 1e-12 lets an exactly known value (a dummy player, std error 0)
/// count as covered despite rounding.
#[test]
fn std_errors_cover_the_exact_value_about_95_percent_of_the_time() {
    let games = [
        (10, table_of(10, interaction_game(10, 3)), 1),
        (12, tree_game_table(21), 3),
    ];
    let mut rates = Vec::new();
    for (players, table, cap_scale) in &games {
        for sampler in SAMPLERS {
            let exact = sampler.reference(*players, table);
            let cap = cap_scale
                * match sampler {
                    Sampler::Permutation => 400,
                    _ => 300,
                };
            let (mut covered, mut trials) = (0, 0);
            for seed in 0..200 {
                let (estimate, _) =
                    run_on_table(sampler, *players, table, &Stopping::evaluations(cap), seed);
                for ((value, se), truth) in
                    estimate.values.iter().zip(&estimate.std_errors).zip(&exact)
                {
                    covered += ((value - truth).abs() <= 1.96 * se + 1e-12) as usize;
                    trials += 1;
                }
            }
            rates.push((*players, sampler, covered as f64 / trials as f64));
        }
    }
    for (players, sampler, rate) in &rates {
        assert!(
            (0.88..=0.99).contains(rate),
            "p = {players}, {sampler:?}: coverage {rate}; all {rates:?}"
        );
    }
}

/// Seeded runs are reproducible bit for bit, and another seed gives another
/// answer (common practice, no source).
#[test]
fn seeds_reproduce_bit_for_bit() {
    let players = 10;
    let table = table_of(players, interaction_game(players, 4));
    let bits = |e: &Estimate| -> Vec<u64> {
        e.values
            .iter()
            .chain(&e.std_errors)
            .map(|v| v.to_bits())
            .collect()
    };
    for sampler in SAMPLERS {
        let stopping = Stopping::evaluations(300);
        let (a, _) = run_on_table(sampler, players, &table, &stopping, 7);
        let (b, _) = run_on_table(sampler, players, &table, &stopping, 7);
        let (c, _) = run_on_table(sampler, players, &table, &stopping, 8);
        assert_eq!(bits(&a), bits(&b), "{sampler:?}");
        assert_ne!(bits(&a), bits(&c), "{sampler:?}");
    }
}

/// The three ways to stop (TESTING.md and DESIGN.md, "Sampled estimators
/// are anytime"): a tolerance ends the run early with `converged`; a tight
/// cap ends it unconverged within the cap (the regressions fill it to the
/// last pair); a deadline already past returns after the first round with a
/// usable estimate. A cap below the minimum is refused, naming the field.
#[test]
fn tolerance_cap_and_deadline_stop_the_run() {
    let players = 10;
    let table = table_of(players, interaction_game(players, 5));
    for sampler in SAMPLERS {
        let tolerance = Stopping {
            tolerance: 0.05,
            max_evaluations: 1 << 20,
            deadline: None,
            cancel: CancelFlag::new(),
        };
        let (estimate, used) = run_on_table(sampler, players, &table, &tolerance, 1);
        assert!(estimate.converged, "{sampler:?}");
        assert!(
            estimate.std_errors.iter().all(|s| *s <= 0.05),
            "{sampler:?}"
        );
        assert!(used < 1 << players, "{sampler:?} used {used}");

        let tight = Stopping {
            tolerance: 1e-9,
            max_evaluations: 150,
            deadline: None,
            cancel: CancelFlag::new(),
        };
        let (estimate, used) = run_on_table(sampler, players, &table, &tight, 1);
        assert!(
            !estimate.converged && used <= 150,
            "{sampler:?} used {used}"
        );
        if matches!(sampler, Sampler::Leverage) {
            assert!(used >= 149, "leverage used {used} of 150");
        }

        let past = Stopping {
            tolerance: 0.0,
            max_evaluations: 1 << 20,
            deadline: Some(Instant::now()),
            cancel: CancelFlag::new(),
        };
        let (estimate, used) = run_on_table(sampler, players, &table, &past, 1);
        assert!(!estimate.converged && used <= 64, "{sampler:?} used {used}");
        assert!(estimate.values.iter().all(|v| v.is_finite()), "{sampler:?}");
        assert_eq!(estimate.value_full, table[table.len() - 1]);
        assert_eq!(estimate.value_empty, table[0]);
        if sampler.is_efficient() {
            assert!(estimate.efficiency_gap().abs() < 1e-9, "{sampler:?}");
        }
        assert!(estimate.std_errors.iter().all(|s| *s > 0.0), "{sampler:?}");

        let game = FnGame::new(players, |c: Coalition| table[c.bits() as usize]);
        let refused = sampler.run(&CachedGame::new(&game), &Stopping::evaluations(10), 1);
        assert_eq!(refused.unwrap_err().field, "max_evaluations", "{sampler:?}");
    }
}

/// Glove game: player 0 owns a left glove, players 1 and 2 a right glove
/// each, and a coalition is worth its matched pairs. Shapley: 2/3, 1/6, 1/6
/// (standard textbook example, e.g. Maschler, Solan & Zamir, "Game Theory",
/// Cambridge University Press, 2013). Raw Banzhaf, by the definition: 3/4,
/// 1/4, 1/4 (worked by hand: player 0 adds a pair to {1}, {2} and {1,2};
/// player 1 only to {0}).
#[test]
fn samplers_converge_on_the_glove_game() {
    let glove = |c: Coalition| {
        let left = c.contains(0) as usize;
        let right = c.contains(1) as usize + c.contains(2) as usize;
        left.min(right) as f64
    };
    let table = table_of(3, glove);
    for sampler in SAMPLERS {
        let expected = match sampler {
            Sampler::Banzhaf => vec![0.75, 0.25, 0.25],
            _ => vec![2.0 / 3.0, 1.0 / 6.0, 1.0 / 6.0],
        };
        let (estimate, used) = run_on_table(sampler, 3, &table, &Stopping::evaluations(4000), 2);
        assert!(used <= 8);
        for (i, (v, e)) in estimate.values.iter().zip(&expected).enumerate() {
            assert!((v - e).abs() < 0.03, "{sampler:?} player {i}: {v} vs {e}");
        }
    }
    // For p = 3 the exponential kernel weighs sizes 1 and 2 equally, as the
    // Shapley kernel does, so its fit is the Shapley value too.
    let direct = direct_weighted_fit(3, &table, EXPONENTIAL);
    assert!((direct[0] - 2.0 / 3.0).abs() < 1e-12);
}

/// 128 players, the most a coalition holds: the samplers stay within the
/// cap, and on an additive game `v(S) = Σ_{i∈S} a_i` (Shapley = Banzhaf =
/// `a_i`, closed form) permutation sampling and both regressions are exact
/// (every marginal contribution, and every residual, is exact), while
/// maximum sample reuse is within 4 std errors.
#[test]
fn one_hundred_and_twenty_eight_players() {
    let players = 128;
    let weights: Vec<f64> = (0..players).map(|i| ((i * 37) % 11) as f64 - 5.0).collect();
    let game = FnGame::new(players, |c: Coalition| {
        c.members().map(|i| weights[i]).sum()
    });
    for sampler in SAMPLERS {
        let cached = CachedGame::new(&game);
        let cap = 1200;
        let estimate = sampler
            .run(&cached, &Stopping::evaluations(cap), 9)
            .unwrap();
        assert!(cached.evaluations() <= cap, "{sampler:?}");
        assert_eq!(cached.players(), players);
        for (i, (v, w)) in estimate.values.iter().zip(&weights).enumerate() {
            let allowed = match sampler {
                Sampler::Banzhaf => 4.0 * estimate.std_errors[i],
                _ => 1e-9,
            };
            assert!(
                (v - w).abs() <= allowed,
                "{sampler:?} player {i}: {v} vs {w}"
            );
        }
    }
}
