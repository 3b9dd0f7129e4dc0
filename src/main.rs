//! The `apportion` binary: `serve` runs the gRPC service; `demo` explains a
//! few synthetic applicants of the demo screening model in-process.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::{Duration, Instant};

use apportion::demo::{self, Scenario};
use apportion::engine::{Explanation, Players, Request, Subject, Target, explain};
use apportion::model::{Model, logistic};
use apportion::reasons::{DEFAULT_REASONS, principal_reasons};
use apportion::service::{self, Config, State};
use apportion::telemetry::{self, LogFormat};
use clap::{Parser, Subcommand, ValueEnum};
use ndarray::ArrayView2;

#[derive(Parser)]
#[command(
    name = "apportion",
    version,
    about = "Explains individual model decisions"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Train the demo screening model on synthetic applicants and explain a few of them.
    Demo {
        /// Seed of the synthetic applicants and of the sampled estimators.
        #[arg(long, default_value_t = 7)]
        seed: u64,
    },
    /// Serve the gRPC API until interrupted (Ctrl-C).
    Serve(ServeArgs),
}

#[derive(clap::Args)]
struct ServeArgs {
    /// Address of the gRPC endpoint.
    #[arg(long, env = "APPORTION_ADDRESS", default_value = "127.0.0.1:50051")]
    address: SocketAddr,
    /// Directory of the model registry [default: $XDG_DATA_HOME/apportion or ~/.local/share/apportion].
    #[arg(long, env = "APPORTION_DATA_DIR")]
    data_dir: Option<PathBuf>,
    /// Address of the Prometheus scrape endpoint.
    #[arg(
        long,
        env = "APPORTION_METRICS_ADDRESS",
        default_value = "127.0.0.1:9464"
    )]
    metrics_address: SocketAddr,
    /// Log line format.
    #[arg(long, env = "APPORTION_LOG_FORMAT", value_enum, default_value_t = LogStyle::Human)]
    log_format: LogStyle,
    /// Log filter, in the usual `target=level` form.
    #[arg(long, env = "RUST_LOG", default_value = "info")]
    log_filter: String,
    /// Budget of an Explain call that asks for none, in milliseconds.
    #[arg(long, env = "APPORTION_DEFAULT_BUDGET_MS", default_value_t = 200)]
    default_budget_ms: u64,
    /// Explain calls computed at once [default: the number of cores].
    #[arg(long, env = "APPORTION_COMPUTE_THREADS")]
    compute_threads: Option<usize>,
}

#[derive(Clone, Copy, ValueEnum)]
enum LogStyle {
    Human,
    Json,
}

fn main() -> ExitCode {
    let result = match Cli::parse().command {
        Command::Demo { seed } => run_demo(seed),
        Command::Serve(args) => serve(args),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(err) => {
            eprintln!("apportion: {err}");
            ExitCode::FAILURE
        }
    }
}

fn serve(args: ServeArgs) -> Result<(), Box<dyn std::error::Error>> {
    let defaults = Config::default();
    let config = Config {
        address: args.address,
        data_dir: args.data_dir,
        metrics_address: Some(args.metrics_address),
        log_format: match args.log_format {
            LogStyle::Human => LogFormat::Human,
            LogStyle::Json => LogFormat::Json,
        },
        log_filter: args.log_filter,
        default_budget: Duration::from_millis(args.default_budget_ms),
        compute_threads: args
            .compute_threads
            .unwrap_or(defaults.compute_threads)
            .max(1),
        ..defaults
    };
    telemetry::init_tracing(config.log_format, &config.log_filter)?;
    let runtime = tokio::runtime::Runtime::new()?;
    runtime.block_on(async {
        if let Some(address) = config.metrics_address {
            telemetry::install_metrics(address)?;
        }
        let (state, problems) = State::open(&config)?;
        for problem in &problems {
            tracing::warn!(%problem, "registry entry skipped");
        }
        let listener = tokio::net::TcpListener::bind(config.address).await?;
        tracing::info!(address = %listener.local_addr()?, "serving");
        let shutdown = async {
            let _ = tokio::signal::ctrl_c().await;
        };
        service::run(listener, state, shutdown).await?;
        Ok(())
    })
}

