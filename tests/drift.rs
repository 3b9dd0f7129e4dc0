//! Attribution drift over loopback gRPC: a linear model's attributions
//! have the closed form w_j (x_j − mean_j) ("A unified approach to
//! interpreting model predictions", NeurIPS 2017), so a feature held at
//! its background mean has attribution 0 and its effect switches on when
//! it starts to vary. After one window with x3 held and one with x3
//! varying, AttributionDrift flags x3 and no other player, and the
//! Prometheus gauges of the closed window say the same.

mod support;

use std::time::{Duration, SystemTime, UNIX_EPOCH};

use apportion::service::Config;
use apportion::service::proto::monitoring_client::MonitoringClient;
use apportion::service::proto::{self, register_model_request::Model};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use tonic::Code;

const FEATURES: usize = 5;
const WINDOW: Duration = Duration::from_secs(1);

fn normals(rng: &mut ChaCha8Rng, count: usize) -> Vec<f64> {
    (0..count).map(|_| StandardNormal.sample(rng)).collect()
}

/// Background rows and their negations: every column's mean is 0 up to
/// rounding.
fn model(model_id: &str) -> proto::RegisterModelRequest {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let half = normals(&mut rng, 50 * FEATURES);
    let values: Vec<f64> = half
        .iter()
        .copied()
        .chain(half.iter().map(|v| -v))
        .collect();
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: (0..FEATURES)
            .map(|j| proto::Feature {
                name: format!("x{j}"),
                ..Default::default()
            })
            .collect(),
        model: Some(Model::Linear(proto::LinearModel {
            weights: vec![0.8, -0.5, 0.3, 1.2, -0.9],
            intercept: 0.1,
        })),
        link: proto::Link::Identity as i32,
        background: Some(proto::Matrix {
            rows: 100,
            cols: FEATURES as u32,
            values,
        }),
        ..Default::default()
    }
}

/// One batch of `count` applicants; x3 at its background mean unless
/// `varying`.
fn batch(rng: &mut ChaCha8Rng, count: usize, varying: bool) -> proto::ExplainBatchRequest {
    proto::ExplainBatchRequest {
        request: Some(proto::ExplainRequest {
            model_id: "drifting".into(),
            budget_ms: 30_000,
            ..Default::default()
        }),
        instances: (0..count)
            .map(|_| {
                let mut instance = normals(rng, FEATURES);
                if !varying {
                    instance[3] = 0.0;
                }
                proto::BatchInstance {
                    instance,
                    ..Default::default()
                }
            })
            .collect(),
    }
}

/// Sleeps until just after the next window boundary, so the next batch
/// falls in one window.
async fn next_window() {
    let now = SystemTime::now().duration_since(UNIX_EPOCH).unwrap();
    let window = WINDOW.as_millis();
    let left = window - now.as_millis() % window;
    tokio::time::sleep(Duration::from_millis(left as u64 + 20)).await;
}

/// A gauge's value for one model and player in a Prometheus text
/// exposition (prometheus.io, "Exposition formats").
fn gauge(body: &str, name: &str, player: &str) -> Option<f64> {
    let prefix = format!("{name}{{model=\"drifting\",player=\"{player}\"}} ");
    body.lines()
        .find_map(|line| line.strip_prefix(&prefix)?.trim().parse().ok())
}

#[tokio::test]
async fn a_feature_whose_effect_switches_on_is_flagged_and_no_other() {
    let metrics = support::serve_metrics();
    let dir = tempfile::tempdir().unwrap();
    let server = support::start_with(Config {
        data_dir: Some(dir.path().to_path_buf()),
        compute_threads: 2,
        drift_window: WINDOW,
        ..Config::default()
    })
    .await;
    let mut registry = server.registry_client();
    registry.register_model(model("drifting")).await.unwrap();
    registry.register_model(model("idle")).await.unwrap();
    let mut monitoring = MonitoringClient::new(server.channel.clone());
    let ask = |model_id: &str| proto::AttributionDriftRequest {
        model_id: model_id.into(),
        recent_windows: 1,
        ..Default::default()
    };
    let unknown = monitoring
        .attribution_drift(ask("nobody"))
        .await
        .unwrap_err();
    assert_eq!(unknown.code(), Code::NotFound, "{unknown:?}");
    let idle = monitoring.attribution_drift(ask("idle")).await.unwrap_err();
    assert_eq!(idle.code(), Code::FailedPrecondition, "{idle:?}");
    assert!(idle.message().starts_with("model_id:"), "{idle:?}");

    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let mut client = server.attributions_client();
    next_window().await;
    client
        .explain_batch(batch(&mut rng, 400, false))
        .await
        .unwrap();
    next_window().await;
    client
        .explain_batch(batch(&mut rng, 400, true))
        .await
        .unwrap();

    let drift = monitoring
        .attribution_drift(ask("drifting"))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(drift.version, 1);
    assert_eq!(drift.window_ms, 1_000);
    assert!(drift.reference_end_unix_ms <= drift.recent_start_unix_ms);
    for player in &drift.players {
        assert_eq!((player.reference_count, player.recent_count), (400, 400));
        assert_eq!(player.shifted, player.name == "x3", "{player:?}");
        if player.name == "x3" {
            // Held at its mean: zero up to the rounding of that mean.
            assert!(player.reference_mean_abs < 1e-15, "{player:?}");
            // |w3| E|N(0,1)| = 1.2 · sqrt(2/π) ≈ 0.96.
            assert!((player.mean_abs_change - 0.96).abs() < 0.15, "{player:?}");
        } else {
            assert!(player.stability_index < 0.1, "{player:?}");
        }
    }

    // One more answer in a later window closes the varying one: its
    // figures reach the gauges.
    next_window().await;
    client
        .explain_batch(batch(&mut rng, 1, true))
        .await
        .unwrap();
    let body = support::scrape(metrics).await.unwrap();
    let index = gauge(&body, "apportion_attribution_stability_index", "x3").expect(&body);
    assert!(index > 0.25, "{index}");
    let other = gauge(&body, "apportion_attribution_stability_index", "x0").expect(&body);
    assert!(other < 0.1, "{other}");
    assert!(gauge(&body, "apportion_attribution_mean_abs", "x3").unwrap() > 0.5);

    // Deleting the model forgets its windows.
    registry
        .delete_model(proto::DeleteModelRequest {
            model_id: "drifting".into(),
            version: 0,
        })
        .await
        .unwrap();
    let gone = monitoring
        .attribution_drift(ask("drifting"))
        .await
        .unwrap_err();
    assert_eq!(gone.code(), Code::NotFound);
    server.stop().await;
}
