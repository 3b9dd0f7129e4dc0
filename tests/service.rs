//! The gRPC service end to end over loopback: registration, every removal ×
//! target × summary cell, refusals with precise statuses, budgets and
//! deadlines, persistence across a restart, health, reflection and metrics.

mod support;

use std::time::{Duration, Instant};

use apportion::engine::{
    EstimatorKind, Kernel, RemovalChoice, Request as EngineRequest, Summary, Target, prepare,
};
use apportion::service::Config;
use apportion::service::proto::{self, register_model_request::Model};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::Code;

const REMOVALS: [proto::Removal; 5] = [
    proto::Removal::Marginal,
    proto::Removal::Fixed,
    proto::Removal::Independent,
    proto::Removal::ConditionalGaussian,
    proto::Removal::ConditionalNeighbors,
];

fn random_matrix(rows: usize, cols: usize, seed: u64) -> proto::Matrix {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    proto::Matrix {
        rows: rows as u32,
        cols: cols as u32,
        values: (0..rows * cols)
            .map(|_| rng.random_range(-2.0..2.0))
            .collect(),
    }
}

fn feature(name: &str, group: &str, reason: &str) -> proto::Feature {
    proto::Feature {
        name: name.into(),
        group: group.into(),
        reason_code: if reason.is_empty() {
            String::new()
        } else {
            format!("R-{name}")
        },
        reason_text: reason.into(),
    }
}

fn weights(features: usize) -> Vec<f64> {
    (0..features).map(|j| (j as f64 - 1.5) * 0.5).collect()
}

/// A logistic linear model on 4 features; `debt_a` and `debt_b` form the
/// player `debt`, so the players are `income`, `debt`, `rent`.
fn grouped_linear(model_id: &str) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: vec![
            feature("income", "", "Income too low for the requested rent"),
            feature("debt_a", "debt", "Existing debt too high"),
            feature("debt_b", "debt", ""),
            feature("rent", "", "Requested rent too high"),
        ],
        model: Some(Model::Linear(proto::LinearModel {
            weights: weights(4),
            intercept: 0.2,
        })),
        link: proto::Link::Logistic as i32,
        background: Some(random_matrix(24, 4, 1)),
        description: "grouped logistic".into(),
        ..Default::default()
    }
}

/// A logistic linear model with one player per feature.
fn wide_linear(model_id: &str, features: usize, rows: usize) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: (0..features)
            .map(|j| feature(&format!("x{j}"), "", ""))
            .collect(),
        model: Some(Model::Linear(proto::LinearModel {
            weights: weights(features),
            intercept: -0.1,
        })),
        link: proto::Link::Logistic as i32,
        background: Some(random_matrix(rows, features, 2)),
        description: String::new(),
        ..Default::default()
    }
}

/// One stump per feature (feature j split at 0), identity link.
fn stumps(model_id: &str, features: usize, rows: usize) -> proto::RegisterModelRequest {
    let trees = (0..features)
        .map(|j| proto::Tree {
            feature: vec![j as i32, -1, -1],
            threshold: vec![0.0, 0.0, 0.0],
            left: vec![1, -1, -1],
            right: vec![2, -1, -1],
            value: vec![0.0, -0.1 * (j as f64 + 1.0), 0.2 * (j as f64 + 1.0)],
            missing_left: vec![],
        })
        .collect();
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: (0..features)
            .map(|j| feature(&format!("t{j}"), "", ""))
            .collect(),
        model: Some(Model::Trees(proto::TreeEnsemble {
            trees,
            base_score: 0.5,
        })),
        link: proto::Link::Identity as i32,
        background: Some(random_matrix(rows, features, 3)),
        description: String::new(),
        ..Default::default()
    }
}

fn explain_request(model_id: &str, instance: Vec<f64>) -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: model_id.into(),
        instance,
        budget_ms: 10_000,
        ..Default::default()
    }
}

fn sigmoid(t: f64) -> f64 {
    1.0 / (1.0 + (-t).exp())
}