fn run_demo(seed: u64) -> Result<(), Box<dyn std::error::Error>> {
    let started = Instant::now();
    let scenario = demo::scenario(seed)?;
    let names: Vec<String> = scenario
        .features
        .iter()
        .map(|f| f.name.to_string())
        .collect();
    let groups: Vec<String> = scenario
        .features
        .iter()
        .map(|f| f.group.to_string())
        .collect();
    let players = Players::try_new(&names, &groups)?;
    // A group's statement is its first feature's (the features of a group share one).
    let statements: Vec<String> = (0..players.len())
        .map(|p| scenario.features[players.members(p)[0]].reason.to_string())
        .collect();

    println!(
        "Larchmont Housing Co-operative — demo applicant screening (fictional co-operative, synthetic applicants)"
    );
    println!(
        "Models trained on {} synthetic applicants in {:.0} ms; background: {} applicants; approval at a score of {:.2}.",
        demo::TRAINING_APPLICANTS,
        started.elapsed().as_secs_f64() * 1e3,
        scenario.background.nrows(),
        scenario.approval_threshold
    );
    println!(
        "Score = the model's probability that the applicant pays rent reliably for 12 months."
    );
    println!(
        "Caution: attributions describe the model, not the applicant or the world. Reasons must be reviewed by\n\
         compliance staff against the applicable fair-housing and consumer-reporting rules; defer to the law and counsel."
    );

    for (row, note) in scenario.applicant_notes.iter().enumerate() {
        let instance = scenario.applicants.row(row).to_vec();
        let subject = Subject {
            model: &scenario.trees,
            players: &players,
            background: scenario.background.view(),
            row_cost_ns: measured_row_cost(&scenario.trees, scenario.background.view()),
        };
        let mut request = Request::new(instance.clone());
        request.target = Target::Probability;
        request.budget = Duration::from_millis(200);
        request.seed = seed;
        let explained = explain(&subject, &request, Instant::now())?;
        print_applicant(
            row,
            note,
            &scenario,
            &players,
            &instance,
            &explained,
            &statements,
        );
    }
    println!();
    println!(
        "Logistic model on the same applicants (log-odds, closed form; NaN rental history counted as 0 months):"
    );
    for row in 0..scenario.applicant_notes.len() {
        let instance = scenario.linear_applicants.row(row).to_vec();
        let subject = Subject {
            model: &scenario.logistic,
            players: &players,
            background: scenario.linear_background.view(),
            row_cost_ns: measured_row_cost(&scenario.logistic, scenario.linear_background.view()),
        };
        let explained = explain(&subject, &Request::new(instance), Instant::now())?;
        let e = &explained.estimate;
        let top: Vec<String> = top_players(&e.values, 3)
            .into_iter()
            .map(|p| format!("{} {:+.3}", players.names()[p], e.values[p]))
            .collect();
        println!(
            "  applicant {}: score {:.3}, log-odds {:+.3} vs background {:+.3}; largest: {} [{}]",
            row + 1,
            logistic(e.value_full),
            e.value_full,
            e.value_empty,
            top.join(", "),
            explained.estimator.name()
        );
    }
    Ok(())
}

fn print_applicant(
    row: usize,
    note: &str,
    scenario: &Scenario,
    players: &Players,
    instance: &[f64],
    explained: &Explanation,
    statements: &[String],
) {
    let e = &explained.estimate;
    let decision = if e.value_full >= scenario.approval_threshold {
        "approve"
    } else {
        "refer for review"
    };
    println!();
    println!(
        "Applicant {} ({note}): score {:.3} → {decision}; background average {:.3}",
        row + 1,
        e.value_full,
        e.value_empty
    );
    println!(
        "  {:<24} {:>22}  {:>10} {:>9}",
        "player", "value", "effect", "± s.e."
    );
    for (p, name) in players.names().iter().enumerate() {
        let values: Vec<String> = players
            .members(p)
            .iter()
            .map(|&j| format_value(instance[j]))
            .collect();
        println!(
            "  {:<24} {:>22}  {:>+10.4} {:>9.4}",
            name,
            values.join(" / "),
            e.values[p],
            e.std_errors[p]
        );
    }
    println!(
        "  {} — {}; {} coalitions, {} model rows, {} cache hits, {:.1} ms; efficiency gap {:.1e}",
        explained.estimator.name(),
        explained.plan_reason,
        explained.coalitions_evaluated,
        explained.model_rows_evaluated,
        explained.cache_hits,
        explained.elapsed.as_secs_f64() * 1e3,
        e.efficiency_gap()
    );
    if e.value_full < scenario.approval_threshold {
        let reasons = principal_reasons(&e.values, &e.std_errors, statements, DEFAULT_REASONS);
        println!("  principal reasons (for review before any notice):");
        for (k, reason) in reasons.iter().enumerate() {
            println!("    {}. {} ({:.3})", k + 1, reason.statement, reason.weight);
        }
    }
}

fn format_value(x: f64) -> String {
    if x.is_nan() {
        "missing".into()
    } else if x.fract() == 0.0 {
        format!("{x:.0}")
    } else {
        format!("{x:.2}")
    }
}

fn top_players(values: &[f64], count: usize) -> Vec<usize> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&a, &b| values[b].abs().total_cmp(&values[a].abs()));
    order.truncate(count);
    order
}

/// Nanoseconds per row of one batched call over the background, as the
/// planner expects (the registry will measure this at registration).
fn measured_row_cost(model: &dyn Model, background: ArrayView2<'_, f64>) -> f64 {
    let mut out = vec![0.0; background.nrows()];
    let start = Instant::now();
    let mut calls = 0u32;
    while calls < 10 || start.elapsed() < Duration::from_millis(2) {
        model.predict(background, &mut out);
        calls += 1;
    }
    start.elapsed().as_nanos() as f64 / (calls as usize * background.nrows()) as f64
}
