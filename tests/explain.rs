//! The engine's front door end to end: the planner's choice agrees with
//! brute-force enumeration where an exact shortcut is taken, refusals name
//! their field, and sampled answers say when they stopped early.

use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::{Players, RemovalChoice, Request, Subject, Summary, Target, explain};
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
    let players = Players::singletons(4);
    let linear = linear(4, Link::Identity);
    let ensemble = trees();
    for (model, shortcut) in [
        (
            &linear as &dyn apportion::model::Model,
            EstimatorKind::LinearExact,
        ),
        (
            &ensemble as &dyn apportion::model::Model,
            EstimatorKind::TreeExact,
        ),
    ] {
        let subject = Subject {
            model,
            players: &players,
            background: bg.view(),
            row_cost_ns: 50.0,
        };
        for summary in [Summary::Shapley, Summary::Banzhaf] {
            for removal in [RemovalChoice::Marginal, RemovalChoice::Fixed(None)] {
                let mut request = Request::new(vec![0.7, -0.2, 1.1, 0.4]);
                request.summary = summary;
                request.removal = removal;
                let fast = explain(&subject, &request, Instant::now()).unwrap();
                assert_eq!(fast.estimator, shortcut);
                request.estimator = Some(EstimatorKind::Exact);
                let slow = explain(&subject, &request, Instant::now()).unwrap();
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
    let bg = background(10, 4, 2);
    let players = Players::singletons(4);
    let model = linear(4, Link::Identity);
    let subject = Subject {
        model: &model,
        players: &players,
        background: bg.view(),
        row_cost_ns: 50.0,
    };
    let field = |request: Request| {
        explain(&subject, &request, Instant::now())
            .unwrap_err()
            .field
    };

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
}

/// A game too large for enumeration within the cap is sampled; stopping at
/// the cap before the tolerance is reported as not converged, with finite
/// std errors (shared/TESTING.md, "Statistical honesty").
#[test]
fn capped_samplers_report_that_they_did_not_converge() {
    let features = 24;
    let bg = background(20, features, 3);
    let players = Players::singletons(features);
    let model = linear(features, Link::Logistic);
    let subject = Subject {
        model: &model,
        players: &players,
        background: bg.view(),
        row_cost_ns: 50.0,
    };
    let mut request = Request::new(vec![0.5; features]);
    request.target = Target::Probability;
    request.max_evaluations = 400;
    request.tolerance = 1e-9;
    request.seed = 11;
    let first = explain(&subject, &request, Instant::now()).unwrap();
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
    let second = explain(&subject, &request, Instant::now()).unwrap();
    assert_eq!(first.estimate.values, second.estimate.values);
}

/// A budget already spent still returns a valid sampled estimate.
#[test]
fn an_exhausted_budget_returns_what_it_has() {
    let features = 30;
    let bg = background(20, features, 4);
    let players = Players::singletons(features);
    let model = linear(features, Link::Logistic);
    let subject = Subject {
        model: &model,
        players: &players,
        background: bg.view(),
        row_cost_ns: 50.0,
    };
    let mut request = Request::new(vec![0.5; features]);
    request.target = Target::Probability;
    request.budget = Duration::from_millis(1);
    let started = Instant::now() - Duration::from_millis(5);
    let explained = explain(&subject, &request, started).unwrap();
    assert!(!explained.estimate.converged);
    assert!(explained.estimate.values.iter().all(|v| v.is_finite()));
}

#[test]
fn only_closed_form_requests_over_small_backgrounds_count_as_cheap() {
    // The planner's own rule (engine::plan::model_specific): a request is
    // cheap exactly when the planner answers it with the linear closed form
    // and the background mean costs at most 10⁵ additions.
    let players = Players::singletons(4);
    let linear = linear(4, Link::Logistic);
    let ensemble = trees();
    let small = background(30, 4, 2);
    let large = background(25_001, 4, 3);
    let subject = |model: &'static str| -> Subject<'_> {
        let (model, background): (&dyn apportion::model::Model, _) = match model {
            "linear" => (&linear, small.view()),
            "linear-large" => (&linear, large.view()),
            _ => (&ensemble, small.view()),
        };
        Subject {
            model,
            players: &players,
            background,
            row_cost_ns: 50.0,
        }
    };
    let instance = vec![0.7, -0.2, 1.1, 0.4];
    let with = |change: &dyn Fn(&mut Request)| {
        let mut request = Request::new(instance.clone());
        change(&mut request);
        request
    };
    let cases = [
        ("linear", with(&|_| {}), true),
        (
            "linear",
            with(&|r| r.removal = RemovalChoice::Fixed(None)),
            true,
        ),
        ("linear", with(&|r| r.summary = Summary::LeaveOneOut), true),
        ("linear", with(&|r| r.target = Target::Probability), false),
        (
            "linear",
            with(&|r| r.estimator = Some(EstimatorKind::Exact)),
            false,
        ),
        (
            "linear",
            with(&|r| r.removal = RemovalChoice::ConditionalGaussian { draws: 8 }),
            false,
        ),
        ("linear-large", with(&|_| {}), false),
        ("trees", with(&|_| {}), false),
    ];
    for (model, request, cheap) in cases {
        let subject = subject(model);
        assert_eq!(
            apportion::engine::explain::is_cheap(&subject, &request),
            cheap,
            "{model} {request:?}"
        );
        if cheap {
            let answer = explain(&subject, &request, Instant::now()).unwrap();
            assert_eq!(answer.estimator, EstimatorKind::LinearExact);
        }
    }
}