/// Brute-force Shapley values of a game given on all 2^p coalitions
/// (indexed by bits), with the textbook weights |S|!(p-|S|-1)!/p!
/// ("A value for n-person games", Contributions to the Theory of Games II,
/// 1953).
fn brute_shapley(values: &[f64], players: usize) -> Vec<f64> {
    let factorial = |n: usize| (1..=n).map(|k| k as f64).product::<f64>();
    (0..players)
        .map(|i| {
            (0..values.len())
                .filter(|s| s & (1 << i) == 0)
                .map(|s| {
                    let size = (s as u32).count_ones() as usize;
                    let weight =
                        factorial(size) * factorial(players - size - 1) / factorial(players);
                    weight * (values[s | (1 << i)] - values[s])
                })
                .sum()
        })
        .collect()
}

/// Marginal-removal PROBABILITY game of a logistic linear model: v(S) is
/// the mean over background rows of σ(b + Σ_{j∈S} w_j x_j + Σ_{j∉S} w_j z_j)
/// (the interventional definition, NeurIPS 2017 "A unified approach to
/// interpreting model predictions"). `player_of[j]` maps features to players.
fn marginal_probability_game(
    weights: &[f64],
    intercept: f64,
    x: &[f64],
    background: &proto::Matrix,
    player_of: &[usize],
    players: usize,
) -> Vec<f64> {
    let cols = background.cols as usize;
    (0..1usize << players)
        .map(|s| {
            let rows = background.values.chunks(cols);
            let total: f64 = rows
                .map(|z| {
                    let margin: f64 = (0..cols)
                        .map(|j| {
                            weights[j]
                                * if s & (1 << player_of[j]) != 0 {
                                    x[j]
                                } else {
                                    z[j]
                                }
                        })
                        .sum();
                    sigmoid(intercept + margin)
                })
                .sum();
            total / background.rows as f64
        })
        .collect()
}

fn assert_invalid(result: Result<tonic::Response<proto::Explanation>, tonic::Status>, field: &str) {
    let status = result.expect_err("the request must be refused");
    assert_eq!(status.code(), Code::InvalidArgument, "{}", status.message());
    assert!(
        status.message().starts_with(&format!("{field}:")),
        "message should name {field}: {}",
        status.message()
    );
}

fn set_summary(request: &mut proto::ExplainRequest, summary: usize) -> bool {
    // 0..7: SHAPLEY, BANZHAF, LEAVE_ONE_OUT, INCLUDE_ONE, LINEAR_FIT(Shapley),
    // LINEAR_FIT(exponential), SELECTION. Returns whether it is efficient.
    use proto::Summary as S;
    let (summary, efficient) = match summary {
        0 => (S::Shapley, true),
        1 => (S::Banzhaf, false),
        2 => (S::LeaveOneOut, false),
        3 => (S::IncludeOne, false),
        4 => (S::LinearFit, true),
        5 => {
            request.kernel = proto::Kernel::Exponential as i32;
            request.kernel_width = 1.5;
            (S::LinearFit, true)
        }
        _ => {
            request.selection_fraction = 0.8;
            (S::Selection, false)
        }
    };
    request.summary = summary as i32;
    efficient
}

