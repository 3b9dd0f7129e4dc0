//! Joint (permutation, background row) sampling, the degraded path AUTO
//! takes when one coalition over all background rows does not fit the
//! budget: unbiased with honest std errors against closed forms and brute
//! force, error shrinking with rows, reproducible, chosen by the planner
//! from injected costs, and answering through the gRPC API where the old
//! planner refused.

mod support;

use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::model::Structure;
use apportion::engine::summary::Summary;
use apportion::engine::{
    ErrorKind, Explanation, Model, Players, PreparedModel, RemovalChoice, Request, Stopping,
    Target, prepare,
};
use apportion::model::{LinearModel, Link, Tree, TreeEnsemble};
use apportion::service::proto::{self, register_model_request::Model as ProtoModel};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn background(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((rows, cols), |_| rng.random_range(-2.0..2.0))
}

fn weights(features: usize) -> Vec<f64> {
    (0..features).map(|j| (j as f64 - 2.5) * 0.4).collect()
}

/// `model` over `background` with an injected row cost, so plans do not
/// depend on this machine's speed.
fn prepared(
    model: Arc<dyn Model>,
    background: &Array2<f64>,
    row_cost_ns: f64,
) -> Arc<PreparedModel> {
    let players = Players::singletons(model.inputs());
    Arc::new(PreparedModel::try_new(model, players, background.clone(), row_cost_ns).unwrap())
}

/// A row-sampling request run to its row cap: no tolerance stop, so the
/// coverage below is of fixed-size samples.
fn row_request(instance: Vec<f64>, target: Target, rows: u64, seed: u64) -> Request {
    Request {
        target,
        estimator: Some(EstimatorKind::RowPermutation),
        budget: Duration::from_secs(60),
        max_evaluations: rows,
        tolerance: 1e-300,
        seed,
        ..Request::new(instance)
    }
}

fn explain(model: &Arc<PreparedModel>, request: Request) -> Explanation {
    let deadline = Instant::now() + request.budget;
    prepare(model, request).unwrap().run(deadline).unwrap()
}

/// Share of (seed, player) cases where ±1.96 std errors cover `exact`.
fn coverage(model: &Arc<PreparedModel>, exact: &[f64], make: impl Fn(u64) -> Request) -> f64 {
    let seeds = 250;
    let mut covered = 0;
    for seed in 0..seeds {
        let answer = explain(model, make(seed));
        assert_eq!(answer.estimator, EstimatorKind::RowPermutation);
        let estimate = &answer.estimate;
        for ((value, se), truth) in estimate.values.iter().zip(&estimate.std_errors).zip(exact) {
            assert!(
                se.is_finite() && *se > 0.0,
                "{se} in {estimate:?} ({} rows)",
                answer.model_rows_evaluated
            );
            if (value - truth).abs() <= 1.96 * se {
                covered += 1;
            }
        }
    }
    covered as f64 / (seeds as f64 * exact.len() as f64)
}

/// Brute-force Shapley values of the marginal game over every coalition:
/// `v(S) = mean_z g(x_S, z_rest)`, weighted `|S|! (p-|S|-1)! / p!`
/// (the definition, "A value for n-person games", Contributions to the
/// Theory of Games II, 1953; the marginal game per "A unified approach to
/// interpreting model predictions", NeurIPS 2017).
fn brute_force(g: impl Fn(&[f64]) -> f64, x: &[f64], background: &Array2<f64>) -> Vec<f64> {
    let p = x.len();
    let value = |mask: usize| -> f64 {
        let mut total = 0.0;
        for z in background.rows() {
            let row: Vec<f64> = (0..p)
                .map(|j| if mask >> j & 1 == 1 { x[j] } else { z[j] })
                .collect();
            total += g(&row);
        }
        total / background.nrows() as f64
    };
    let factorial = |n: usize| (1..=n).map(|k| k as f64).product::<f64>();
    let mut phi = vec![0.0; p];
    for mask in 0..1usize << p {
        let size = mask.count_ones() as usize;
        for (i, slot) in phi.iter_mut().enumerate() {
            if mask >> i & 1 == 0 {
                let weight = factorial(size) * factorial(p - size - 1) / factorial(p);
                *slot += weight * (value(mask | 1 << i) - value(mask));
            }
        }
    }
    phi
}

