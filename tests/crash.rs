//! The real `apportion serve` binary killed with SIGKILL at random moments
//! while clients register models over loopback gRPC: after each restart,
//! every acknowledged registration is served with the checksum it was
//! acknowledged with, and nothing else is served but complete registrations
//! that were sent (common practice for crash-consistency tests, no source).
//! Bounded: a few kill cycles, a few client tasks, at most a few hundred
//! registrations, each wait capped.

#![cfg(unix)]

mod support;

use std::collections::{BTreeMap, BTreeSet};
use std::ffi::OsStr;
use std::net::SocketAddr;
use std::path::Path;
use std::process::Child;
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use apportion::service::proto::registry_client::RegistryClient;
use apportion::service::proto::{self, register_model_request::Model};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::transport::Channel;

const CYCLES: usize = 4;
const CLIENTS: usize = 3;
/// Most registrations one client sends in one cycle.
const PER_CLIENT: usize = 60;

/// Starts the binary on a free loopback port over `dir`; returns once it
/// accepts connections.
fn start(dir: &Path) -> (Child, SocketAddr) {
    support::spawn_binary([OsStr::new("--data-dir"), dir.as_os_str()])
}

/// A small logistic model whose description names the registration, so a
/// served version can be traced to the request that made it.
fn registration(model_id: &str, tag: &str, seed: u64) -> proto::RegisterModelRequest {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let features = 3;
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: (0..features)
            .map(|j| proto::Feature {
                name: format!("x{j}"),
                ..Default::default()
            })
            .collect(),
        model: Some(Model::Linear(proto::LinearModel {
            weights: (0..features).map(|_| rng.random_range(-1.0..1.0)).collect(),
            intercept: rng.random_range(-1.0..1.0),
        })),
        link: proto::Link::Logistic as i32,
        background: Some(proto::Matrix {
            rows: 16,
            cols: features as u32,
            values: (0..16 * features)
                .map(|_| rng.random_range(-2.0..2.0))
                .collect(),
        }),
        description: tag.into(),
        ..Default::default()
    }
}

async fn connect(address: SocketAddr) -> RegistryClient<Channel> {
    let channel = Channel::from_shared(format!("http://{address}"))
        .unwrap()
        .connect_timeout(Duration::from_secs(5))
        .timeout(Duration::from_secs(20))
        .connect()
        .await
        .expect("the server accepts connections");
    RegistryClient::new(channel)
}

/// What an acknowledgement said.
#[derive(Debug, Clone, PartialEq)]
struct Acknowledged {
    checksum: String,
    description: String,
}

/// Checks the served registry against what was acknowledged and sent.
async fn check_served(
    address: SocketAddr,
    acknowledged: &BTreeMap<(String, u64), Acknowledged>,
    sent: &BTreeSet<String>,
) -> usize {
    let mut client = connect(address).await;
    let listed = client
        .list_models(proto::ListModelsRequest {})
        .await
        .expect("the registry lists")
        .into_inner()
        .models;
    let served: BTreeMap<(String, u64), &proto::ModelInfo> = listed
        .iter()
        .map(|info| ((info.model_id.clone(), info.version), info))
        .collect();
    for (key, ack) in acknowledged {
        let info = served
            .get(key)
            .unwrap_or_else(|| panic!("acknowledged {key:?} is not served"));
        assert_eq!(info.checksum, ack.checksum, "{key:?}");
        assert_eq!(info.description, ack.description, "{key:?}");
    }
    for info in &listed {
        // A registration that reached the disk but whose answer was lost
        // may be served, but only whole: one that was sent, with a model
        // that still answers.
        assert!(
            sent.contains(&info.description),
            "{}/{} was never sent: {:?}",
            info.model_id,
            info.version,
            info.description
        );
        let fetched = client
            .get_model(proto::GetModelRequest {
                model_id: info.model_id.clone(),
                version: info.version,
            })
            .await
            .expect("a listed model is served")
            .into_inner();
        assert_eq!(fetched.checksum, info.checksum);
        assert_eq!(fetched.background_rows, 16);
    }
    listed.len()
}

#[test]
fn acknowledged_registrations_survive_sigkill_at_random_moments() {
    let seed = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_nanos() as u64;
    eprintln!("kill moments drawn with seed {seed}");
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let dir = tempfile::tempdir().unwrap();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let mut acknowledged: BTreeMap<(String, u64), Acknowledged> = BTreeMap::new();
    let mut sent: BTreeSet<String> = BTreeSet::new();
    let mut killed_mid_flight = 0;

    for cycle in 0..CYCLES {
        let (mut child, address) = start(dir.path());
        runtime.block_on(check_served(address, &acknowledged, &sent));
        let kill_after = Duration::from_millis(rng.random_range(30..400));
        let tasks: Vec<_> = (0..CLIENTS)
            .map(|client_index| {
                // Two clients share one model id, so versions race.
                let model_id = format!("m{}", client_index % 2);
                let tags: Vec<String> = (0..PER_CLIENT)
                    .map(|i| format!("cycle {cycle} client {client_index} registration {i}"))
                    .collect();
                sent.extend(tags.iter().cloned());
                runtime.spawn(async move {
                    let mut client = connect(address).await;
                    let mut acks = Vec::new();
                    for (i, tag) in tags.into_iter().enumerate() {
                        let request = registration(&model_id, &tag, (cycle * 1000 + i) as u64);
                        match client.register_model(request).await {
                            Ok(answer) => {
                                let info = answer.into_inner();
                                acks.push((
                                    (info.model_id.clone(), info.version),
                                    Acknowledged {
                                        checksum: info.checksum,
                                        description: tag,
                                    },
                                ));
                            }
                            // The server is gone: what was acknowledged is
                            // what counts.
                            Err(_) => return (acks, true),
                        }
                    }
                    (acks, false)
                })
            })
            .collect();
        std::thread::sleep(kill_after);
        // Child::kill sends SIGKILL on Unix: no shutdown code runs.
        child.kill().unwrap();
        child.wait().unwrap();
        for task in tasks {
            let (acks, interrupted) = runtime.block_on(task).unwrap();
            killed_mid_flight += usize::from(interrupted);
            for (key, ack) in acks {
                assert!(
                    acknowledged.insert(key.clone(), ack).is_none(),
                    "version {key:?} acknowledged twice"
                );
            }
        }
    }
    let (mut child, address) = start(dir.path());
    let served = runtime.block_on(check_served(address, &acknowledged, &sent));
    child.kill().unwrap();
    child.wait().unwrap();
    eprintln!(
        "{} acknowledged, {served} served, {killed_mid_flight} clients cut off over {CYCLES} kills",
        acknowledged.len()
    );
    // The test must have exercised something: registrations were
    // acknowledged before the kills.
    assert!(!acknowledged.is_empty());
}