#[tokio::test]
async fn every_cell_of_the_grid_answers_and_the_registry_survives_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let mut attributions = server.attributions_client();

    let grouped = grouped_linear("screening");
    let first = registry
        .register_model(grouped.clone())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(first.version, 1);
    assert_eq!(first.players, vec!["income", "debt", "rent"]);
    let second = registry
        .register_model(grouped.clone())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(second.version, 2);
    assert_eq!(
        first.checksum, second.checksum,
        "same registration, same checksum"
    );
    let trees = registry
        .register_model(stumps("stumps", 3, 24))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(trees.model_kind, "trees");
    // What preparation derived (here the stumps summarised against their
    // background, and the background statistics) is reported as the
    // server's own prepared model measures it (common practice, no source).
    let prepared = server.registry.get("stumps", 1).unwrap();
    assert_eq!(
        trees.prepared_bytes,
        prepared.prepared().derived_bytes() as u64
    );
    assert!(trees.prepared_bytes > 0 && trees.preparation_ms > 0.0);

    let x = vec![0.7, -1.2, 0.4, 1.5];
    let dataset = random_matrix(6, 4, 9);
    let labels = vec![0.0, 1.0, 1.0, 0.0, 1.0, 0.0];
    let targets = [
        proto::Target::Output,
        proto::Target::Probability,
        proto::Target::Loss,
        proto::Target::DatasetLoss,
    ];
    for removal in REMOVALS {
        for target in targets {
            for summary in 0..7 {
                let mut request = explain_request("screening", x.clone());
                request.removal = removal as i32;
                request.target = target as i32;
                request.draws = if matches!(
                    removal,
                    proto::Removal::Independent | proto::Removal::ConditionalGaussian
                ) {
                    8
                } else {
                    0
                };
                match target {
                    proto::Target::Loss => request.label = Some(1.0),
                    proto::Target::DatasetLoss => {
                        request.dataset = Some(dataset.clone());
                        request.dataset_labels = labels.clone();
                    }
                    _ => {}
                }
                let efficient = set_summary(&mut request, summary);
                let cell = format!("{removal:?} × {target:?} × summary {summary}");
                let answer = attributions
                    .explain(request)
                    .await
                    .unwrap_or_else(|s| panic!("{cell}: {}", s.message()))
                    .into_inner();
                let names: Vec<&str> = answer
                    .attributions
                    .iter()
                    .map(|a| a.name.as_str())
                    .collect();
                assert_eq!(names, ["income", "debt", "rent"], "{cell}");
                assert!(
                    answer.attributions.iter().all(|a| a.value.is_finite()),
                    "{cell}"
                );
                // Exact over 8 coalitions; the random removals' draws leave
                // std errors, converged only within the default tolerance
                // (the proto's rule for tolerance = 0).
                if matches!(
                    removal,
                    proto::Removal::Independent | proto::Removal::ConditionalGaussian
                ) {
                    let (full, empty) = (answer.value_full, answer.value_empty);
                    let scale = (full - empty).abs().max(1e-3 * full.abs().max(empty.abs()));
                    let tolerance = 0.01 * scale;
                    let within = answer.attributions.iter().all(|a| a.std_error <= tolerance);
                    assert_eq!(answer.converged, within, "{cell}");
                    assert!(
                        answer.attributions.iter().any(|a| a.std_error > 0.0),
                        "{cell}: removal noise is reported"
                    );
                } else {
                    assert!(answer.converged, "{cell}: 8 coalitions fit a 10 s budget");
                }
                assert_eq!(answer.version, 2, "{cell}: version 0 is the latest");
                if efficient {
                    // Efficiency of the Shapley value and the constrained fit
                    // (NeurIPS 2017, "A unified approach to interpreting
                    // model predictions").
                    let sum: f64 = answer.attributions.iter().map(|a| a.value).sum();
                    let spread = answer.value_full - answer.value_empty;
                    assert!((sum - spread).abs() < 1e-9, "{cell}: {sum} vs {spread}");
                    assert!(answer.efficiency_gap.abs() < 1e-9, "{cell}");
                }
                if summary == 6 {
                    assert!(
                        !answer.selected.is_empty(),
                        "{cell}: selection lists its players"
                    );
                }
            }
        }
    }

    // The closed form for a linear model under marginal removal of the raw
    // output, φ_i = Σ_{j∈i} w_j (x_j − mean z_j) (NeurIPS 2017), and the
    // principal reasons: the adverse players with a statement, largest first
    // (12 CFR part 1002, Supplement I, comment 9(b)(2)-1).
    let answer = attributions
        .explain(explain_request("screening", x.clone()))
        .await
        .unwrap()
        .into_inner();
    let background = grouped.background.clone().unwrap();
    let mean: Vec<f64> = (0..4)
        .map(|j| (0..24).map(|r| background.values[r * 4 + j]).sum::<f64>() / 24.0)
        .collect();
    let w = weights(4);
    let term = |j: usize| w[j] * (x[j] - mean[j]);
    let expected = [term(0), term(1) + term(2), term(3)];
    for (attribution, expected) in answer.attributions.iter().zip(expected) {
        assert!(
            (attribution.value - expected).abs() < 1e-12,
            "{attribution:?} vs {expected}"
        );
        assert_eq!(attribution.std_error, 0.0);
    }
    let mut adverse: Vec<(usize, f64)> = expected
        .iter()
        .copied()
        .enumerate()
        .filter(|(_, v)| *v < 0.0)
        .collect();
    adverse.sort_by(|a, b| a.1.total_cmp(&b.1));
    let names = ["income", "debt", "rent"];
    let listed: Vec<&str> = answer.reasons.iter().map(|r| r.name.as_str()).collect();
    let wanted: Vec<&str> = adverse.iter().map(|(i, _)| names[*i]).collect();
    assert_eq!(listed, wanted);
    assert!(
        answer
            .reasons
            .iter()
            .all(|r| r.confident && r.reason_code.starts_with("R-"))
    );

    // Brute-force Shapley on the marginal PROBABILITY game.
    let mut probability = explain_request("screening", x.clone());
    probability.target = proto::Target::Probability as i32;
    let answer = attributions
        .explain(probability)
        .await
        .unwrap()
        .into_inner();
    let game = marginal_probability_game(&w, 0.2, &x, &background, &[0, 1, 1, 2], 3);
    let reference = brute_shapley(&game, 3);
    for (attribution, expected) in answer.attributions.iter().zip(&reference) {
        assert!(
            (attribution.value - expected).abs() < 1e-12,
            "{attribution:?} vs {expected}"
        );
    }
    assert!((answer.value_full - game[7]).abs() < 1e-12);
    assert!((answer.value_empty - game[0]).abs() < 1e-12);

    // Invalid cells, each refused naming its field.
    let tree_x = vec![0.3, -0.4, 1.0];
    let mut request = explain_request("stumps", tree_x.clone());
    request.target = proto::Target::Probability as i32;
    assert_invalid(attributions.explain(request).await, "target");
    let mut request = explain_request("screening", x.clone());
    request.target = proto::Target::Loss as i32;
    assert_invalid(attributions.explain(request).await, "label");
    let mut request = explain_request("screening", x.clone());
    request.target = proto::Target::Loss as i32;
    request.label = Some(3.0);
    assert_invalid(attributions.explain(request).await, "label");
    let mut request = explain_request("screening", x.clone());
    request.fixed_values = vec![0.0; 4];
    assert_invalid(attributions.explain(request).await, "fixed_values");
    let mut request = explain_request("screening", x.clone());
    request.removal = proto::Removal::Fixed as i32;
    request.fixed_values = vec![0.0; 3];
    assert_invalid(attributions.explain(request).await, "fixed_values");
    let mut request = explain_request("screening", x.clone());
    request.summary = proto::Summary::Banzhaf as i32;
    request.estimator = proto::Estimator::Permutation as i32;
    assert_invalid(attributions.explain(request).await, "estimator");
    let mut request = explain_request("stumps", tree_x.clone());
    request.removal = proto::Removal::ConditionalGaussian as i32;
    request.estimator = proto::Estimator::TreeExact as i32;
    assert_invalid(attributions.explain(request).await, "estimator");
    let mut request = explain_request("screening", x.clone());
    request.summary = proto::Summary::Selection as i32;
    assert_invalid(attributions.explain(request).await, "selection_fraction");
    let mut request = explain_request("screening", x.clone());
    request.kernel = proto::Kernel::Exponential as i32;
    assert_invalid(attributions.explain(request).await, "kernel");
    let mut request = explain_request("screening", x.clone());
    request.summary = proto::Summary::LinearFit as i32;
    request.kernel = proto::Kernel::Exponential as i32;
    assert_invalid(attributions.explain(request).await, "kernel_width");
    let mut request = explain_request("screening", x.clone());
    request.removal = proto::Removal::ConditionalGaussian as i32;
    request.draws = 3;
    assert_invalid(attributions.explain(request).await, "draws");
    let mut request = explain_request("screening", x.clone());
    request.target = proto::Target::DatasetLoss as i32;
    assert_invalid(attributions.explain(request).await, "dataset");
    let mut request = explain_request("screening", x.clone());
    request.target = proto::Target::DatasetLoss as i32;
    request.dataset = Some(dataset.clone());
    request.dataset_labels = vec![1.0];
    assert_invalid(attributions.explain(request).await, "dataset_labels");

    // Well-formed requests the registered model cannot serve are the
    // model's limit, not the caller's mistake: FAILED_PRECONDITION (gRPC
    // status code guide). An output that overflows to infinity for this
    // instance names `model`.
    let mut request = explain_request("screening", vec![-1e308, -1e308, 1e308, 1e308]);
    request.removal = proto::Removal::Fixed as i32;
    let status = attributions.explain(request).await.unwrap_err();
    assert_eq!(
        status.code(),
        Code::FailedPrecondition,
        "{}",
        status.message()
    );
    assert!(
        status.message().starts_with("model:"),
        "{}",
        status.message()
    );

    // List, delete, restart.
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    let keys: Vec<(String, u64)> = listed
        .models
        .iter()
        .map(|m| (m.model_id.clone(), m.version))
        .collect();
    assert_eq!(
        keys,
        [
            ("screening".into(), 1),
            ("screening".into(), 2),
            ("stumps".into(), 1)
        ]
    );
    let deleted = registry
        .delete_model(proto::DeleteModelRequest {
            model_id: "stumps".into(),
            version: 0,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(deleted.deleted, 1);
    let gone = registry
        .get_model(proto::GetModelRequest {
            model_id: "stumps".into(),
            version: 0,
        })
        .await
        .unwrap_err();
    assert_eq!(gone.code(), Code::NotFound);
    let acknowledged = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    server.stop().await;

    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let reopened = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    assert_eq!(reopened.models.len(), acknowledged.models.len());
    for (before, after) in acknowledged.models.iter().zip(&reopened.models) {
        assert_eq!(
            (&before.model_id, before.version),
            (&after.model_id, after.version)
        );
        assert_eq!(before.checksum, after.checksum);
        assert_eq!(before.features, after.features);
    }
    let third = registry.register_model(grouped).await.unwrap().into_inner();
    assert_eq!(third.version, 3, "versions continue after a restart");
    server.stop().await;
}

#[tokio::test]
async fn grpc_answers_equal_the_in_process_engine_bit_for_bit() {
    // The service must add nothing to the engine's numbers: the same
    // request and seed give the same bits (common practice, no source).
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let mut attributions = server.attributions_client();
    registry
        .register_model(wide_linear("wide", 10, 30))
        .await
        .unwrap();
    let entry = server.registry.get("wide", 0).unwrap();
    let x: Vec<f64> = (0..10).map(|j| (j as f64 * 0.37).sin()).collect();

    struct Case {
        removal: proto::Removal,
        draws: u32,
        summary: proto::Summary,
        estimator: proto::Estimator,
        engine_removal: RemovalChoice,
        engine_summary: Summary,
        engine_estimator: Option<EstimatorKind>,
        max_evaluations: u64,
    }
    let cases = [
        Case {
            removal: proto::Removal::Marginal,
            draws: 0,
            summary: proto::Summary::Shapley,
            estimator: proto::Estimator::Exact,
            engine_removal: RemovalChoice::Marginal,
            engine_summary: Summary::Shapley,
            engine_estimator: Some(EstimatorKind::Exact),
            max_evaluations: 0,
        },
        Case {
            removal: proto::Removal::Independent,
            draws: 8,
            summary: proto::Summary::Shapley,
            estimator: proto::Estimator::Permutation,
            engine_removal: RemovalChoice::Independent { draws: 8 },
            engine_summary: Summary::Shapley,
            engine_estimator: Some(EstimatorKind::Permutation),
            max_evaluations: 120,
        },
        Case {
            removal: proto::Removal::ConditionalGaussian,
            draws: 8,
            summary: proto::Summary::Banzhaf,
            estimator: proto::Estimator::Msr,
            engine_removal: RemovalChoice::ConditionalGaussian { draws: 8 },
            engine_summary: Summary::Banzhaf,
            engine_estimator: Some(EstimatorKind::MaximumSampleReuse),
            max_evaluations: 150,
        },
        Case {
            removal: proto::Removal::Marginal,
            draws: 0,
            summary: proto::Summary::LinearFit,
            estimator: proto::Estimator::PairedRegression,
            engine_removal: RemovalChoice::Marginal,
            engine_summary: Summary::LinearFit(Kernel::Shapley),
            engine_estimator: Some(EstimatorKind::PairedRegression),
            max_evaluations: 200,
        },
    ];
    for (index, case) in cases.iter().enumerate() {
        let seed = 40 + index as u64;
        let mut request = explain_request("wide", x.clone());
        request.removal = case.removal as i32;
        request.draws = case.draws;
        request.summary = case.summary as i32;
        request.estimator = case.estimator as i32;
        request.target = proto::Target::Probability as i32;
        request.max_evaluations = case.max_evaluations;
        request.seed = seed;
        let remote = attributions.explain(request).await.unwrap().into_inner();

        let mut local = EngineRequest::new(x.clone());
        local.removal = case.engine_removal.clone();
        local.target = Target::Probability;
        local.summary = case.engine_summary;
        local.estimator = case.engine_estimator;
        local.budget = Duration::from_millis(10_000);
        if case.max_evaluations > 0 {
            local.max_evaluations = case.max_evaluations;
        }
        local.seed = seed;
        let answer = prepare(entry.prepared(), local)
            .unwrap()
            .run(Instant::now() + Duration::from_secs(10))
            .unwrap();
        let bits = |values: &[f64]| values.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        let remote_values: Vec<f64> = remote.attributions.iter().map(|a| a.value).collect();
        let remote_errors: Vec<f64> = remote.attributions.iter().map(|a| a.std_error).collect();
        assert_eq!(
            bits(&remote_values),
            bits(&answer.estimate.values),
            "case {index}"
        );
        assert_eq!(
            bits(&remote_errors),
            bits(&answer.estimate.std_errors),
            "case {index}"
        );
        assert_eq!(
            remote.value_full.to_bits(),
            answer.estimate.value_full.to_bits()
        );
        assert_eq!(
            remote.value_empty.to_bits(),
            answer.estimate.value_empty.to_bits()
        );
        assert_eq!(
            remote.coalitions_evaluated, answer.coalitions_evaluated,
            "case {index}"
        );
        assert_eq!(remote.converged, answer.estimate.converged, "case {index}");
        if index > 0 {
            assert!(
                remote_errors.iter().any(|e| *e > 0.0),
                "case {index} must be sampled"
            );
        }
    }
    server.stop().await;
}

#[tokio::test]
async fn budgets_decide_between_exact_answers_and_early_stops() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let mut attributions = server.attributions_client();

    // 24 players under conditional Gaussian removal cannot be enumerated;
    // with an unreachable tolerance the sampler must stop at the budget or
    // its cap and say so.
    registry
        .register_model(stumps("deep", 24, 60))
        .await
        .unwrap();
    let mut request = explain_request("deep", (0..24).map(|j| (j as f64 * 0.9).cos()).collect());
    request.removal = proto::Removal::ConditionalGaussian as i32;
    request.budget_ms = 20;
    request.tolerance = 1e-12;
    let answer = attributions.explain(request).await.unwrap().into_inner();
    assert!(!answer.converged, "{}", answer.plan_reason);
    assert_eq!(answer.budget_ms, 20);
    assert!(answer.elapsed_us > 0);
    assert!(answer.coalitions_evaluated >= 2);
    assert_eq!(answer.attributions.len(), 24);
    assert!(
        answer
            .attributions
            .iter()
            .all(|a| a.value.is_finite() && a.std_error.is_finite())
    );
    let exact = [
        proto::Estimator::Exact,
        proto::Estimator::TreeExact,
        proto::Estimator::LinearExact,
    ];
    assert!(
        !exact.contains(&answer.estimator_used()),
        "{:?}",
        answer.estimator_used()
    );

    // Ten players and a generous budget: exact enumeration, equal to brute
    // force ("A value for n-person games", 1953, for the weights).
    let wide = wide_linear("wide", 10, 30);
    registry.register_model(wide.clone()).await.unwrap();
    let x: Vec<f64> = (0..10).map(|j| 1.0 - j as f64 * 0.2).collect();
    let mut request = explain_request("wide", x.clone());
    request.target = proto::Target::Probability as i32;
    let answer = attributions.explain(request).await.unwrap().into_inner();
    assert_eq!(
        answer.estimator_used(),
        proto::Estimator::Exact,
        "{}",
        answer.plan_reason
    );
    assert!(answer.converged);
    let players: Vec<usize> = (0..10).collect();
    let game = marginal_probability_game(
        &weights(10),
        -0.1,
        &x,
        wide.background.as_ref().unwrap(),
        &players,
        10,
    );
    let reference = brute_shapley(&game, 10);
    for (attribution, expected) in answer.attributions.iter().zip(&reference) {
        assert_eq!(attribution.std_error, 0.0);
        assert!(
            (attribution.value - expected).abs() < 1e-12,
            "{attribution:?} vs {expected}"
        );
    }

    // A gRPC deadline cuts the budget to the deadline less the margin
    // (5 ms by default).
    let mut request = tonic::Request::new(explain_request("wide", x.clone()));
    request.set_timeout(Duration::from_secs(2));
    let answer = attributions.explain(request).await.unwrap().into_inner();
    assert_eq!(answer.budget_ms, 1995);
    server.stop().await;
}

