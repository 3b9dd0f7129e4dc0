//! Deadlines, cancellation and the server's maxima over loopback gRPC: an
//! exact call predicted not to finish in its budget is refused at once with
//! FAILED_PRECONDITION, and one whose prediction was wrong fails with
//! DEADLINE_EXCEEDED; a call its client abandons stops computing (seen
//! through the cancellation counter on the metrics endpoint) and frees its
//! compute thread; requests at the type maxima of the fields that size work
//! (and a data set whose rows times the draws pass the rows one coalition
//! may cost) get INVALID_ARGUMENT naming the field and the maximum; and the
//! server
//! keeps serving after each.

mod support;

use std::time::Duration;

use apportion::service::Config;
use apportion::service::proto::{self, register_model_request::Model};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::Code;

const PLAYERS: usize = 22;

/// A linear model on 22 features with 64 background rows: EXACT under
/// MARGINAL removal evaluates 2^22 coalitions of 64 rows each (about 268
/// million model rows), far beyond any budget below and seconds of work
/// even on a fast machine.
fn wide_model() -> proto::RegisterModelRequest {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let rows = 64;
    proto::RegisterModelRequest {
        model_id: "wide".into(),
        features: (0..PLAYERS)
            .map(|j| proto::Feature {
                name: format!("x{j}"),
                ..Default::default()
            })
            .collect(),
        model: Some(Model::Linear(proto::LinearModel {
            weights: (0..PLAYERS).map(|j| 0.1 * j as f64 - 1.0).collect(),
            intercept: 0.3,
        })),
        link: proto::Link::Identity as i32,
        background: Some(proto::Matrix {
            rows: rows as u32,
            cols: PLAYERS as u32,
            values: (0..rows * PLAYERS)
                .map(|_| rng.random_range(-1.0..1.0))
                .collect(),
        }),
        ..Default::default()
    }
}

/// EXACT enumeration of the wide model, which the planner takes as asked.
fn exact_request(budget_ms: u32) -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: "wide".into(),
        instance: vec![0.5; PLAYERS],
        removal: proto::Removal::Marginal as i32,
        estimator: proto::Estimator::Exact as i32,
        budget_ms,
        max_evaluations: 1 << PLAYERS,
        ..Default::default()
    }
}

/// A cheap call that must still be answered: permutation sampling with a
/// small cap.
fn small_request() -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: "wide".into(),
        instance: vec![0.5; PLAYERS],
        removal: proto::Removal::Marginal as i32,
        estimator: proto::Estimator::Permutation as i32,
        budget_ms: 10_000,
        max_evaluations: 200,
        ..Default::default()
    }
}

/// The value of an unlabelled counter in a Prometheus text exposition
/// (prometheus.io, "Exposition formats"), 0 while it is absent.
fn counter(body: &str, name: &str) -> f64 {
    body.lines()
        .find_map(|line| {
            line.strip_prefix(name)?
                .strip_prefix(' ')?
                .trim()
                .parse()
                .ok()
        })
        .unwrap_or(0.0)
}