/// Linear model, marginal removal, OUTPUT: `phi_i = w_i (x_i − mean_bg x_i)`
/// ("A unified approach to interpreting model predictions", NeurIPS 2017).
/// Accepted coverage 88–99% over ≥ 200 seeds (TESTING.md).
#[test]
fn row_sampling_covers_the_linear_closed_form() {
    let p = 5;
    let bg = background(40, p, 3);
    let w = weights(p);
    let model: Arc<dyn Model> =
        Arc::new(LinearModel::try_new(w.clone(), 0.3, Link::Identity).unwrap());
    let model = prepared(model, &bg, 50.0);
    let x = vec![1.5, -0.5, 0.25, 2.0, -1.75];
    let exact: Vec<f64> = (0..p)
        .map(|i| w[i] * (x[i] - bg.column(i).mean().unwrap()))
        .collect();
    let share = coverage(&model, &exact, |seed| {
        row_request(x.clone(), Target::Output, 400, seed)
    });
    println!("linear OUTPUT coverage: {share:.3}");
    assert!((0.88..=0.99).contains(&share), "coverage {share}");
}

/// Logistic model under PROBABILITY, where the game is not additive:
/// against brute force over every coalition (see [`brute_force`]).
#[test]
fn row_sampling_covers_brute_force_probabilities() {
    let p = 4;
    let bg = background(30, p, 5);
    let w = weights(p);
    let model: Arc<dyn Model> =
        Arc::new(LinearModel::try_new(w.clone(), -0.2, Link::Logistic).unwrap());
    let model = prepared(model, &bg, 50.0);
    let x = vec![1.0, -1.5, 0.5, 1.75];
    let g = |row: &[f64]| {
        let t: f64 = row.iter().zip(&w).map(|(a, b)| a * b).sum::<f64>() - 0.2;
        1.0 / (1.0 + (-t).exp())
    };
    let exact = brute_force(g, &x, &bg);
    let share = coverage(&model, &exact, |seed| {
        row_request(x.clone(), Target::Probability, 300, seed)
    });
    println!("logistic PROBABILITY coverage: {share:.3}");
    assert!((0.88..=0.99).contains(&share), "coverage {share}");
}

/// Node arrays of one tree: feature, threshold, left, right, value.
type TreeArrays = (Vec<i32>, Vec<f64>, Vec<i32>, Vec<i32>, Vec<f64>);

/// Random depth-`depth` trees on `features` features, full binary (leaves
/// at the bottom), thresholds inside the background's range.
fn random_tree_arrays(count: usize, depth: u32, features: usize, seed: u64) -> Vec<TreeArrays> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    (0..count)
        .map(|_| {
            let inner = (1usize << depth) - 1;
            let nodes = 2 * inner + 1;
            let mut arrays: TreeArrays = (
                vec![-1; nodes],
                vec![0.0; nodes],
                vec![-1; nodes],
                vec![-1; nodes],
                vec![0.0; nodes],
            );
            for node in 0..nodes {
                if node < inner {
                    arrays.0[node] = rng.random_range(0..features) as i32;
                    arrays.1[node] = rng.random_range(-1.5..1.5);
                    arrays.2[node] = (2 * node + 1) as i32;
                    arrays.3[node] = (2 * node + 2) as i32;
                } else {
                    arrays.4[node] = rng.random_range(-1.0..1.0);
                }
            }
            arrays
        })
        .collect()
}

fn random_trees(count: usize, depth: u32, features: usize, seed: u64) -> Vec<Tree> {
    random_tree_arrays(count, depth, features, seed)
        .into_iter()
        .map(|(feature, threshold, left, right, value)| {
            Tree::try_new(feature, threshold, left, right, value, vec![], features).unwrap()
        })
        .collect()
}

/// A tree ensemble under OUTPUT, against the exact tree algorithm, which
/// the tests in tree_exact.rs check against brute force ("From local
/// explanations to global understanding with explainable AI for trees",
/// Nature Machine Intelligence 2(1), 2020).
#[test]
fn row_sampling_covers_the_exact_tree_algorithm() {
    let p = 6;
    let bg = background(50, p, 9);
    let ensemble =
        TreeEnsemble::try_new(random_trees(8, 3, p, 11), 0.1, Link::Identity, p).unwrap();
    let model = prepared(Arc::new(ensemble), &bg, 50.0);
    let x = vec![0.5, -1.0, 1.25, -0.25, 0.75, -1.5];
    let exact = explain(
        &model,
        Request {
            estimator: Some(EstimatorKind::TreeExact),
            ..Request::new(x.clone())
        },
    )
    .estimate
    .values;
    let share = coverage(&model, &exact, |seed| {
        row_request(x.clone(), Target::Output, 500, seed)
    });
    println!("trees OUTPUT coverage: {share:.3}");
    assert!((0.88..=0.99).contains(&share), "coverage {share}");
}

