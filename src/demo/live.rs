//! The demo against a live server: registers the scenario's two models over
//! real gRPC, explains each applicant, and prints what came back.

use ndarray::ArrayView2;
use tonic::transport::Channel;

use super::Scenario;
use crate::model::{LinearModel, Tree, TreeEnsemble, logistic};
use crate::service::proto::{
    self, attributions_client::AttributionsClient, register_model_request::Model as ModelBody,
    registry_client::RegistryClient,
};

/// Model ids the demo registers.
pub const TREES_ID: &str = "larchmont-screening-trees";
pub const LOGISTIC_ID: &str = "larchmont-screening-logistic";
/// The logistic model's complement: the probability of late rent, a risk
/// score where higher is adverse.
pub const RISK_ID: &str = "larchmont-late-rent-risk";

type Failure = Box<dyn std::error::Error + Send + Sync>;

/// Registers both models at `endpoint`, explains every applicant and prints
/// the tables.
pub async fn run(endpoint: &str, scenario: &Scenario, seed: u64) -> Result<(), Failure> {
    let channel = Channel::from_shared(endpoint.to_string())?
        .connect()
        .await?;
    let mut registry = RegistryClient::new(channel.clone());
    let mut attributions = AttributionsClient::new(channel);

    let features: Vec<proto::Feature> = scenario
        .features
        .iter()
        .enumerate()
        .map(|(j, f)| proto::Feature {
            name: f.name.to_string(),
            group: f.group.to_string(),
            // Members of a group share their group's code: the first member's.
            reason_code: format!("R{:02}", first_of_group(&scenario.features, j) + 1),
            reason_text: f.reason.to_string(),
        })
        .collect();
    let trees = registry
        .register_model(proto::RegisterModelRequest {
            model_id: TREES_ID.into(),
            features: features.clone(),
            model: Some(ModelBody::Trees(ensemble_message(&scenario.trees))),
            link: proto::Link::Logistic as i32,
            // Trees take missing values, so "no rental history" stays missing.
            background: Some(matrix(scenario.background.view())),
            // A reliability score: higher is favourable, approved at the
            // threshold.
            decision: Some(proto::Decision {
                favourable: proto::Favourable::Higher as i32,
                space: proto::DecisionSpace::Probability as i32,
                threshold: Some(scenario.approval_threshold),
            }),
            description: "Demo: boosted trees on synthetic applicants (fictional co-operative)"
                .into(),
            ..Default::default()
        })
        .await?
        .into_inner();
    // σ(−m) = 1 − σ(m): the negated logistic model is the probability of
    // the other outcome, here late rent.
    let mut risk_model = linear_message(&scenario.logistic);
    risk_model.weights.iter_mut().for_each(|w| *w = -*w);
    risk_model.intercept = -risk_model.intercept;
    registry
        .register_model(proto::RegisterModelRequest {
            model_id: RISK_ID.into(),
            features: features.clone(),
            model: Some(ModelBody::Linear(risk_model)),
            link: proto::Link::Logistic as i32,
            background: Some(matrix(scenario.linear_background.view())),
            description: "Demo: probability of late rent (fictional co-operative)".into(),
            decision: Some(proto::Decision {
                favourable: proto::Favourable::Lower as i32,
                space: proto::DecisionSpace::Probability as i32,
                threshold: Some(1.0 - scenario.approval_threshold),
            }),
            ..Default::default()
        })
        .await?;
    let linear = registry
        .register_model(proto::RegisterModelRequest {
            model_id: LOGISTIC_ID.into(),
            features,
            model: Some(ModelBody::Linear(linear_message(&scenario.logistic))),
            link: proto::Link::Logistic as i32,
            background: Some(matrix(scenario.linear_background.view())),
            description:
                "Demo: logistic regression on synthetic applicants (fictional co-operative)".into(),
            ..Default::default()
        })
        .await?
        .into_inner();
    println!(
        "Registered {} v{} ({:.0} ns per row) and {} v{} ({:.0} ns per row).",
        trees.model_id,
        trees.version,
        trees.row_cost_ns,
        linear.model_id,
        linear.version,
        linear.row_cost_ns
    );

    for (row, note) in scenario.applicant_notes.iter().enumerate() {
        let explained = attributions
            .explain(proto::ExplainRequest {
                model_id: TREES_ID.into(),
                instance: scenario.applicants.row(row).to_vec(),
                target: proto::Target::Probability as i32,
                // Room for exact enumeration even in a debug build.
                budget_ms: DEMO_BUDGET_MS,
                seed,
                request_id: format!("demo-applicant-{}", row + 1),
                ..Default::default()
            })
            .await?
            .into_inner();
        print_applicant(row, note, scenario, &explained);
    }

    println!();
    println!(
        "Logistic model on the same applicants (log-odds, closed form; no rental history counted as 0 months):"
    );
    for row in 0..scenario.applicant_notes.len() {
        let e = attributions
            .explain(proto::ExplainRequest {
                model_id: LOGISTIC_ID.into(),
                instance: scenario.linear_applicants.row(row).to_vec(),
                seed,
                ..Default::default()
            })
            .await?
            .into_inner();
        let mut order: Vec<&proto::FeatureAttribution> = e.attributions.iter().collect();
        order.sort_by(|a, b| b.value.abs().total_cmp(&a.value.abs()));
        let top: Vec<String> = order
            .iter()
            .take(3)
            .map(|a| format!("{} {:+.3}", a.name, a.value))
            .collect();
        println!(
            "  applicant {}: score {:.3}, log-odds {:+.3} vs background {:+.3}; largest: {} [{}, {} µs]",
            row + 1,
            logistic(e.value_full),
            e.value_full,
            e.value_empty,
            top.join(", "),
            estimator_name(e.estimator_used),
            e.elapsed_us
        );
    }

    println!();
    println!(
        "Late-rent risk (the logistic model's complement; higher is adverse, referred above {:.2}), in probability:",
        1.0 - scenario.approval_threshold
    );
    for row in 0..scenario.applicant_notes.len() {
        let e = attributions
            .explain(proto::ExplainRequest {
                model_id: RISK_ID.into(),
                instance: scenario.linear_applicants.row(row).to_vec(),
                target: proto::Target::Probability as i32,
                budget_ms: DEMO_BUDGET_MS,
                seed,
                ..Default::default()
            })
            .await?
            .into_inner();
        println!(
            "  applicant {}: risk {:.3} → {} [{}]",
            row + 1,
            e.value_full,
            outcome_words(e.outcome),
            estimator_name(e.estimator_used)
        );
        print_reasons(&e, "    ");
    }
    Ok(())
}

