//! The real `apportion serve` binary asked to stop (SIGTERM, as container
//! runtimes and service managers send) with calls in flight: health turns
//! NOT_SERVING at once, a new call is refused with UNAVAILABLE, a call that
//! finishes within the drain timeout is answered OK, one that cannot is
//! cancelled at the drain timeout and answered UNAVAILABLE, and the process
//! exits 0 (the budget issue's drain sequence; common practice for graceful
//! shutdown, no source).

#![cfg(unix)]

mod support;

use std::ffi::OsStr;
use std::net::SocketAddr;
use std::path::Path;
use std::process::{Child, Command};
use std::time::{Duration, Instant};

use apportion::service::proto::attributions_client::AttributionsClient;
use apportion::service::proto::registry_client::RegistryClient;
use apportion::service::proto::{self, register_model_request::Model};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::Code;
use tonic::transport::Channel;
use tonic_health::pb::health_check_response::ServingStatus;
use tonic_health::pb::health_client::HealthClient;

const PLAYERS: usize = 22;
const DRAIN_TIMEOUT_MS: u64 = 4_000;

/// Starts the binary on a free loopback port over `dir`; returns once it
/// accepts connections.
fn start(dir: &Path) -> (Child, SocketAddr) {
    let drain = DRAIN_TIMEOUT_MS.to_string();
    support::spawn_binary([
        OsStr::new("--data-dir"),
        dir.as_os_str(),
        OsStr::new("--compute-threads"),
        OsStr::new("2"),
        OsStr::new("--max-budget-ms"),
        OsStr::new("3600000"),
        OsStr::new("--drain-timeout-ms"),
        OsStr::new(&drain),
    ])
}

/// A logistic linear model on 22 features with 64 background rows: EXACT
/// enumeration is 2^22 coalitions of 64 rows (seconds of work), and the
/// probability is not additive, so a sampler never reaches a tiny
/// tolerance and runs to its budget.
fn wide_model() -> proto::RegisterModelRequest {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
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
            weights: (0..PLAYERS).map(|j| 0.2 * j as f64 - 2.0).collect(),
            intercept: 0.3,
        })),
        link: proto::Link::Logistic as i32,
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

fn request(estimator: proto::Estimator, budget_ms: u32) -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: "wide".into(),
        instance: vec![0.5; PLAYERS],
        removal: proto::Removal::Marginal as i32,
        target: proto::Target::Probability as i32,
        estimator: estimator as i32,
        budget_ms,
        max_evaluations: 1 << PLAYERS,
        tolerance: 1e-12,
        ..Default::default()
    }
}

async fn channel(address: SocketAddr) -> Channel {
    Channel::from_shared(format!("http://{address}"))
        .unwrap()
        .connect()
        .await
        .unwrap()
}

#[tokio::test]
async fn sigterm_drains_calls_in_flight_then_exits_zero() {
    let dir = tempfile::tempdir().unwrap();
    let (mut child, address) = start(dir.path());
    let connected = channel(address).await;
    RegistryClient::new(connected.clone())
        .register_model(wide_model())
        .await
        .unwrap();

    // An hour's budget: only the drain timeout can end it.
    let mut endless_client = AttributionsClient::new(connected.clone());
    let endless = tokio::spawn(async move {
        endless_client
            .explain(request(proto::Estimator::Exact, 3_600_000))
            .await
    });
    // A sampler that answers when its 2 s budget ends, inside the drain
    // timeout.
    let mut finishing_client = AttributionsClient::new(connected.clone());
    let finishing = tokio::spawn(async move {
        finishing_client
            .explain(request(proto::Estimator::Permutation, 2_000))
            .await
    });
    tokio::time::sleep(Duration::from_millis(300)).await;
    assert!(
        !endless.is_finished() && !finishing.is_finished(),
        "both are in flight"
    );

    let asked = Instant::now();
    let signalled = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(signalled.success());

    // Health on a new connection: the listener still answers while the
    // server drains, so probes and load balancers see NOT_SERVING.
    let mut health = HealthClient::new(channel(address).await);
    let mut seen = None;
    for _attempt in 0..200 {
        let status = health
            .check(tonic_health::pb::HealthCheckRequest {
                service: String::new(),
            })
            .await
            .unwrap()
            .into_inner()
            .status;
        seen = Some(status);
        if status == ServingStatus::NotServing as i32 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(seen, Some(ServingStatus::NotServing as i32));
    let refused = AttributionsClient::new(connected.clone())
        .explain(request(proto::Estimator::Permutation, 100))
        .await
        .unwrap_err();
    assert_eq!(refused.code(), Code::Unavailable, "{refused:?}");
    assert!(refused.message().contains("shutting down"), "{refused:?}");

    let finished = finishing.await.unwrap().unwrap().into_inner();
    assert_eq!(finished.attributions.len(), PLAYERS);
    let stopped = endless.await.unwrap().unwrap_err();
    assert_eq!(stopped.code(), Code::Unavailable, "{stopped:?}");
    assert!(stopped.message().contains("stopped before"), "{stopped:?}");

    // A cap so a hang fails the test instead of stalling it; the time is
    // reported, not asserted.
    let mut exit = None;
    while asked.elapsed() < Duration::from_secs(60) {
        if let Some(status) = child.try_wait().unwrap() {
            exit = Some(status);
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let Some(exit) = exit else {
        child.kill().unwrap();
        panic!("the server did not exit within 60 s of SIGTERM");
    };
    eprintln!(
        "exited {exit} {:.0} ms after SIGTERM (drain timeout {DRAIN_TIMEOUT_MS} ms)",
        asked.elapsed().as_secs_f64() * 1e3
    );
    assert!(exit.success(), "{exit}");
}
