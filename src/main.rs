//! The `apportion` binary. `apportion demo` explains a few synthetic
//! applicants of the demo screening model and prints what the engine found.

use std::process::ExitCode;
use std::time::{Duration, Instant};

use apportion::demo::{self, Scenario};
use apportion::engine::{Explanation, Players, Request, Subject, Target, explain};
use apportion::model::{Model, logistic};
use apportion::reasons::{DEFAULT_REASONS, principal_reasons};
use ndarray::ArrayView2;

const USAGE: &str = "usage: apportion demo [--seed N]

  demo    train the demo screening model on synthetic applicants and explain a few of them";

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.first().map(String::as_str) {
        Some("demo") => {
            let seed = match args.get(1).map(String::as_str) {
                None => 7,
                Some("--seed") => match args.get(2).and_then(|s| s.parse().ok()) {
                    Some(seed) => seed,
                    None => return usage_error("--seed takes a whole number"),
                },
                Some(other) => return usage_error(&format!("unknown option {other:?}")),
            };
            match run_demo(seed) {
                Ok(()) => ExitCode::SUCCESS,
                Err(err) => {
                    eprintln!("apportion: {err}");
                    ExitCode::FAILURE
                }
            }
        }
        Some("-h" | "--help" | "help") => {
            println!("{USAGE}");
            ExitCode::SUCCESS
        }
        _ => usage_error("a command is required"),
    }
}

fn usage_error(why: &str) -> ExitCode {
    eprintln!("apportion: {why}\n{USAGE}");
    ExitCode::from(2)
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
