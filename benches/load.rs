//! The load generator: N concurrent gRPC callers on loopback, for a bounded
//! time each, against the real server holding a production-size tree model
//! (300 trees of depth 6 on 30 features, 1,000 background rows), a
//! 20-feature logistic model on 1,000 background rows and an ONNX network
//! (the diabetes regression fixture, 10 features, its 40 rows). Prints,
//! per case, throughput, latency quantiles, status counts, how fast
//! refusals came, the share of calls answered OK within their budget or
//! deadline (and within it + 2 ms), and for raw-output calls the mean
//! relative error against exact attributions. Server and callers share
//! the machine.
//!
//! `cargo bench --bench load` (`-- --quick`: 1 s per case instead of 4).

#[path = "support/forest.rs"]
mod forest;
mod support;

use std::collections::{BTreeMap, HashMap};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::registry::{LinkSpec, ModelBody, ModelSpec, Registry};
use apportion::service::proto::attributions_client::AttributionsClient;
use apportion::service::proto::{self};
use apportion::service::{Config, State, status::RETRY_AFTER_METADATA};
use ndarray::Array2;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::transport::Channel;

const TREES: usize = 300;
const DEPTH: usize = 6;
const BACKGROUND_ROWS: usize = 1_000;

struct Case {
    name: &'static str,
    model: &'static str,
    callers: usize,
    target: proto::Target,
    /// `budget_ms` of every request; 0 gives only the deadline.
    budget_ms: u32,
    /// The gRPC deadline every call carries, if any.
    deadline_ms: Option<u64>,
}

impl Case {
    /// What "on time" means for the case: the deadline if there is one,
    /// else the budget.
    fn limit(&self) -> Duration {
        Duration::from_millis(self.deadline_ms.unwrap_or(u64::from(self.budget_ms)))
    }
}

#[derive(Default)]
struct Outcomes {
    /// Latency of every call, by status code name.
    by_code: BTreeMap<&'static str, Vec<Duration>>,
    /// Retry hints of refusals, in milliseconds.
    retry_hints: Vec<u64>,
    converged: usize,
    /// Σ|φ − φ*| / Σ|φ*| of OK answers against the exact attributions φ*,
    /// with whether the answer said it converged.
    relative_errors: Vec<(bool, f64)>,
}

/// Σ|φ − φ*| / Σ|φ*| of an answer against the exact attributions.
fn relative_error(answer: &proto::Explanation, exact: &[f64]) -> f64 {
    let off: f64 = answer
        .attributions
        .iter()
        .zip(exact)
        .map(|(got, exact)| (got.value - exact).abs())
        .sum();
    off / exact.iter().map(|value| value.abs()).sum::<f64>()
}

fn code_name(code: tonic::Code) -> &'static str {
    apportion::service::status::code_label(code)
}

/// A model's instances, and their exact attributions where the bench can
/// compute them.
struct Subject {
    instances: Arc<Vec<Vec<f64>>>,
    exact: Option<Arc<Vec<Vec<f64>>>>,
}