/// The anytime pass of the compiled tree algorithm (what AUTO's
/// TREE_EXACT gives when its deadline comes first) over half the trees:
/// unbiased with honest std errors against the whole pass, and the whole
/// pass once every tree is done. Accepted coverage 88–99% over ≥ 200
/// seeds (TESTING.md); the sum over trees of their attributions is the
/// ensemble's, and the estimate of a total from a simple random sample is
/// Cochran's ("Sampling Techniques", Wiley, 1977, ch. 2).
#[test]
fn the_anytime_tree_pass_covers_the_whole_pass_and_ends_exact() {
    let p = 6;
    let bg = background(50, p, 9);
    let trees = 120;
    let ensemble =
        TreeEnsemble::try_new(random_trees(trees, 3, p, 13), 0.1, Link::Identity, p).unwrap();
    let model = prepared(Arc::new(ensemble), &bg, 50.0);
    let Some(compiled) = model.compiled_trees() else {
        panic!("a tree ensemble is compiled at preparation");
    };
    assert_eq!(
        compiled.pattern_trees(),
        trees,
        "every tree in pattern form"
    );
    let Structure::Trees(ensemble) = model.structure() else {
        panic!("a tree ensemble");
    };
    let x = vec![0.5, -1.0, 1.25, -0.25, 0.75, -1.5];
    let anytime = |stopping: &Stopping, seed: u64| {
        compiled
            .explain_anytime(
                ensemble,
                model.players(),
                model.background(),
                &x,
                Summary::Shapley,
                stopping,
                seed,
            )
            .unwrap()
    };
    let exact = compiled
        .explain(
            ensemble,
            model.players(),
            model.background(),
            &x,
            Summary::Shapley,
        )
        .unwrap();
    let (whole, done) = anytime(&Stopping::unbounded(), 1);
    assert_eq!(done, trees);
    assert!(whole.converged && whole.std_errors.iter().all(|se| *se == 0.0));
    for (got, want) in whole.values.iter().zip(&exact.values) {
        assert!((got - want).abs() < 1e-12, "{got} vs {want}");
    }
    let seeds = 250;
    let mut covered = 0;
    for seed in 0..seeds {
        let (half, done) = anytime(&Stopping::evaluations(60), seed);
        assert_eq!(done, 60);
        assert!(!half.converged);
        for ((value, se), truth) in half.values.iter().zip(&half.std_errors).zip(&exact.values) {
            assert!(se.is_finite() && *se > 0.0, "{se}");
            if (value - truth).abs() <= 1.96 * se {
                covered += 1;
            }
        }
    }
    let share = covered as f64 / (seeds as usize * p) as f64;
    println!("anytime tree pass coverage: {share:.3}");
    assert!((0.88..=0.99).contains(&share), "coverage {share}");
}

/// The mean squared error against the closed form falls with the rows
/// (about as 1/rows for i.i.d. samples; common practice, no source), the
/// counters are honest, and seeded runs repeat bit for bit.
#[test]
fn error_shrinks_with_rows_and_seeded_runs_repeat() {
    let p = 5;
    let bg = background(40, p, 3);
    let w = weights(p);
    let model: Arc<dyn Model> =
        Arc::new(LinearModel::try_new(w.clone(), 0.3, Link::Identity).unwrap());
    let model = prepared(model, &bg, 50.0);
    let x = vec![1.5, -0.5, 0.25, 2.0, -1.75];
    let exact: Vec<f64> = (0..p)
        .map(|i| w[i] * (x[i] - bg.column(i).mean().unwrap()))
        .collect();
    let squared_error = |rows: u64| {
        let mut total = 0.0;
        for seed in 0..60 {
            let answer = explain(&model, row_request(x.clone(), Target::Output, rows, seed));
            // 1 row for the instance, 2p − 1 per antithetic pair.
            let pairs = (rows - 1) / (2 * p as u64 - 1);
            assert_eq!(answer.model_rows_evaluated, 1 + pairs * (2 * p as u64 - 1));
            assert_eq!(answer.coalitions_evaluated, answer.model_rows_evaluated);
            assert!(
                !answer.estimate.converged,
                "stopped at the cap, not the tolerance"
            );
            let gap = answer.estimate.efficiency_gap();
            assert!(gap.abs() < 1e-12, "each pair is efficient: {gap}");
            total += answer
                .estimate
                .values
                .iter()
                .zip(&exact)
                .map(|(a, b)| (a - b).powi(2))
                .sum::<f64>();
        }
        total / 60.0
    };
    let small = squared_error(100);
    let large = squared_error(1600);
    println!("mean squared error: {small:.3e} at 100 rows, {large:.3e} at 1600");
    assert!(large < small / 4.0, "{small} → {large}");

    let once = explain(&model, row_request(x.clone(), Target::Output, 500, 17));
    let again = explain(&model, row_request(x.clone(), Target::Output, 500, 17));
    let other = explain(&model, row_request(x.clone(), Target::Output, 500, 18));
    assert_eq!(once.estimate, again.estimate);
    assert_ne!(once.estimate.values, other.estimate.values);

    // A loose tolerance stops early and says so honestly.
    let loose = explain(
        &model,
        Request {
            tolerance: 0.05,
            ..row_request(x.clone(), Target::Output, 1 << 20, 3)
        },
    );
    assert!(loose.estimate.converged);
    assert!(loose.estimate.std_errors.iter().all(|s| *s <= 0.05));
    assert!(loose.model_rows_evaluated < 1 << 20);
}

