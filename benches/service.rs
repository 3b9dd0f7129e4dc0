//! Service throughput over loopback gRPC: requests per second and p50/p99
//! latency of Explain beside the Echo RPC on the same server in the same
//! run (the stack's limit); then explanations per second of 1,000 rows
//! through unary calls, one ExplainBatch and one ExplainStream. Echo and the
//! logistic Explain also run over TLS on a second server (certificates made
//! here with rcgen), and a last table times a new connection per call,
//! plaintext and TLS (the handshake's cost).
//!
//! `cargo bench --bench service` (`-- --quick` for shorter rounds). Server
//! and clients share this process and the machine's cores, as stated in the
//! output.

mod support;

use std::time::{Duration, Instant};

use apportion::demo::{self, live};
use apportion::service::proto::{
    self, attributions_client::AttributionsClient, diagnostics_client::DiagnosticsClient,
    register_model_request::Model as ModelBody, registry_client::RegistryClient,
};
use apportion::service::{Config, Options, ServerTls, State, TlsFiles, Transport};
use ndarray::Array2;
use prost::Message;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::transport::{Certificate, Channel, ClientTlsConfig};

const CHANNELS: usize = 4;
const TASKS: usize = 16;

#[derive(Clone)]
enum Call {
    Echo(Vec<u8>),
    Explain(Box<proto::ExplainRequest>),
}

struct Measured {
    per_second: f64,
    p50_ms: f64,
    p99_ms: f64,
}

