//! Starts a real apportion gRPC server on 127.0.0.1:0 over a data directory,
//! with generated clients connected to it, and stops it on request.

#![allow(dead_code)]

use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;

use apportion::registry::{LoadProblem, Registry};
use apportion::service::proto::attributions_client::AttributionsClient;
use apportion::service::proto::diagnostics_client::DiagnosticsClient;
use apportion::service::proto::registry_client::RegistryClient;
use apportion::service::{Config, ServiceError, State, StreamStats};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tonic::transport::Channel;

pub struct TestServer {
    pub address: SocketAddr,
    /// The server's own registry, for in-process comparisons.
    pub registry: Arc<Registry>,
    /// What the server's ExplainStreams have read and sent.
    pub streams: Arc<StreamStats>,
    pub channel: Channel,
    stop: oneshot::Sender<()>,
    task: JoinHandle<Result<(), ServiceError>>,
}

/// A server with the default settings except `compute_threads = 2`.
pub async fn start(data_dir: &Path) -> TestServer {
    let config = Config {
        data_dir: Some(data_dir.to_path_buf()),
        compute_threads: 2,
        ..Config::default()
    };
    start_with(config).await
}

pub async fn start_with(config: Config) -> TestServer {
    let (server, problems) = start_reporting(config).await;
    assert!(
        problems.is_empty(),
        "unexpected load problems: {problems:?}"
    );
    server
}

/// [`start_with`], returning the records the registry could not load
/// instead of refusing them.
pub async fn start_reporting(config: Config) -> (TestServer, Vec<LoadProblem>) {
    let (state, problems) = State::open(&config).expect("the registry opens");
    let registry = state.registry().clone();
    let streams = state.stream_stats().clone();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let address = listener.local_addr().expect("local address");
    let (stop, stopped) = oneshot::channel::<()>();
    let task = tokio::spawn(apportion::service::run(listener, state, async {
        let _ = stopped.await;
    }));
    let channel = Channel::from_shared(format!("http://{address}"))
        .expect("valid uri")
        .connect()
        .await
        .expect("the server accepts connections");
    let server = TestServer {
        address,
        registry,
        streams,
        channel,
        stop,
        task,
    };
    (server, problems)
}

impl TestServer {
    pub fn registry_client(&self) -> RegistryClient<Channel> {
        RegistryClient::new(self.channel.clone())
    }

    pub fn attributions_client(&self) -> AttributionsClient<Channel> {
        AttributionsClient::new(self.channel.clone())
    }

    pub fn diagnostics_client(&self) -> DiagnosticsClient<Channel> {
        DiagnosticsClient::new(self.channel.clone())
    }

    /// Shuts the server down and waits until it has released the data
    /// directory.
    pub async fn stop(self) {
        let TestServer {
            registry,
            channel,
            stop,
            task,
            ..
        } = self;
        drop(channel);
        drop(registry);
        let _ = stop.send(());
        task.await
            .expect("the server task ends")
            .expect("the server stops cleanly");
    }
}

/// The numbers of a JSON array, null read as NaN (fixtures write missing
/// values and NaN as null).
pub fn json_numbers(value: &serde_json::Value) -> Vec<f64> {
    value
        .as_array()
        .expect("an array")
        .iter()
        .map(|v| v.as_f64().unwrap_or(f64::NAN))
        .collect()
}

/// Largest |a − b| / max(1, |b|), and where.
pub fn worst_relative(got: &[f64], reference: &[f64]) -> (f64, usize) {
    assert_eq!(got.len(), reference.len());
    got.iter()
        .zip(reference)
        .map(|(a, b)| (a - b).abs() / b.abs().max(1.0))
        .enumerate()
        .fold(
            (0.0, 0),
            |(worst, at), (i, e)| if e > worst { (e, i) } else { (worst, at) },
        )
}