#[tokio::test]
async fn a_cancelled_exact_call_stops_computing_and_the_server_keeps_serving() {
    let metrics = support::serve_metrics();

    let dir = tempfile::tempdir().unwrap();
    // One compute thread: if the cancelled computation kept it, no later
    // call could be computed.
    let server = support::start_with(Config {
        data_dir: Some(dir.path().to_path_buf()),
        compute_threads: 1,
        max_budget: Duration::from_secs(3600),
        ..Config::default()
    })
    .await;
    server
        .registry_client()
        .register_model(wide_model())
        .await
        .unwrap();

    // An hour's budget and no gRPC deadline: only the client's cancelling
    // can stop it early.
    let mut client = server.attributions_client();
    let call = tokio::spawn(async move { client.explain(exact_request(3_600_000)).await });
    // Give the call time to reach the compute thread (not an assertion:
    // a call dropped before it starts computing is counted too, since the
    // computation checks the flag before its first batch).
    tokio::time::sleep(Duration::from_millis(300)).await;
    assert!(
        !call.is_finished(),
        "2^22 coalitions cannot be done already"
    );
    call.abort();
    assert!(call.await.unwrap_err().is_cancelled());

    let mut cancelled = 0.0;
    for _attempt in 0..600 {
        if let Ok(body) = support::scrape(metrics).await {
            cancelled = counter(&body, "apportion_computations_cancelled_total");
            if cancelled >= 1.0 {
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert_eq!(
        cancelled, 1.0,
        "the computation did not report a cancellation"
    );

    // The one compute thread is free again.
    let answer = server
        .attributions_client()
        .explain(small_request())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(answer.attributions.len(), PLAYERS);
    server.stop().await;
}

/// The planner prices EXACT from the measured row cost: 2^22 coalitions of
/// 64 rows cannot finish in 50 ms, so the call is refused before any
/// computing, with the predicted time.
#[tokio::test]
async fn an_exact_call_predicted_past_its_budget_is_refused_at_once() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    server
        .registry_client()
        .register_model(wide_model())
        .await
        .unwrap();
    let status = server
        .attributions_client()
        .explain(exact_request(50))
        .await
        .unwrap_err();
    assert_eq!(status.code(), Code::FailedPrecondition, "{status:?}");
    assert!(
        status
            .message()
            .starts_with("estimator: EXACT is predicted to take")
            && status.message().contains("50.000 ms budget"),
        "{}",
        status.message()
    );
    server
        .attributions_client()
        .explain(small_request())
        .await
        .unwrap();
    server.stop().await;
}

/// When the prediction is wrong (here a row cost of 0 is injected, which
/// the planner prices at its floor of 1 ns a row: 2^22 × 64 rows ≈ 268 ms,
/// inside a 300 ms budget, while filling and predicting 268 million rows
/// takes seconds), the exact computation still checks the deadline and
/// fails with DEADLINE_EXCEEDED rather than running on.
#[test]
fn an_exact_computation_predicted_wrongly_still_stops_at_its_deadline() {
    use std::sync::Arc;

    use apportion::engine::{ErrorKind, Players, PreparedModel, Request, prepare};
    use apportion::model::{LinearModel, Link};

    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let background = ndarray::Array2::from_shape_fn((64, PLAYERS), |_| rng.random_range(-1.0..1.0));
    let model = LinearModel::try_new(vec![0.5; PLAYERS], 0.3, Link::Logistic).unwrap();
    let prepared = Arc::new(
        PreparedModel::try_new(
            Arc::new(model),
            Players::singletons(PLAYERS),
            background,
            0.0,
        )
        .unwrap(),
    );
    let request = Request {
        estimator: Some(apportion::engine::EstimatorKind::Exact),
        budget: Duration::from_millis(300),
        max_evaluations: 1 << PLAYERS,
        ..Request::new(vec![0.5; PLAYERS])
    };
    let job = prepare(&prepared, request).unwrap();
    let error = job
        .run(std::time::Instant::now() + Duration::from_millis(300))
        .unwrap_err();
    assert_eq!(error.kind, ErrorKind::DeadlineExceeded, "{error:?}");
    assert_eq!(error.field, "budget_ms");
}

#[tokio::test]
async fn hostile_sizes_get_precise_statuses_and_the_server_keeps_serving() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    server
        .registry_client()
        .register_model(wide_model())
        .await
        .unwrap();
    let defaults = Config::default();
    let mut attributions = server.attributions_client();
    // 300 rows × 4096 draws: 1,228,800 model rows for one coalition value.
    let dataset_rows = 300;
    let cases: [(&str, String, proto::ExplainRequest); 5] = [
        (
            "budget_ms",
            defaults.max_budget.as_millis().to_string(),
            proto::ExplainRequest {
                budget_ms: u32::MAX,
                ..small_request()
            },
        ),
        (
            "max_evaluations",
            defaults.max_evaluations.to_string(),
            proto::ExplainRequest {
                max_evaluations: u64::MAX,
                ..small_request()
            },
        ),
        (
            "draws",
            defaults.max_draws.to_string(),
            proto::ExplainRequest {
                removal: proto::Removal::Independent as i32,
                draws: u32::MAX,
                ..small_request()
            },
        ),
        (
            "dataset",
            defaults.max_coalition_rows.to_string(),
            proto::ExplainRequest {
                removal: proto::Removal::Independent as i32,
                draws: defaults.max_draws,
                target: proto::Target::DatasetLoss as i32,
                dataset: Some(proto::Matrix {
                    rows: dataset_rows as u32,
                    cols: PLAYERS as u32,
                    values: vec![0.25; dataset_rows * PLAYERS],
                }),
                dataset_labels: vec![1.0; dataset_rows],
                ..small_request()
            },
        ),
        // Within the server's cap, but more than 2^22 coalitions for EXACT
        // over 22 players allows.
        (
            "max_evaluations",
            (1u64 << 21).to_string(),
            proto::ExplainRequest {
                max_evaluations: 1 << 21,
                ..exact_request(1000)
            },
        ),
    ];
    for (field, maximum, request) in cases {
        let status = attributions.explain(request).await.unwrap_err();
        assert_eq!(status.code(), Code::InvalidArgument, "{field}: {status:?}");
        assert!(
            status.message().starts_with(&format!("{field}:")),
            "{}",
            status.message()
        );
        assert!(status.message().contains(&maximum), "{}", status.message());
        attributions.explain(small_request()).await.unwrap();
    }
    server.stop().await;
}

#[tokio::test]
async fn a_message_over_the_maximum_gets_resource_exhausted_both_ways() {
    // gRPC status codes, grpc.io documentation: a message larger than the
    // configured maximum, sent or received, is RESOURCE_EXHAUSTED (tonic
    // alone answers OUT_OF_RANGE).
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    server
        .registry_client()
        .register_model(wide_model())
        .await
        .unwrap();
    let limit = Config::default().max_message_bytes;
    // 65 MiB of instance values, over the default 64 MiB.
    let oversize = proto::ExplainRequest {
        instance: vec![0.5; (65 << 20) / 8],
        ..small_request()
    };
    let mut attributions = server.attributions_client();
    let status = attributions.explain(oversize).await.unwrap_err();
    assert_eq!(status.code(), Code::ResourceExhausted, "{status:?}");
    assert!(status.message().contains("max_message_mib"), "{status:?}");
    assert!(status.message().contains(&limit.to_string()), "{status:?}");
    attributions
        .explain(small_request())
        .await
        .expect("the server keeps serving");
    server.stop().await;

    // An answer over the maximum: a server allowing 2 KiB messages lists
    // more models than fit in one.
    let dir = tempfile::tempdir().unwrap();
    let server = support::start_with(Config {
        data_dir: Some(dir.path().to_path_buf()),
        compute_threads: 1,
        max_message_bytes: 2048,
        ..Config::default()
    })
    .await;
    let mut registry = server.registry_client();
    for i in 0..40 {
        registry
            .register_model(proto::RegisterModelRequest {
                model_id: format!("small-{i}"),
                features: vec![proto::Feature {
                    name: "x".into(),
                    ..Default::default()
                }],
                model: Some(Model::Linear(proto::LinearModel {
                    weights: vec![1.0],
                    intercept: 0.0,
                })),
                link: proto::Link::Identity as i32,
                background: Some(proto::Matrix {
                    rows: 1,
                    cols: 1,
                    values: vec![0.0],
                }),
                ..Default::default()
            })
            .await
            .unwrap();
    }
    let status = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap_err();
    assert_eq!(status.code(), Code::ResourceExhausted, "{status:?}");
    registry
        .get_model(proto::GetModelRequest {
            model_id: "small-3".into(),
            version: 0,
        })
        .await
        .expect("the server keeps serving");
    server.stop().await;
}