/// The measured case with injected costs (common practice, no
/// source: the figures follow from the costs): 30 features, 1,000
/// background rows at 10 µs a row, PROBABILITY at a 50 ms budget. One
/// coalition costs 10 ms, so no coalition sampler fits; AUTO samples rows
/// jointly instead of refusing with INVALID_ARGUMENT on max_evaluations.
#[test]
fn auto_degrades_to_row_sampling_where_it_used_to_refuse() {
    let p = 30;
    let bg = background(1000, p, 21);
    let model: Arc<dyn Model> =
        Arc::new(LinearModel::try_new(weights(p), 0.1, Link::Logistic).unwrap());
    let model = prepared(model, &bg, 10_000.0);
    let x = vec![0.5; p];
    let request = Request {
        target: Target::Probability,
        budget: Duration::from_millis(50),
        ..Request::new(x.clone())
    };
    let job = prepare(&model, request.clone()).unwrap();
    assert_eq!(job.estimator(), EstimatorKind::RowPermutation);
    assert!(job.predicted() <= Duration::from_millis(50));
    let answer = job.run(Instant::now() + Duration::from_secs(60)).unwrap();
    assert!(
        answer.plan_reason.contains("jointly"),
        "{}",
        answer.plan_reason
    );
    assert!(answer.estimate.std_errors.iter().all(|s| s.is_finite()));
    // 50 ms at 10 µs a row: at most 5,000 rows.
    assert!(answer.model_rows_evaluated <= 5_000);

    let explicit = Request {
        estimator: Some(EstimatorKind::LeverageRegression),
        ..request.clone()
    };
    let error = prepare(&model, explicit).unwrap_err();
    assert_eq!(error.kind, ErrorKind::FailedPrecondition);
    assert!(error.message.contains("620.000 ms"), "{}", error.message);

    // LOSS is applied to the averaged prediction: not row-sampled, so the
    // smallest estimate is a coalition sampler's, and that does not fit.
    let loss = Request {
        target: Target::Loss { label: 1.0 },
        ..request.clone()
    };
    let error = prepare(&model, loss).unwrap_err();
    assert_eq!(error.kind, ErrorKind::ResourceExhausted);
    assert_eq!(error.field, "budget_ms");

    let hopeless = Request {
        budget: Duration::from_micros(500),
        ..request
    };
    let error = prepare(&model, hopeless).unwrap_err();
    assert_eq!(error.kind, ErrorKind::ResourceExhausted);
    assert!(error.message.contains("at least 2 ms"), "{}", error.message);

    // MARGINAL only: other removals have no per-row game.
    let fixed = Request {
        removal: RemovalChoice::Fixed(None),
        estimator: Some(EstimatorKind::RowPermutation),
        ..Request::new(x)
    };
    assert_eq!(prepare(&model, fixed).unwrap_err().field, "estimator");
}