#[tokio::test]
async fn malformed_requests_get_precise_statuses_and_the_server_keeps_serving() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let mut attributions = server.attributions_client();
    registry
        .register_model(grouped_linear("screening"))
        .await
        .unwrap();
    let good = explain_request("screening", vec![0.1, 0.2, 0.3, 0.4]);

    let mut unknown = good.clone();
    unknown.model_id = "nobody".into();
    assert_eq!(
        attributions.explain(unknown).await.unwrap_err().code(),
        Code::NotFound
    );
    let mut unknown_version = good.clone();
    unknown_version.version = 9;
    assert_eq!(
        attributions
            .explain(unknown_version)
            .await
            .unwrap_err()
            .code(),
        Code::NotFound
    );

    let mut short = good.clone();
    short.instance.pop();
    assert_invalid(attributions.explain(short).await, "instance");
    let mut missing = good.clone();
    missing.instance[1] = f64::NAN;
    assert_invalid(attributions.explain(missing).await, "instance");
    let mut tolerance = good.clone();
    tolerance.tolerance = f64::NAN;
    assert_invalid(attributions.explain(tolerance).await, "tolerance");
    let mut removal = good.clone();
    removal.removal = 42;
    assert_invalid(attributions.explain(removal).await, "removal");

    let registration_status = |result: Result<tonic::Response<proto::ModelInfo>, tonic::Status>| {
        result.expect_err("the registration must be refused")
    };
    let mut empty = grouped_linear("empty");
    empty.background = Some(proto::Matrix {
        rows: 0,
        cols: 4,
        values: vec![],
    });
    let status = registration_status(registry.register_model(empty).await);
    assert_eq!(status.code(), Code::InvalidArgument);
    assert!(
        status.message().starts_with("background"),
        "{}",
        status.message()
    );
    let mut oversize = grouped_linear("oversize");
    oversize.features.truncate(1);
    oversize.model = Some(Model::Linear(proto::LinearModel {
        weights: vec![1.0],
        intercept: 0.0,
    }));
    let rows = apportion::registry::MAX_BACKGROUND_ROWS + 1;
    oversize.background = Some(proto::Matrix {
        rows: rows as u32,
        cols: 1,
        values: vec![0.5; rows],
    });
    let status = registration_status(registry.register_model(oversize).await);
    assert_eq!(status.code(), Code::InvalidArgument);
    assert!(
        status.message().starts_with("background"),
        "{}",
        status.message()
    );
    let mut nan = grouped_linear("nan");
    if let Some(matrix) = nan.background.as_mut() {
        matrix.values[5] = f64::NAN;
    }
    let status = registration_status(registry.register_model(nan).await);
    assert!(
        status.message().starts_with("background"),
        "{}",
        status.message()
    );
    let mut onnx = grouped_linear("onnx");
    onnx.model = Some(Model::Onnx(vec![8, 1]));
    let status = registration_status(registry.register_model(onnx).await);
    // Two bytes are no ONNX graph, with or without the graph runtime (the
    // importer reads the file first).
    assert_eq!(status.code(), Code::InvalidArgument);
    assert!(status.message().starts_with("onnx"), "{}", status.message());
    let mut bad_id = grouped_linear("a/b");
    bad_id.description.clear();
    let status = registration_status(registry.register_model(bad_id).await);
    assert!(
        status.message().starts_with("model_id"),
        "{}",
        status.message()
    );

    // Still serving.
    let mut health = tonic_health::pb::health_client::HealthClient::new(server.channel.clone());
    let check = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        check.status(),
        tonic_health::pb::health_check_response::ServingStatus::Serving
    );
    let answer = attributions.explain(good).await.unwrap().into_inner();
    assert_eq!(answer.attributions.len(), 3);
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        listed.models.len(),
        1,
        "refused registrations leave nothing behind"
    );
    server.stop().await;
}