async fn measure(channels: &[Channel], call: &Call, duration: Duration) -> Measured {
    let deadline = Instant::now() + duration;
    let mut tasks = Vec::new();
    for task in 0..TASKS {
        let channel = channels[task % channels.len()].clone();
        let call = call.clone();
        tasks.push(tokio::spawn(async move {
            let mut echo = DiagnosticsClient::new(channel.clone());
            let mut explain = AttributionsClient::new(channel);
            let mut latencies = Vec::new();
            while Instant::now() < deadline {
                let start = Instant::now();
                match &call {
                    Call::Echo(payload) => {
                        echo.echo(proto::EchoRequest {
                            payload: payload.clone(),
                        })
                        .await
                        .expect("echo");
                    }
                    Call::Explain(request) => {
                        explain.explain(*request.clone()).await.expect("explain");
                    }
                }
                latencies.push(start.elapsed());
            }
            latencies
        }));
    }
    let started = Instant::now();
    let mut latencies = Vec::new();
    for task in tasks {
        latencies.extend(task.await.expect("client task"));
    }
    let elapsed = started.elapsed().max(duration);
    latencies.sort();
    let at = |q: f64| latencies[((latencies.len() - 1) as f64 * q) as usize].as_secs_f64() * 1e3;
    Measured {
        per_second: latencies.len() as f64 / elapsed.as_secs_f64(),
        p50_ms: at(0.50),
        p99_ms: at(0.99),
    }
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    // Short rounds, the cases taking turns, and the median per case: the
    // shared machine's speed drifts by up to 2× over tens of seconds, and
    // turns keep every case's rounds in the same conditions.
    let round = Duration::from_millis(500);
    let rounds = if quick { 3 } else { 9 };
    let runtime = tokio::runtime::Runtime::new().expect("runtime");
    runtime.block_on(async {
        let data_dir = std::env::temp_dir().join(format!("apportion-bench-{}", std::process::id()));
        let config = Config {
            data_dir: Some(data_dir.clone()),
            metrics_address: None,
            ..Config::default()
        };
        let compute_threads = config.compute_threads;
        let (state, _) = State::open(&config).expect("registry");
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let address = listener.local_addr().expect("address");
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(apportion::service::run(listener, state, async {
            let _ = stopped.await;
        }));
        let mut channels = Vec::new();
        for _ in 0..CHANNELS {
            channels.push(
                Channel::from_shared(format!("http://{address}"))
                    .expect("uri")
                    .connect()
                    .await
                    .expect("connect"),
            );
        }
        let mut registry = RegistryClient::new(channels[0].clone());

        // (a) A 20-feature logistic model (bench data only).
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let background = Array2::from_shape_fn((100, 20), |_| rng.random_range(-1.0..1.0));
        let features: Vec<proto::Feature> = (0..20)
            .map(|j| proto::Feature { name: format!("x{j}"), ..Default::default() })
            .collect();
        let linear_registration = proto::RegisterModelRequest {
            model_id: "bench-linear".into(),
            features,
            model: Some(ModelBody::Linear(proto::LinearModel {
                weights: (0..20).map(|_| rng.random_range(-1.0..1.0)).collect(),
                intercept: 0.1,
            })),
            link: proto::Link::Logistic as i32,
            background: Some(live::matrix(background.view())),
            description: String::new(),
            ..Default::default()
        };
        registry
            .register_model(linear_registration.clone())
            .await
            .expect("register linear");
        let tls = TlsBench::start(&data_dir, &config).await;
        RegistryClient::new(tls.channels[0].clone())
            .register_model(linear_registration)
            .await
            .expect("register linear over TLS");
        // (b) The demo tree ensemble.
        let scenario = demo::scenario(7).expect("scenario");
        registry
            .register_model(proto::RegisterModelRequest {
                model_id: "bench-trees".into(),
                features: scenario
                    .features
                    .iter()
                    .map(|f| proto::Feature { name: f.name.into(), group: f.group.into(), ..Default::default() })
                    .collect(),
                model: Some(ModelBody::Trees(live::ensemble_message(&scenario.trees))),
                link: proto::Link::Logistic as i32,
                background: Some(live::matrix(scenario.background.view())),
                description: String::new(),
                ..Default::default()
            })
            .await
            .expect("register trees");

        let linear_request = proto::ExplainRequest {
            model_id: "bench-linear".into(),
            instance: (0..20).map(|j| j as f64 / 20.0).collect(),
            ..Default::default()
        };
        let trees_request = proto::ExplainRequest {
            model_id: "bench-trees".into(),
            instance: scenario.applicants.row(1).to_vec(),
            ..Default::default()
        };
        // The cases must take the paths they are named after.
        let mut explain = AttributionsClient::new(channels[0].clone());
        let mut linear_bytes = 0;
        for (request, expected) in [
            (&linear_request, proto::Estimator::LinearExact),
            (&trees_request, proto::Estimator::TreeExact),
        ] {
            let answer = explain.explain(request.clone()).await.expect("explain").into_inner();
            assert_eq!(answer.estimator_used, expected as i32, "{} took another estimator", request.model_id);
            if expected == proto::Estimator::LinearExact {
                linear_bytes = request.encoded_len() + answer.encoded_len();
            }
        }
        // An echo carrying as many bytes as the logistic call does (request
        // and answer), half each way: the stack's limit at that message size.
        let sized = vec![7u8; linear_bytes / 2];

        let plain = channels.as_slice();
        let over_tls = tls.channels.as_slice();
        let cases = [
            ("Echo (the stack's limit)", Call::Echo(b"ping".to_vec()), plain),
            ("Echo, as many bytes as the logistic call", Call::Echo(sized), plain),
            ("Explain, 20-feature logistic, LINEAR_EXACT", Call::Explain(Box::new(linear_request.clone())), plain),
            ("Explain, demo trees (100 trees, 8 players, 100 background rows), TREE_EXACT", Call::Explain(Box::new(trees_request)), plain),
            ("Echo over TLS", Call::Echo(b"ping".to_vec()), over_tls),
            ("Explain, 20-feature logistic, LINEAR_EXACT, over TLS", Call::Explain(Box::new(linear_request)), over_tls),
        ];
        println!("machine: {}", support::machine());
        println!(
            "server and clients in one process; {TASKS} client tasks over {CHANNELS} channels; {compute_threads} compute threads; medians of {rounds} rounds of {:.1} s per case, the cases taking turns, after a warm-up",
            round.as_secs_f64()
        );
        println!();
        println!("| case | requests/s | p50 ms | p99 ms | share of echo throughput |");
        println!("|---|---|---|---|---|");
        for (_, call, over) in &cases {
            measure(over, call, Duration::from_millis(300)).await;
        }
        let mut measured: Vec<Vec<Measured>> = cases.iter().map(|_| Vec::new()).collect();
        for _ in 0..rounds {
            for ((_, call, over), results) in cases.iter().zip(&mut measured) {
                results.push(measure(over, call, round).await);
            }
        }
        let median = |results: &[Measured], field: fn(&Measured) -> f64| {
            let mut values: Vec<f64> = results.iter().map(field).collect();
            values.sort_by(f64::total_cmp);
            values[values.len() / 2]
        };
        let echo_rate = median(&measured[0], |m| m.per_second);
        for ((name, _, _), results) in cases.iter().zip(&measured) {
            let rate = median(results, |m| m.per_second);
            println!(
                "| {name} | {rate:.0} | {:.2} | {:.2} | {:.0}% |",
                median(results, |m| m.p50_ms),
                median(results, |m| m.p99_ms),
                100.0 * rate / echo_rate
            );
        }
        println!();
        bulk_table(&channels, &linear_rows(&mut rng), &scenario, rounds).await;
        println!();
        connection_table(address, &tls, if quick { 50 } else { 200 }).await;
        tls.stop().await;
        let _ = stop.send(());
        let _ = server.await;
        let _ = std::fs::remove_dir_all(&data_dir);
    });
}

/// Rows explained per bulk case.
const BULK_ROWS: usize = 1000;