/// A 100-tree depth-5 logistic ensemble on 30 features with 4,000
/// background rows, over loopback gRPC: its measured row cost makes one
/// coalition over the background cost milliseconds, so the 62 coalitions a
/// leverage run needs are far over a 20 ms budget, while the 119 rows of
/// the smallest joint sample are far under it. AUTO answers OK with the new
/// estimator and finite std errors.
#[tokio::test]
async fn auto_answers_over_grpc_when_a_full_coalition_exceeds_the_budget() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let p = 30;
    let rows = 4000;
    let bg = background(rows, p, 31);
    let trees = random_tree_arrays(100, 5, p, 33)
        .into_iter()
        .map(|(feature, threshold, left, right, value)| proto::Tree {
            feature,
            threshold,
            left,
            right,
            value,
            missing_left: vec![],
        })
        .collect();
    server
        .registry_client()
        .register_model(proto::RegisterModelRequest {
            model_id: "wide-trees".into(),
            features: (0..p)
                .map(|j| proto::Feature {
                    name: format!("x{j}"),
                    ..Default::default()
                })
                .collect(),
            model: Some(ProtoModel::Trees(proto::TreeEnsemble {
                trees,
                base_score: 0.0,
            })),
            link: proto::Link::Logistic as i32,
            background: Some(proto::Matrix {
                rows: rows as u32,
                cols: p as u32,
                values: bg.iter().copied().collect(),
            }),
            ..Default::default()
        })
        .await
        .unwrap();
    let answer = server
        .attributions_client()
        .explain(proto::ExplainRequest {
            model_id: "wide-trees".into(),
            instance: vec![0.25; p],
            removal: proto::Removal::Marginal as i32,
            target: proto::Target::Probability as i32,
            budget_ms: 20,
            seed: 5,
            ..Default::default()
        })
        .await
        .expect("AUTO degrades instead of refusing")
        .into_inner();
    assert_eq!(
        answer.estimator_used,
        proto::Estimator::RowPermutation as i32
    );
    assert!(
        answer.plan_reason.contains("jointly"),
        "{}",
        answer.plan_reason
    );
    assert_eq!(answer.attributions.len(), p);
    assert!(answer.attributions.iter().all(|a| a.std_error.is_finite()));
    assert!(answer.model_rows_evaluated >= 119);
    assert_eq!(answer.coalitions_evaluated, answer.model_rows_evaluated);
    server.stop().await;
}

/// The tree algorithm over a random subset of background rows, against the
/// exact tree algorithm over all of them ("From local explanations to
/// global understanding with explainable AI for trees", Nature Machine
/// Intelligence 2(1), 2020): ±1.96 std errors with the finite-population
/// correction cover it in 88–99% of cases (TESTING.md), for SHAPLEY and
/// BANZHAF; with every row used the answer is exact and converged.
#[test]
fn tree_row_sample_covers_the_exact_tree_algorithm_and_becomes_exact() {
    use apportion::engine::Summary;
    let p = 6;
    let bg = background(200, p, 41);
    let ensemble =
        TreeEnsemble::try_new(random_trees(8, 3, p, 43), -0.2, Link::Identity, p).unwrap();
    let model = prepared(Arc::new(ensemble), &bg, 50.0);
    let x = vec![-0.5, 1.0, 0.25, -1.25, 1.5, 0.0];
    for summary in [Summary::Shapley, Summary::Banzhaf] {
        let exact = explain(
            &model,
            Request {
                summary,
                estimator: Some(EstimatorKind::TreeExact),
                ..Request::new(x.clone())
            },
        )
        .estimate;
        let sampled = |rows: u64, seed: u64| Request {
            summary,
            estimator: Some(EstimatorKind::TreeRowSample),
            budget: Duration::from_secs(60),
            max_evaluations: rows,
            tolerance: 1e-300,
            seed,
            ..Request::new(x.clone())
        };
        let seeds = 250;
        let mut covered = 0;
        let mut trials = 0;
        for seed in 0..seeds {
            let answer = explain(&model, sampled(60, seed));
            assert_eq!(answer.estimator, EstimatorKind::TreeRowSample);
            assert_eq!(answer.model_rows_evaluated, 61);
            assert!(!answer.estimate.converged);
            for ((value, se), truth) in answer
                .estimate
                .values
                .iter()
                .zip(&answer.estimate.std_errors)
                .zip(&exact.values)
            {
                // A player no tree splits on gets 0 from every row.
                if *se == 0.0 {
                    assert!(truth.abs() < 1e-12 && value.abs() < 1e-12);
                    continue;
                }
                trials += 1;
                if (value - truth).abs() <= 1.96 * se {
                    covered += 1;
                }
            }
        }
        let share = covered as f64 / trials as f64;
        println!("tree row sample {summary:?} coverage: {share:.3} of {trials}");
        assert!(trials >= 200 * 4, "{trials}");
        assert!((0.88..=0.99).contains(&share), "coverage {share}");

        let all = explain(&model, sampled(200, 7)).estimate;
        assert!(all.converged);
        assert!(all.std_errors.iter().all(|s| *s == 0.0));
        for (a, b) in all.values.iter().zip(&exact.values) {
            assert!((a - b).abs() < 1e-12, "{a} vs {b}");
        }
        assert!((all.value_empty - exact.value_empty).abs() < 1e-12);
        let once = explain(&model, sampled(60, 3)).estimate;
        assert_eq!(once, explain(&model, sampled(60, 3)).estimate);
    }
}