#[tokio::test]
async fn health_reflection_and_echo_answer() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;

    // grpc.health.v1 (the gRPC health checking protocol).
    let mut health = tonic_health::pb::health_client::HealthClient::new(server.channel.clone());
    for service in [
        "apportion.v1.Registry",
        "apportion.v1.Attributions",
        "apportion.v1.Diagnostics",
    ] {
        let check = health
            .check(tonic_health::pb::HealthCheckRequest {
                service: service.into(),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!(
            check.status(),
            tonic_health::pb::health_check_response::ServingStatus::Serving,
            "{service}"
        );
    }

    // grpc.reflection.v1: list the services, then fetch our file by symbol.
    use tonic_reflection::pb::v1::ServerReflectionRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    let mut reflection = ServerReflectionClient::new(server.channel.clone());
    let requests = vec![
        ServerReflectionRequest {
            host: String::new(),
            message_request: Some(MessageRequest::ListServices(String::new())),
        },
        ServerReflectionRequest {
            host: String::new(),
            message_request: Some(MessageRequest::FileContainingSymbol(
                "apportion.v1.Attributions".into(),
            )),
        },
    ];
    let mut responses = reflection
        .server_reflection_info(tokio_stream::iter(requests))
        .await
        .unwrap()
        .into_inner();
    let Some(MessageResponse::ListServicesResponse(list)) = responses
        .message()
        .await
        .unwrap()
        .and_then(|r| r.message_response)
    else {
        panic!("expected a service list");
    };
    let names: Vec<String> = list.service.into_iter().map(|s| s.name).collect();
    for wanted in [
        "apportion.v1.Registry",
        "apportion.v1.Attributions",
        "grpc.health.v1.Health",
    ] {
        assert!(
            names.iter().any(|n| n == wanted),
            "{wanted} missing from {names:?}"
        );
    }
    let Some(MessageResponse::FileDescriptorResponse(files)) = responses
        .message()
        .await
        .unwrap()
        .and_then(|r| r.message_response)
    else {
        panic!("expected a file descriptor");
    };
    assert!(!files.file_descriptor_proto.is_empty());

    // v1alpha for older clients.
    use tonic_reflection::pb::v1alpha as alpha;
    let mut reflection =
        alpha::server_reflection_client::ServerReflectionClient::new(server.channel.clone());
    let mut responses = reflection
        .server_reflection_info(tokio_stream::iter(vec![alpha::ServerReflectionRequest {
            host: String::new(),
            message_request: Some(
                alpha::server_reflection_request::MessageRequest::ListServices(String::new()),
            ),
        }]))
        .await
        .unwrap()
        .into_inner();
    let response = responses
        .message()
        .await
        .unwrap()
        .and_then(|r| r.message_response);
    assert!(
        matches!(
            response,
            Some(alpha::server_reflection_response::MessageResponse::ListServicesResponse(_))
        ),
        "{response:?}"
    );

    let echoed = server
        .diagnostics_client()
        .echo(proto::EchoRequest {
            payload: b"ping".to_vec(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(echoed.payload, b"ping");
    server.stop().await;
}

#[tokio::test]
async fn metrics_are_scraped_over_http() {
    // The Prometheus text exposition format (prometheus.io, "Exposition
    // formats"): one `name{labels} value` line per series.
    let address = support::serve_metrics();

    let dir = tempfile::tempdir().unwrap();
    let server = support::start_with(Config {
        data_dir: Some(dir.path().to_path_buf()),
        ..Config::default()
    })
    .await;
    server
        .registry_client()
        .register_model(grouped_linear("screening"))
        .await
        .unwrap();
    server
        .attributions_client()
        .explain(explain_request("screening", vec![0.1, 0.2, 0.3, 0.4]))
        .await
        .unwrap();
    let refused = server
        .attributions_client()
        .explain(explain_request("nobody", vec![0.0]))
        .await;
    assert!(refused.is_err());

    let mut body = String::new();
    for _attempt in 0..50 {
        if let Ok(text) = support::scrape(address).await
            && text.contains("apportion_requests_total")
        {
            body = text;
            break;
        }
        tokio::time::sleep(Duration::from_millis(40)).await;
    }
    for needle in [
        "apportion_requests_total{",
        "rpc=\"Explain\"",
        "code=\"OK\"",
        "code=\"NOT_FOUND\"",
        "apportion_explain_seconds_bucket",
        "apportion_coalitions_evaluated_total",
        "apportion_model_rows_evaluated_total",
        "apportion_registered_models",
        "apportion_cache_hits_total",
    ] {
        assert!(body.contains(needle), "{needle} missing from:\n{body}");
    }
    server.stop().await;
}