fn linear_rows(rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    (0..BULK_ROWS)
        .map(|_| (0..20).map(|_| rng.random_range(-1.0..1.0)).collect())
        .collect()
}

/// One way of explaining the rows: wall time for all of them.
async fn unary_rows(
    channels: &[Channel],
    shape: &proto::ExplainRequest,
    rows: &[Vec<f64>],
) -> Duration {
    let started = Instant::now();
    let mut tasks = Vec::new();
    for task in 0..TASKS {
        let mut client = AttributionsClient::new(channels[task % channels.len()].clone());
        let mine: Vec<proto::ExplainRequest> = rows
            .iter()
            .skip(task)
            .step_by(TASKS)
            .map(|row| proto::ExplainRequest {
                instance: row.clone(),
                ..shape.clone()
            })
            .collect();
        tasks.push(tokio::spawn(async move {
            for request in mine {
                client.explain(request).await.expect("explain");
            }
        }));
    }
    for task in tasks {
        task.await.expect("client task");
    }
    started.elapsed()
}

async fn batch_rows(
    channel: &Channel,
    shape: &proto::ExplainRequest,
    rows: &[Vec<f64>],
) -> Duration {
    let mut client = AttributionsClient::new(channel.clone());
    let request = proto::ExplainBatchRequest {
        request: Some(shape.clone()),
        instances: rows
            .iter()
            .map(|row| proto::BatchInstance {
                instance: row.clone(),
                ..Default::default()
            })
            .collect(),
    };
    let started = Instant::now();
    let answer = client
        .explain_batch(request)
        .await
        .expect("batch")
        .into_inner();
    let elapsed = started.elapsed();
    assert!(
        answer.items.iter().all(|item| matches!(
            item.outcome,
            Some(proto::explain_outcome::Outcome::Explanation(_))
        )),
        "every batch row is answered"
    );
    elapsed
}

async fn stream_rows(
    channel: &Channel,
    shape: &proto::ExplainRequest,
    rows: &[Vec<f64>],
) -> Duration {
    let mut client = AttributionsClient::new(channel.clone());
    let requests: Vec<proto::ExplainRequest> = rows
        .iter()
        .map(|row| proto::ExplainRequest {
            instance: row.clone(),
            ..shape.clone()
        })
        .collect();
    let started = Instant::now();
    let mut answers = client
        .explain_stream(tokio_stream::iter(requests))
        .await
        .expect("stream")
        .into_inner();
    let mut count = 0;
    while let Some(outcome) = answers.message().await.expect("stream answer") {
        assert!(matches!(
            outcome.outcome,
            Some(proto::explain_outcome::Outcome::Explanation(_))
        ));
        count += 1;
    }
    assert_eq!(count, rows.len());
    started.elapsed()
}

/// Explanations per second of the same 1,000 rows three ways, the ways
/// taking turns in each round, medians over the rounds.
async fn bulk_table(
    channels: &[Channel],
    linear: &[Vec<f64>],
    scenario: &demo::Scenario,
    rounds: usize,
) {
    let applicants = scenario.applicants.nrows();
    let trees: Vec<Vec<f64>> = (0..BULK_ROWS)
        .map(|i| scenario.applicants.row(i % applicants).to_vec())
        .collect();
    let models = [
        (
            "20-feature logistic, LINEAR_EXACT",
            "bench-linear",
            linear.to_vec(),
        ),
        (
            "demo trees (100 trees, 8 players, 100 background rows), TREE_EXACT",
            "bench-trees",
            trees,
        ),
    ];
    println!(
        "{BULK_ROWS} rows per case; unary: {TASKS} client tasks over {} channels; batch: one ExplainBatch call; stream: one ExplainStream on one channel (16 in flight, the default); medians of {rounds} rounds",
        channels.len()
    );
    println!();
    println!(
        "| model | unary explanations/s | ExplainBatch explanations/s | ExplainStream explanations/s | batch / unary | stream / unary |"
    );
    println!("|---|---|---|---|---|---|");
    for (name, model_id, rows) in &models {
        let shape = proto::ExplainRequest {
            model_id: (*model_id).into(),
            ..Default::default()
        };
        // Warm-up.
        unary_rows(channels, &shape, &rows[..100]).await;
        batch_rows(&channels[0], &shape, &rows[..100]).await;
        stream_rows(&channels[0], &shape, &rows[..100]).await;
        let (mut unary, mut batch, mut stream) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..rounds {
            unary.push(rows.len() as f64 / unary_rows(channels, &shape, rows).await.as_secs_f64());
            batch.push(
                rows.len() as f64 / batch_rows(&channels[0], &shape, rows).await.as_secs_f64(),
            );
            stream.push(
                rows.len() as f64 / stream_rows(&channels[0], &shape, rows).await.as_secs_f64(),
            );
        }
        let median = |values: &mut Vec<f64>| {
            values.sort_by(f64::total_cmp);
            values[values.len() / 2]
        };
        let (unary, batch, stream) = (median(&mut unary), median(&mut batch), median(&mut stream));
        println!(
            "| {name} | {unary:.0} | {batch:.0} | {stream:.0} | {:.1}× | {:.1}× |",
            batch / unary,
            stream / unary
        );
    }
}

