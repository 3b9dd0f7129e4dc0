//! The engine's front door end to end: the planner's choice agrees with
//! brute-force enumeration where an exact shortcut is taken, refusals name
//! their field, and sampled answers say when they stopped early.

use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::job::INLINE_LIMIT;
use apportion::engine::{
    EngineError, Explanation, Model, Players, PreparedModel, RemovalChoice, Request, Summary,
    Target, prepare,
};
use apportion::model::{LinearModel, Link, Tree, TreeEnsemble};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn background(rows: usize, cols: usize, seed: u64) -> Array2<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    Array2::from_shape_fn((rows, cols), |_| rng.random_range(-2.0..2.0))
}

fn linear(features: usize, link: Link) -> LinearModel {
    let weights = (0..features).map(|j| (j as f64 - 2.5) * 0.4).collect();
    LinearModel::try_new(weights, 0.3, link).unwrap()
}

/// A two-level tree on features 0 and 1 plus a stump on feature 2.
fn trees() -> TreeEnsemble {
    let deep = Tree::try_new(
        vec![0, 1, -1, -1, -1],
        vec![0.0, 0.5, 0.0, 0.0, 0.0],
        vec![1, 3, -1, -1, -1],
        vec![2, 4, -1, -1, -1],
        vec![0.0, 0.0, 2.0, -1.0, 0.5],
        vec![true, false, true, true, true],
        4,
    )
    .unwrap();
    let stump = Tree::try_new(
        vec![2, -1, -1],
        vec![0.3, 0.0, 0.0],
        vec![1, -1, -1],
        vec![2, -1, -1],
        vec![1.0, -0.5, 0.0],
        vec![],
        4,
    )
    .unwrap();
    TreeEnsemble::try_new(vec![deep, stump], 0.1, Link::Identity, 4).unwrap()
}

/// `model` prepared over `background` with a row cost of 50 ns, so plans
/// do not depend on this machine's speed.
fn prepared(model: Arc<dyn Model>, background: &Array2<f64>) -> Arc<PreparedModel> {
    let players = Players::singletons(model.inputs());
    Arc::new(PreparedModel::try_new(model, players, background.clone(), 50.0).unwrap())
}

/// Both stages, with the request's budget as the deadline.
fn explain(model: &Arc<PreparedModel>, request: Request) -> Result<Explanation, EngineError> {
    let deadline = Instant::now() + request.budget;
    prepare(model, request)?.run(deadline)
}

fn close(a: &[f64], b: &[f64], tolerance: f64) -> bool {
    a.iter().zip(b).all(|(x, y)| (x - y).abs() <= tolerance)
}

/// Closed forms ("A unified approach to interpreting model predictions",
/// NeurIPS 2017) and the exact tree algorithm ("From local explanations to
/// global understanding with explainable AI for trees", Nature Machine
/// Intelligence 2(1), 2020) must agree with enumerating every coalition.
#[test]
fn model_specific_shortcuts_agree_with_enumeration() {
    let bg = background(30, 4, 1);
    let linear: Arc<dyn Model> = Arc::new(linear(4, Link::Identity));
    let ensemble: Arc<dyn Model> = Arc::new(trees());
    for (model, shortcut) in [
        (linear, EstimatorKind::LinearExact),
        (ensemble, EstimatorKind::TreeExact),
    ] {
        let model = prepared(model, &bg);
        for summary in [Summary::Shapley, Summary::Banzhaf] {
            for removal in [RemovalChoice::Marginal, RemovalChoice::Fixed(None)] {
                let mut request = Request::new(vec![0.7, -0.2, 1.1, 0.4]);
                request.summary = summary;
                request.removal = removal;
                let fast = explain(&model, request.clone()).unwrap();
                assert_eq!(fast.estimator, shortcut);
                request.estimator = Some(EstimatorKind::Exact);
                let slow = explain(&model, request).unwrap();
                assert!(
                    close(&fast.estimate.values, &slow.estimate.values, 1e-12),
                    "{shortcut:?} {summary:?}"
                );
                assert!((fast.estimate.value_empty - slow.estimate.value_empty).abs() < 1e-12);
                assert_eq!(slow.coalitions_evaluated, 16);
            }
        }
    }
}

#[test]
fn refusals_name_the_field() {
    let model = prepared(Arc::new(linear(4, Link::Identity)), &background(10, 4, 2));
    let field = |request: Request| prepare(&model, request).unwrap_err().field;

    assert_eq!(field(Request::new(vec![1.0; 3])), "instance");
    assert_eq!(
        field(Request::new(vec![1.0, f64::NAN, 0.0, 0.0])),
        "instance"
    );
    let mut request = Request::new(vec![1.0; 4]);
    request.target = Target::Probability;
    assert_eq!(field(request), "target");
    let mut request = Request::new(vec![1.0; 4]);
    request.removal = RemovalChoice::Fixed(Some(vec![0.0; 5]));
    assert_eq!(field(request), "fixed_values");
    let mut request = Request::new(vec![1.0; 4]);
    request.estimator = Some(EstimatorKind::TreeExact);
    assert_eq!(field(request), "estimator");
    let mut request = Request::new(vec![1.0; 4]);
    request.summary = Summary::Banzhaf;
    request.estimator = Some(EstimatorKind::Permutation);
    assert_eq!(field(request), "estimator");
    let mut request = Request::new(vec![1.0; 4]);
    request.removal = RemovalChoice::ConditionalGaussian { draws: 3 };
    assert_eq!(field(request), "draws");
    // A draw count that would ask for terabytes of rows is refused up front.
    let mut request = Request::new(vec![1.0; 4]);
    request.removal = RemovalChoice::Independent {
        draws: u32::MAX as usize,
    };
    assert_eq!(field(request), "draws");
}