async fn run_case(
    channels: &[Channel],
    case: &Case,
    subject: &Subject,
    length: Duration,
) -> (Outcomes, Duration) {
    let end = Instant::now() + length;
    let started = Instant::now();
    let mut callers = Vec::new();
    for caller in 0..case.callers {
        let mut client = AttributionsClient::new(channels[caller % channels.len()].clone());
        let instances = subject.instances.clone();
        // Exact attributions are of the raw output.
        let exact = subject
            .exact
            .clone()
            .filter(|_| case.target == proto::Target::Output);
        let (model, target, budget_ms, deadline_ms) =
            (case.model, case.target, case.budget_ms, case.deadline_ms);
        callers.push(tokio::spawn(async move {
            let mut outcomes = Outcomes::default();
            let mut index = caller;
            while Instant::now() < end {
                let mut request = tonic::Request::new(proto::ExplainRequest {
                    model_id: model.into(),
                    instance: instances[index % instances.len()].clone(),
                    target: target as i32,
                    budget_ms,
                    seed: index as u64,
                    ..Default::default()
                });
                if let Some(ms) = deadline_ms {
                    request.set_timeout(Duration::from_millis(ms));
                }
                let instance = index % instances.len();
                index += case_stride();
                let sent = Instant::now();
                let answer = client.explain(request).await;
                let took = sent.elapsed();
                let label = match &answer {
                    Ok(answer) => {
                        if answer.get_ref().converged {
                            outcomes.converged += 1;
                        }
                        if let Some(exact) = &exact {
                            let error = relative_error(answer.get_ref(), &exact[instance]);
                            outcomes
                                .relative_errors
                                .push((answer.get_ref().converged, error));
                        }
                        "OK"
                    }
                    Err(status) => {
                        if let Some(hint) = status
                            .metadata()
                            .get(RETRY_AFTER_METADATA)
                            .and_then(|value| value.to_str().ok()?.parse().ok())
                        {
                            outcomes.retry_hints.push(hint);
                        }
                        // The pool's refusals: at arrival (no thread free
                        // in time, or too little time left for the smallest
                        // answer), or after waiting to the latest start.
                        match status.code() {
                            tonic::Code::ResourceExhausted
                                if !status.message().contains("past the latest start") =>
                            {
                                "RESOURCE_EXHAUSTED at arrival"
                            }
                            tonic::Code::ResourceExhausted => "RESOURCE_EXHAUSTED after waiting",
                            code => code_name(code),
                        }
                    }
                };
                outcomes.by_code.entry(label).or_default().push(took);
                // A refused caller backs off by its hint, as a client
                // should, instead of spinning on refusals.
                if let Err(status) = &answer
                    && status.code() == tonic::Code::ResourceExhausted
                {
                    let hint = outcomes.retry_hints.last().copied().unwrap_or(1);
                    tokio::time::sleep(Duration::from_millis(hint.min(50))).await;
                }
            }
            outcomes
        }));
    }
    let mut all = Outcomes::default();
    for caller in callers {
        let outcomes = caller.await.expect("caller");
        for (code, latencies) in outcomes.by_code {
            all.by_code.entry(code).or_default().extend(latencies);
        }
        all.retry_hints.extend(outcomes.retry_hints);
        all.converged += outcomes.converged;
        all.relative_errors.extend(outcomes.relative_errors);
    }
    (all, started.elapsed())
}

/// Callers take interleaved instances.
fn case_stride() -> usize {
    7
}

fn quantile(sorted: &[Duration], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    sorted[((sorted.len() - 1) as f64 * q).round() as usize].as_secs_f64() * 1e3
}

fn rows_of(matrix: &Array2<f64>) -> Arc<Vec<Vec<f64>>> {
    Arc::new(matrix.rows().into_iter().map(|row| row.to_vec()).collect())
}

/// A 20-feature logistic model on 1,000 random background rows (bench data
/// only), and 200 instances.
fn logistic() -> (ModelSpec, Array2<f64>) {
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let rows = Array2::from_shape_fn((BACKGROUND_ROWS, 20), |_| rng.random_range(-1.0..1.0));
    let spec = ModelSpec {
        model_id: "load-logistic".into(),
        features: forest::feature_specs(20),
        model: ModelBody::Linear {
            weights: (0..20).map(|_| rng.random_range(-1.0..1.0)).collect(),
            intercept: 0.1,
        },
        link: LinkSpec::Logistic,
        background: forest::background_spec(&rows),
        description: String::new(),
        imported: None,
        decision: None,
    };
    let instances = Array2::from_shape_fn((200, 20), |_| rng.random_range(-1.0..1.0));
    (spec, instances)
}

/// The ONNX network of the import fixtures (a regression on scikit-learn's
/// diabetes data, 10 features) over its 40 recorded rows, which are also
/// the instances.
fn network() -> (ModelSpec, Array2<f64>) {
    let fixtures = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/fixtures/onnx/");
    let graph = std::fs::read(format!("{fixtures}diabetes_network.onnx")).expect("the network");
    let recorded: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(format!("{fixtures}diabetes_network.json")).expect("its rows"),
    )
    .expect("JSON");
    let rows: Vec<Vec<f64>> = serde_json::from_value(recorded["rows"].clone()).expect("rows");
    let columns = rows[0].len();
    let matrix = Array2::from_shape_vec((rows.len(), columns), rows.concat()).expect("a matrix");
    let spec = ModelSpec {
        model_id: "load-network".into(),
        features: forest::feature_specs(columns),
        model: ModelBody::Onnx {
            graph,
            output: String::new(),
            column: 0,
        },
        link: LinkSpec::Identity,
        background: forest::background_spec(&matrix),
        description: String::new(),
        imported: None,
        decision: None,
    };
    (spec, matrix)
}