/// A second server over TLS (its own registry), with channels that trust
/// its certificate.
struct TlsBench {
    address: std::net::SocketAddr,
    client: ClientTlsConfig,
    channels: Vec<Channel>,
    stop: tokio::sync::oneshot::Sender<()>,
    server: tokio::task::JoinHandle<Result<(), apportion::service::ServiceError>>,
}

impl TlsBench {
    async fn start(data_dir: &std::path::Path, config: &Config) -> TlsBench {
        let folder = data_dir.join("tls");
        std::fs::create_dir_all(&folder).expect("tls folder");
        let mut ca_params = rcgen::CertificateParams::new(Vec::<String>::new()).expect("params");
        ca_params.is_ca = rcgen::IsCa::Ca(rcgen::BasicConstraints::Unconstrained);
        let ca = rcgen::CertifiedIssuer::self_signed(
            ca_params,
            rcgen::KeyPair::generate().expect("key"),
        )
        .expect("CA");
        let key = rcgen::KeyPair::generate().expect("key");
        let cert = rcgen::CertificateParams::new(vec!["127.0.0.1".to_string()])
            .expect("params")
            .signed_by(&key, &ca)
            .expect("server certificate");
        let files = TlsFiles {
            cert: folder.join("tls.crt"),
            key: folder.join("tls.key"),
            client_ca: None,
        };
        std::fs::write(&files.cert, cert.pem()).expect("write");
        std::fs::write(&files.key, key.serialize_pem()).expect("write");
        let config = Config {
            data_dir: Some(data_dir.join("tls-registry")),
            ..config.clone()
        };
        let (state, _) = State::open(&config).expect("registry");
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
            .await
            .expect("bind");
        let address = listener.local_addr().expect("address");
        let options = Options {
            transport: Transport::Tls(std::sync::Arc::new(
                ServerTls::load(files).expect("TLS files"),
            )),
            health_listener: None,
        };
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(apportion::service::run_with(
            listener,
            state,
            options,
            async {
                let _ = stopped.await;
            },
        ));
        let client = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(ca.pem()));
        let mut channels = Vec::new();
        for _ in 0..CHANNELS {
            channels.push(tls_connect(address, &client).await);
        }
        TlsBench {
            address,
            client,
            channels,
            stop,
            server,
        }
    }

    async fn stop(self) {
        drop(self.channels);
        let _ = self.stop.send(());
        let _ = self.server.await;
    }
}

async fn tls_connect(address: std::net::SocketAddr, client: &ClientTlsConfig) -> Channel {
    Channel::from_shared(format!("https://{address}"))
        .expect("uri")
        .tls_config(client.clone())
        .expect("tls config")
        .connect()
        .await
        .expect("connect over TLS")
}

/// A new connection for each call, one after another: what a client that
/// does not keep its connection pays, plaintext and with the TLS handshake.
async fn connection_table(plain: std::net::SocketAddr, tls: &TlsBench, calls: usize) {
    async fn once(channel: Channel) {
        DiagnosticsClient::new(channel)
            .echo(proto::EchoRequest {
                payload: b"ping".to_vec(),
            })
            .await
            .expect("echo");
    }
    let median = |mut times: Vec<Duration>| {
        times.sort();
        times[times.len() / 2].as_secs_f64() * 1e3
    };
    let mut plain_times = Vec::new();
    let mut tls_times = Vec::new();
    // Taking turns, as the other tables do.
    for _ in 0..calls {
        let started = Instant::now();
        let channel = Channel::from_shared(format!("http://{plain}"))
            .expect("uri")
            .connect()
            .await
            .expect("connect");
        once(channel).await;
        plain_times.push(started.elapsed());
        let started = Instant::now();
        once(tls_connect(tls.address, &tls.client).await).await;
        tls_times.push(started.elapsed());
    }
    let (plain, over_tls) = (median(plain_times), median(tls_times));
    println!("new connection per call, one at a time; medians of {calls} calls");
    println!();
    println!("| connect + one Echo | median ms |");
    println!("|---|---|");
    println!("| plaintext | {plain:.3} |");
    println!("| TLS 1.3 (ECDSA P-256 certificate, ring) | {over_tls:.3} |");
    println!(
        "| TLS handshake, the difference | {:.3} |",
        over_tls - plain
    );
}