/// A background with missing values has no mean: FIXED removal without
/// values is then the registered model's limit, not the caller's mistake.
#[test]
fn a_background_without_a_mean_is_a_failed_precondition() {
    let mut bg = background(10, 4, 5);
    bg[(3, 1)] = f64::NAN;
    let model = prepared(Arc::new(trees()), &bg);
    let mut request = Request::new(vec![1.0; 4]);
    request.removal = RemovalChoice::Fixed(None);
    let error = prepare(&model, request).unwrap_err();
    assert_eq!(error.kind, apportion::engine::ErrorKind::FailedPrecondition);
    assert_eq!(error.field, "background");
}

/// A game too large for enumeration within the cap is sampled; stopping at
/// the cap before the tolerance is reported as not converged, with finite
/// std errors (shared/TESTING.md, "Statistical honesty").
#[test]
fn capped_samplers_report_that_they_did_not_converge() {
    let features = 24;
    let model = prepared(
        Arc::new(linear(features, Link::Logistic)),
        &background(20, features, 3),
    );
    let mut request = Request::new(vec![0.5; features]);
    request.target = Target::Probability;
    request.max_evaluations = 400;
    request.tolerance = 1e-9;
    request.seed = 11;
    let first = explain(&model, request.clone()).unwrap();
    assert!(!first.estimator.is_exact(), "{:?}", first.estimator);
    assert!(!first.estimate.converged);
    assert!(first.coalitions_evaluated <= 400);
    assert!(
        first
            .estimate
            .std_errors
            .iter()
            .all(|s| s.is_finite() && *s > 0.0)
    );
    // Seeded runs are reproducible bit for bit.
    let second = explain(&model, request).unwrap();
    assert_eq!(first.estimate.values, second.estimate.values);
}

/// A budget already spent still returns a valid sampled estimate.
#[test]
fn an_exhausted_budget_returns_what_it_has() {
    let features = 30;
    let model = prepared(
        Arc::new(linear(features, Link::Logistic)),
        &background(20, features, 4),
    );
    let mut request = Request::new(vec![0.5; features]);
    request.target = Target::Probability;
    request.budget = Duration::from_millis(1);
    let spent = Instant::now() - Duration::from_millis(5);
    let explained = prepare(&model, request).unwrap().run(spent).unwrap();
    assert!(!explained.estimate.converged);
    assert!(explained.estimate.values.iter().all(|v| v.is_finite()));
}

#[test]
fn only_jobs_predicted_within_the_inline_limit_run_inline() {
    // The planner's prediction from the stated row cost of 50 ns (common
    // practice, no source): the closed form reads the prepared background
    // mean, about one model row, whatever the background size; everything
    // that evaluates coalitions costs rows × coalitions × 50 ns.
    let linear: Arc<dyn Model> = Arc::new(linear(4, Link::Logistic));
    let small = prepared(linear.clone(), &background(30, 4, 2));
    let large = prepared(linear, &background(25_001, 4, 3));
    let instance = vec![0.7, -0.2, 1.1, 0.4];
    let with = |change: &dyn Fn(&mut Request)| {
        let mut request = Request::new(instance.clone());
        change(&mut request);
        request
    };
    let cases = [
        (&small, with(&|_| {}), true),
        (&large, with(&|_| {}), true),
        (
            &small,
            with(&|r| r.removal = RemovalChoice::Fixed(None)),
            true,
        ),
        (&small, with(&|r| r.summary = Summary::LeaveOneOut), true),
        // 16 coalitions × 30 rows × 50 ns = 24 µs.
        (&small, with(&|r| r.target = Target::Probability), false),
        (
            &small,
            with(&|r| r.estimator = Some(EstimatorKind::Exact)),
            false,
        ),
        (
            &small,
            with(&|r| r.removal = RemovalChoice::ConditionalGaussian { draws: 64 }),
            false,
        ),
    ];
    for (model, request, inline) in cases {
        let job = prepare(model, request.clone()).unwrap();
        assert_eq!(job.runs_inline(), inline, "{request:?}");
        assert_eq!(job.predicted() <= INLINE_LIMIT, inline);
        if inline {
            assert_eq!(job.estimator(), EstimatorKind::LinearExact);
        }
    }
}