/// Exact attributions of the raw output of every instance, asked for by
/// name with a long budget.
async fn exact_answers(
    channel: &Channel,
    model: &str,
    estimator: proto::Estimator,
    instances: &[Vec<f64>],
) -> Arc<Vec<Vec<f64>>> {
    let mut client = AttributionsClient::new(channel.clone());
    let mut exact = Vec::new();
    for instance in instances {
        let answer = client
            .explain(proto::ExplainRequest {
                model_id: model.into(),
                instance: instance.clone(),
                estimator: estimator as i32,
                budget_ms: 60_000,
                ..Default::default()
            })
            .await
            .expect("the exact answer");
        exact.push(
            answer
                .get_ref()
                .attributions
                .iter()
                .map(|a| a.value)
                .collect(),
        );
    }
    Arc::new(exact)
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let length = Duration::from_millis(if quick { 1_000 } else { 4_000 });
    let tree_background = forest::background_rows(3, BACKGROUND_ROWS);
    let model = forest::ensemble(4, TREES, DEPTH, &tree_background);
    let tree_instances = rows_of(&forest::background_rows(5, 200));
    let (logistic_spec, logistic_instances) = logistic();
    let (network_spec, network_instances) = network();

    let directory = tempfile::tempdir().expect("a directory");
    let (registry, _) = Registry::open(directory.path()).expect("a registry");
    let mut spec = forest::spec(&model, &tree_background);
    spec.model_id = "load-trees".into();
    spec.link = LinkSpec::Logistic;
    let registered = Instant::now();
    registry.register(spec).expect("registers");
    let registration = registered.elapsed();
    registry.register(logistic_spec).expect("registers");
    registry.register(network_spec).expect("registers");

    let config = Config {
        data_dir: Some(directory.path().to_path_buf()),
        metrics_address: None,
        ..Config::default()
    };
    let threads = config.compute_threads;
    let state = State::new(Arc::new(registry), &config);
    let runtime = tokio::runtime::Runtime::new().expect("runtime");
    runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind");
        let address = listener.local_addr().expect("address");
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(apportion::service::run(listener, state, async {
            let _ = stopped.await;
        }));
        let mut channels = Vec::new();
        for _ in 0..4 {
            channels.push(
                Channel::from_shared(format!("http://{address}"))
                    .expect("uri")
                    .connect()
                    .await
                    .expect("connect"),
            );
        }
        // The exact raw-output attributions of every instance, for the
        // error of answers that were sampled to fit their budget. (The
        // logistic model's raw output has its closed form; its probability
        // over 2^20 coalitions has no exact answer here.)
        let network_instances = rows_of(&network_instances);
        let subjects: HashMap<&str, Subject> = HashMap::from([
            (
                "load-trees",
                Subject {
                    exact: Some(
                        exact_answers(&channels[0], "load-trees", proto::Estimator::TreeExact, &tree_instances)
                            .await,
                    ),
                    instances: tree_instances,
                },
            ),
            (
                "load-logistic",
                Subject { instances: rows_of(&logistic_instances), exact: None },
            ),
            (
                "load-network",
                Subject {
                    exact: Some(
                        exact_answers(&channels[0], "load-network", proto::Estimator::Exact, &network_instances)
                            .await,
                    ),
                    instances: network_instances,
                },
            ),
        ]);
        let output = proto::Target::Output;
        let probability = proto::Target::Probability;
        let overload = 4 * threads;
        let (trees, logistic, network) = ("load-trees", "load-logistic", "load-network");
        let cases = [
            Case { name: "trees, output, budget 5 ms", model: trees, callers: 2, target: output, budget_ms: 5, deadline_ms: None },
            Case { name: "trees, output, budget 20 ms", model: trees, callers: 2, target: output, budget_ms: 20, deadline_ms: None },
            Case { name: "trees, output, budget 100 ms", model: trees, callers: 2, target: output, budget_ms: 100, deadline_ms: None },
            Case { name: "trees, probability, budget 5 ms", model: trees, callers: 2, target: probability, budget_ms: 5, deadline_ms: None },
            Case { name: "trees, probability, budget 20 ms", model: trees, callers: 2, target: probability, budget_ms: 20, deadline_ms: None },
            Case { name: "trees, probability, budget 100 ms", model: trees, callers: 2, target: probability, budget_ms: 100, deadline_ms: None },
            Case { name: "trees, probability, deadline 100 ms only", model: trees, callers: 2, target: probability, budget_ms: 0, deadline_ms: Some(100) },
            Case { name: "trees, probability, 4× overload, deadline 50 ms", model: trees, callers: overload, target: probability, budget_ms: 0, deadline_ms: Some(50) },
            Case { name: "trees, output, 4× overload, deadline 50 ms", model: trees, callers: overload, target: output, budget_ms: 0, deadline_ms: Some(50) },
            Case { name: "ONNX network, output, budget 5 ms", model: network, callers: 2, target: output, budget_ms: 5, deadline_ms: None },
            Case { name: "ONNX network, output, budget 20 ms", model: network, callers: 2, target: output, budget_ms: 20, deadline_ms: None },
            Case { name: "ONNX network, output, budget 100 ms", model: network, callers: 2, target: output, budget_ms: 100, deadline_ms: None },
            Case { name: "ONNX network, output, 4× overload, deadline 50 ms", model: network, callers: overload, target: output, budget_ms: 0, deadline_ms: Some(50) },
            Case { name: "logistic, output, budget 5 ms", model: logistic, callers: 2, target: output, budget_ms: 5, deadline_ms: None },
            Case { name: "logistic, probability, budget 5 ms", model: logistic, callers: 2, target: probability, budget_ms: 5, deadline_ms: None },
            Case { name: "logistic, probability, budget 20 ms", model: logistic, callers: 2, target: probability, budget_ms: 20, deadline_ms: None },
            Case { name: "logistic, probability, budget 100 ms", model: logistic, callers: 2, target: probability, budget_ms: 100, deadline_ms: None },
            Case { name: "logistic, probability, 4× overload, deadline 50 ms", model: logistic, callers: overload, target: probability, budget_ms: 0, deadline_ms: Some(50) },
        ];
        println!("Machine: {}; {threads} compute threads", support::machine());
        println!(
            "Models: trees = {TREES} trees of depth {DEPTH} on {} features, {BACKGROUND_ROWS} background \
             rows (registered in {:.0} ms); logistic = 20 features, {BACKGROUND_ROWS} background rows; \
             ONNX network = 10 features, 40 background rows; AUTO; {:.0} s per case",
            forest::FEATURES,
            registration.as_secs_f64() * 1e3,
            length.as_secs_f64()
        );
        println!();
        println!(
            "| case | callers | calls/s | p50 ms | p99 ms | p999 ms | OK within limit | within + 2 ms | statuses | refusal p50 / p99 ms | converged | mean relative error: all / not converged |"
        );
        println!("|---|---|---|---|---|---|---|---|---|---|---|---|");
        for case in &cases {
            let (outcomes, took) = run_case(&channels, case, &subjects[case.model], length).await;
            let mut all: Vec<Duration> = outcomes.by_code.values().flatten().copied().collect();
            all.sort();
            let ok = outcomes.by_code.get("OK").cloned().unwrap_or_default();
            let on_time = ok.iter().filter(|took| **took <= case.limit()).count();
            let slack = case.limit() + Duration::from_millis(2);
            let nearly = ok.iter().filter(|took| **took <= slack).count();
            let mut refused: Vec<Duration> = outcomes
                .by_code
                .iter()
                .filter(|(code, _)| code.starts_with("RESOURCE_EXHAUSTED"))
                .flat_map(|(_, latencies)| latencies.iter().copied())
                .collect();
            refused.sort();
            let statuses: Vec<String> = outcomes
                .by_code
                .iter()
                .map(|(code, latencies)| format!("{code} {}", latencies.len()))
                .collect();
            println!(
                "| {} | {} | {:.0} | {:.2} | {:.2} | {:.2} | {:.1}% | {:.1}% | {} | {} | {} of {} | {} |",
                case.name,
                case.callers,
                all.len() as f64 / took.as_secs_f64(),
                quantile(&all, 0.5),
                quantile(&all, 0.99),
                quantile(&all, 0.999),
                100.0 * on_time as f64 / all.len().max(1) as f64,
                100.0 * nearly as f64 / all.len().max(1) as f64,
                statuses.join(", "),
                if refused.is_empty() {
                    "–".to_string()
                } else {
                    format!(
                        "{:.2} / {:.2}",
                        quantile(&refused, 0.5),
                        quantile(&refused, 0.99)
                    )
                },
                outcomes.converged,
                ok.len(),
                if outcomes.relative_errors.is_empty() {
                    "–".to_string()
                } else {
                    let mean = |errors: Vec<f64>| {
                        if errors.is_empty() {
                            "–".to_string()
                        } else {
                            format!("{:.4}", errors.iter().sum::<f64>() / errors.len() as f64)
                        }
                    };
                    let errors = &outcomes.relative_errors;
                    let sampled = errors.iter().filter(|(converged, _)| !converged);
                    format!(
                        "{} / {}",
                        mean(errors.iter().map(|(_, error)| *error).collect()),
                        mean(sampled.map(|(_, error)| *error).collect())
                    )
                }
            );
        }
        let _ = stop.send(());
        server.await.expect("server task").expect("server");
    });
}
