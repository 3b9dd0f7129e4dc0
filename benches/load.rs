//! The load generator: N concurrent gRPC callers on loopback, for a bounded
//! time each, against the real server holding a production-size tree model
//! (300 trees of depth 6 on 30 features, 1,000 background rows). Prints,
//! per case, throughput, latency quantiles, status counts, how fast
//! refusals came, and the share of calls answered OK within their budget
//! or deadline. Server and callers share the machine.
//!
//! `cargo bench --bench load` (`-- --quick`: 1 s per case instead of 4).

#[path = "support/forest.rs"]
mod forest;
mod support;

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::registry::{LinkSpec, Registry};
use apportion::service::proto::attributions_client::AttributionsClient;
use apportion::service::proto::{self};
use apportion::service::{Config, State, status::RETRY_AFTER_METADATA};
use tonic::transport::Channel;

const TREES: usize = 300;
const DEPTH: usize = 6;
const BACKGROUND_ROWS: usize = 1_000;

struct Case {
    name: &'static str,
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
}

fn code_name(code: tonic::Code) -> &'static str {
    apportion::service::status::code_label(code)
}

async fn run_case(
    channels: &[Channel],
    case: &Case,
    instances: Arc<Vec<Vec<f64>>>,
    length: Duration,
) -> (Outcomes, Duration) {
    let end = Instant::now() + length;
    let started = Instant::now();
    let mut callers = Vec::new();
    for caller in 0..case.callers {
        let mut client = AttributionsClient::new(channels[caller % channels.len()].clone());
        let instances = instances.clone();
        let (target, budget_ms, deadline_ms) = (case.target, case.budget_ms, case.deadline_ms);
        callers.push(tokio::spawn(async move {
            let mut outcomes = Outcomes::default();
            let mut index = caller;
            while Instant::now() < end {
                let mut request = tonic::Request::new(proto::ExplainRequest {
                    model_id: "load-trees".into(),
                    instance: instances[index % instances.len()].clone(),
                    target: target as i32,
                    budget_ms,
                    seed: index as u64,
                    ..Default::default()
                });
                if let Some(ms) = deadline_ms {
                    request.set_timeout(Duration::from_millis(ms));
                }
                index += case_stride();
                let sent = Instant::now();
                let answer = client.explain(request).await;
                let took = sent.elapsed();
                let label = match &answer {
                    Ok(answer) => {
                        if answer.get_ref().converged {
                            outcomes.converged += 1;
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
                        // The pool's two refusals: predicted at arrival, or
                        // after waiting to the latest start.
                        match status.code() {
                            tonic::Code::ResourceExhausted
                                if status.message().contains("predicted to start") =>
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

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let length = Duration::from_millis(if quick { 1_000 } else { 4_000 });
    let background = forest::background_rows(3, BACKGROUND_ROWS);
    let model = forest::ensemble(4, TREES, DEPTH, &background);
    let applicants = forest::background_rows(5, 200);
    let instances: Arc<Vec<Vec<f64>>> = Arc::new(
        applicants
            .rows()
            .into_iter()
            .map(|row| row.to_vec())
            .collect(),
    );

    let directory = tempfile::tempdir().expect("a directory");
    let (registry, _) = Registry::open(directory.path()).expect("a registry");
    let mut spec = forest::spec(&model, &background);
    spec.model_id = "load-trees".into();
    spec.link = LinkSpec::Logistic;
    let registered = Instant::now();
    registry.register(spec).expect("registers");
    let registration = registered.elapsed();

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
        let output = proto::Target::Output;
        let probability = proto::Target::Probability;
        let overload = 4 * threads;
        let cases = [
            Case { name: "output, budget 5 ms", callers: 2, target: output, budget_ms: 5, deadline_ms: None },
            Case { name: "output, budget 20 ms", callers: 2, target: output, budget_ms: 20, deadline_ms: None },
            Case { name: "output, budget 100 ms", callers: 2, target: output, budget_ms: 100, deadline_ms: None },
            Case { name: "probability, budget 5 ms", callers: 2, target: probability, budget_ms: 5, deadline_ms: None },
            Case { name: "probability, budget 20 ms", callers: 2, target: probability, budget_ms: 20, deadline_ms: None },
            Case { name: "probability, budget 100 ms", callers: 2, target: probability, budget_ms: 100, deadline_ms: None },
            Case { name: "probability, deadline 100 ms only", callers: 2, target: probability, budget_ms: 0, deadline_ms: Some(100) },
            Case { name: "probability, 4× overload, deadline 50 ms", callers: overload, target: probability, budget_ms: 0, deadline_ms: Some(50) },
            Case { name: "output, 4× overload, deadline 50 ms", callers: overload, target: output, budget_ms: 0, deadline_ms: Some(50) },
        ];
        println!("Machine: {}; {threads} compute threads", support::machine());
        println!(
            "Model: {TREES} trees of depth {DEPTH} on {} features, {BACKGROUND_ROWS} background rows \
             (registered in {:.0} ms); AUTO; {:.0} s per case",
            forest::FEATURES,
            registration.as_secs_f64() * 1e3,
            length.as_secs_f64()
        );
        println!();
        println!(
            "| case | callers | calls/s | p50 ms | p99 ms | p999 ms | OK within limit | statuses | refusal p50 / p99 ms | converged |"
        );
        println!("|---|---|---|---|---|---|---|---|---|---|");
        for case in &cases {
            let (outcomes, took) = run_case(&channels, case, instances.clone(), length).await;
            let mut all: Vec<Duration> = outcomes.by_code.values().flatten().copied().collect();
            all.sort();
            let ok = outcomes.by_code.get("OK").cloned().unwrap_or_default();
            let on_time = ok.iter().filter(|took| **took <= case.limit()).count();
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
                "| {} | {} | {:.0} | {:.2} | {:.2} | {:.2} | {:.1}% | {} | {} | {} of {} |",
                case.name,
                case.callers,
                all.len() as f64 / took.as_secs_f64(),
                quantile(&all, 0.5),
                quantile(&all, 0.99),
                quantile(&all, 0.999),
                100.0 * on_time as f64 / all.len().max(1) as f64,
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
                ok.len()
            );
        }
        let _ = stop.send(());
        server.await.expect("server task").expect("server");
    });
}