fn outcome_words(outcome: i32) -> &'static str {
    match proto::Outcome::try_from(outcome) {
        Ok(proto::Outcome::Favourable) => "approve",
        Ok(proto::Outcome::Adverse) => "refer for review",
        _ => "no threshold",
    }
}

/// The reasons with their confidence, for a reviewer: never worded as a
/// notice.
fn print_reasons(e: &proto::Explanation, indent: &str) {
    if e.reasons.is_empty() {
        return;
    }
    println!(
        "{indent}factors that pushed toward referral (for compliance review, not a notice): list {} at {:.0}%",
        if e.reasons_certain {
            "settled"
        } else {
            "NOT settled"
        },
        100.0 * e.reasons_set_probability
    );
    for (k, reason) in e.reasons.iter().enumerate() {
        println!(
            "{indent}  {}. [{}] {} ({:.3}; in the list with probability {:.2})",
            k + 1,
            reason.reason_code,
            reason.statement,
            reason.weight,
            reason.in_list_probability
        );
    }
}

fn print_applicant(row: usize, note: &str, scenario: &Scenario, e: &proto::Explanation) {
    let decision = outcome_words(e.outcome);
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
    let instance = scenario.applicants.row(row);
    for attribution in &e.attributions {
        let values: Vec<String> = scenario
            .features
            .iter()
            .enumerate()
            .filter(|(_, f)| f.name == attribution.name || f.group == attribution.name)
            .map(|(j, _)| format_value(instance[j]))
            .collect();
        println!(
            "  {:<24} {:>22}  {:>+10.4} {:>9.4}",
            attribution.name,
            values.join(" / "),
            attribution.value,
            attribution.std_error
        );
    }
    println!(
        "  {} — {}; {} coalitions, {} model rows, {} cache hits, {:.1} ms; efficiency gap {:.1e}",
        estimator_name(e.estimator_used),
        e.plan_reason,
        e.coalitions_evaluated,
        e.model_rows_evaluated,
        e.cache_hits,
        e.elapsed_us as f64 / 1e3,
        e.efficiency_gap
    );
    if e.outcome == proto::Outcome::Adverse as i32 {
        print_reasons(e, "  ");
    }
}

/// The first feature of feature `j`'s group (itself when it has none).
fn first_of_group(features: &[super::FeatureSpec], j: usize) -> usize {
    let group = features[j].group;
    if group.is_empty() {
        j
    } else {
        features.iter().position(|f| f.group == group).unwrap_or(j)
    }
}

fn estimator_name(code: i32) -> &'static str {
    proto::Estimator::try_from(code).map_or("UNKNOWN", |e| e.as_str_name())
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

/// Budget of each demo explanation, in milliseconds.
const DEMO_BUDGET_MS: u32 = 1000;

pub fn matrix(rows: ArrayView2<'_, f64>) -> proto::Matrix {
    proto::Matrix {
        rows: rows.nrows() as u32,
        cols: rows.ncols() as u32,
        values: rows.iter().copied().collect(),
    }
}

pub fn linear_message(model: &LinearModel) -> proto::LinearModel {
    proto::LinearModel {
        weights: model.weights().to_vec(),
        intercept: model.intercept(),
    }
}

pub fn ensemble_message(ensemble: &TreeEnsemble) -> proto::TreeEnsemble {
    proto::TreeEnsemble {
        trees: ensemble.trees().iter().map(tree_message).collect(),
        base_score: ensemble.base_score(),
    }
}

fn tree_message(tree: &Tree) -> proto::Tree {
    let nodes = 0..tree.nodes();
    let child = |node: usize, side: fn(&Tree, usize) -> usize| {
        if tree.is_leaf(node) {
            -1
        } else {
            side(tree, node) as i32
        }
    };
    proto::Tree {
        feature: nodes
            .clone()
            .map(|n| {
                if tree.is_leaf(n) {
                    -1
                } else {
                    tree.feature(n) as i32
                }
            })
            .collect(),
        threshold: nodes.clone().map(|n| tree.threshold(n)).collect(),
        left: nodes.clone().map(|n| child(n, Tree::left)).collect(),
        right: nodes.clone().map(|n| child(n, Tree::right)).collect(),
        value: nodes.clone().map(|n| tree.value(n)).collect(),
        missing_left: nodes.map(|n| tree.missing_left(n)).collect(),
    }
}
