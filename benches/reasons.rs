//! Reasons a notice can rely on, at a 20 ms budget: for 1,000 synthetic
//! applicants each, AUTO with reasons, with effort aimed at them and even,
//! the share of answers whose top-4 set is the exact top-4 set, the share
//! with `reasons_certain`, how often a certain list is the exact one, and
//! the mean time. The demo's reliability score (8 players, 100 trees,
//! higher is favourable, decided in probability) has an exact reference by
//! enumeration (2^8 coalitions), and AUTO answers it exactly too (from the
//! tree walk's coalition table), so it is also measured with a sampler
//! asked for, where aiming shows; the 30-feature boosted risk score (300
//! trees, 1,000 background rows, higher is adverse) is decided on its
//! margin, where AUTO's answer is the exact tree algorithm, and in
//! probability, where it is sampled and 2^30 coalitions of 1,000 rows leave
//! no exact reference: that row reports certainty and time only.
//!
//! `cargo bench --bench reasons` (`-- --quick`: 200 applicants each).

#[path = "support/forest.rs"]
mod forest;
mod support;

use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::estimate::boundary::Goal;
use apportion::engine::{Request, Target, prepare};
use apportion::reasons::{self, Attributions, Decision, Favourable, Space};
use apportion::registry::{
    Background, Entry, FeatureSpec, LinkSpec, ModelBody, ModelSpec, Registry, TreeBody,
};
use ndarray::Array2;

const BUDGET: Duration = Duration::from_millis(20);
const LIMIT: usize = 4;
const LEVEL: f64 = 0.95;

/// The sorted top-4 set of `values` and whether it is certain.
fn listed(
    entry: &Entry,
    sign: f64,
    values: &[f64],
    errors: &[f64],
    seed: u64,
) -> (Vec<usize>, bool) {
    let listed = reasons::principal_reasons(
        &Attributions {
            values,
            std_errors: errors,
            codes: entry.reason_codes(),
            statements: entry.reason_statements(),
        },
        sign,
        LIMIT,
        LEVEL,
        seed,
    );
    let mut set: Vec<usize> = listed
        .reasons
        .iter()
        .flat_map(|r| r.players.clone())
        .collect();
    set.sort_unstable();
    (set, listed.certain)
}

struct Row {
    answers: usize,
    exact_sets: Option<usize>,
    certain: usize,
    certain_exact: Option<usize>,
    mean_ms: f64,
    estimators: String,
}

#[allow(clippy::too_many_arguments)]
fn measure(
    entry: &Entry,
    target: Target,
    sign: f64,
    applicants: &Array2<f64>,
    references: Option<&[Vec<usize>]>,
    estimator: Option<EstimatorKind>,
    aim: bool,
) -> Row {
    let goal = Arc::new(Goal {
        sign,
        limit: LIMIT,
        level: LEVEL,
        codes: entry.reason_codes().to_vec(),
        statements: entry.reason_statements().to_vec(),
    });
    let mut row = Row {
        answers: 0,
        exact_sets: references.map(|_| 0),
        certain: 0,
        certain_exact: references.map(|_| 0),
        mean_ms: 0.0,
        estimators: String::new(),
    };
    let mut used = std::collections::BTreeMap::<&'static str, usize>::new();
    let mut total = Duration::ZERO;
    for (k, applicant) in applicants.rows().into_iter().enumerate() {
        let mut request = Request::new(applicant.to_vec());
        request.target = target.clone();
        request.budget = BUDGET;
        request.seed = k as u64;
        request.estimator = estimator;
        request.reasons_goal = aim.then(|| goal.clone());
        let started = Instant::now();
        let answer = prepare(entry.prepared(), request)
            .and_then(|job| job.run(started + BUDGET))
            .expect("an answer within the budget");
        total += started.elapsed();
        *used.entry(answer.estimator.name()).or_default() += 1;
        let (set, certain) = listed(
            entry,
            sign,
            &answer.estimate.values,
            &answer.estimate.std_errors,
            k as u64,
        );
        row.answers += 1;
        row.certain += usize::from(certain);
        if let Some(references) = references {
            let exact = set == references[k];
            *row.exact_sets.as_mut().unwrap() += usize::from(exact);
            *row.certain_exact.as_mut().unwrap() += usize::from(exact && certain);
        }
    }
    row.mean_ms = total.as_secs_f64() * 1e3 / row.answers as f64;
    row.estimators = used
        .iter()
        .map(|(name, n)| format!("{name} {n}"))
        .collect::<Vec<_>>()
        .join(", ");
    row
}

fn share(part: usize, whole: usize) -> String {
    format!("{:.1}%", 100.0 * part as f64 / whole.max(1) as f64)
}

fn print(model: &str, aim: bool, row: &Row) {
    println!(
        "| {model} | {} | {} | {} | {} | {} | {:.2} | {} |",
        if aim { "on" } else { "off" },
        row.answers,
        row.exact_sets.map_or("–".into(), |n| share(n, row.answers)),
        share(row.certain, row.answers),
        row.certain_exact
            .map_or("–".into(), |n| share(n, row.certain)),
        row.mean_ms,
        row.estimators
    );
}

/// Exact top-4 sets by enumeration of every coalition (the Shapley value's
/// definition, "A value for n-person games", 1953).
fn exact_sets(
    entry: &Entry,
    target: &Target,
    sign: f64,
    applicants: &Array2<f64>,
) -> Vec<Vec<usize>> {
    applicants
        .rows()
        .into_iter()
        .map(|applicant| {
            let mut request = Request::new(applicant.to_vec());
            request.target = target.clone();
            request.estimator = Some(EstimatorKind::Exact);
            request.budget = Duration::from_secs(60);
            let answer = prepare(entry.prepared(), request)
                .and_then(|job| job.run(Instant::now() + Duration::from_secs(60)))
                .expect("exact enumeration");
            let zeros = vec![0.0; answer.estimate.values.len()];
            listed(entry, sign, &answer.estimate.values, &zeros, 0).0
        })
        .collect()
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let count = if quick { 200 } else { 1_000 };
    let directory = tempfile::tempdir().expect("a directory");
    let (registry, _) = Registry::open(directory.path()).expect("a registry");

    // The demo's reliability score over its synthetic holdout applicants.
    let scenario = apportion::demo::scenario(7).expect("the demo scenario");
    let demo = registry
        .register(ModelSpec {
            model_id: "reliability".into(),
            // As the demo registers them: members of a group share a code.
            features: scenario
                .features
                .iter()
                .map(|f| FeatureSpec {
                    name: f.name.into(),
                    group: f.group.into(),
                    reason_code: if f.group.is_empty() { f.name } else { f.group }.into(),
                    reason_text: f.reason.into(),
                })
                .collect(),
            model: ModelBody::Trees {
                trees: scenario.trees.trees().iter().map(TreeBody::from).collect(),
                base_score: scenario.trees.base_score(),
            },
            link: LinkSpec::Logistic,
            background: Background {
                rows: scenario.background.nrows(),
                cols: scenario.background.ncols(),
                values: scenario.background.iter().copied().collect(),
            },
            description: String::new(),
            imported: None,
            decision: Some(Decision {
                favourable: Favourable::Higher,
                space: Some(Space::Probability),
                threshold: Some(scenario.approval_threshold),
            }),
        })
        .expect("registers");
    let demo = registry
        .get(&demo.model_id, demo.version)
        .expect("registered");
    let demo_applicants = scenario
        .holdout
        .rows
        .slice(ndarray::s![..count, ..])
        .to_owned();
    let started = Instant::now();
    let demo_exact = exact_sets(&demo, &Target::Probability, -1.0, &demo_applicants);
    let reference_time = started.elapsed();

    // A 30-feature boosted risk score: every feature with a statement.
    let background = forest::background_rows(3, 1_000);
    let ensemble = forest::ensemble(4, 300, 6, &background);
    let mut spec = forest::spec(&ensemble, &background);
    spec.model_id = "risk".into();
    spec.link = LinkSpec::Logistic;
    for (j, feature) in spec.features.iter_mut().enumerate() {
        feature.reason_code = format!("R{j:02}");
        feature.reason_text = format!("feature {j} raised the risk");
    }
    spec.decision = Some(Decision {
        favourable: Favourable::Lower,
        space: None,
        threshold: None,
    });
    let risk = registry.register(spec).expect("registers");
    let risk = registry
        .get(&risk.model_id, risk.version)
        .expect("registered");
    let risk_applicants = forest::background_rows(5, count);
    let risk_margin_exact = exact_tree_sets(&risk, &risk_applicants);

    println!("Machine: {}", support::machine());
    println!(
        "{count} applicants per model; budget {} ms; AUTO; top {LIMIT} at level {LEVEL}; the demo's \
         exact references took {:.1} s",
        BUDGET.as_millis(),
        reference_time.as_secs_f64()
    );
    println!();
    println!(
        "| model and decision space | effort aimed | answers | top-4 set exact | reasons_certain | certain lists exact | mean ms | estimators |"
    );
    println!("|---|---|---|---|---|---|---|---|");
    for (estimator, name) in [
        (None, "demo reliability (8 players), probability"),
        (
            Some(EstimatorKind::LeverageRegression),
            "demo reliability, probability, LEVERAGE_REGRESSION asked for",
        ),
    ] {
        for aim in [false, true] {
            let row = measure(
                &demo,
                Target::Probability,
                -1.0,
                &demo_applicants,
                Some(&demo_exact),
                estimator,
                aim,
            );
            print(name, aim, &row);
        }
    }
    for aim in [false, true] {
        let row = measure(
            &risk,
            Target::Output,
            1.0,
            &risk_applicants,
            Some(&risk_margin_exact),
            None,
            aim,
        );
        print("30-feature risk, margin", aim, &row);
    }
    for aim in [false, true] {
        let row = measure(
            &risk,
            Target::Probability,
            1.0,
            &risk_applicants,
            None,
            None,
            aim,
        );
        print("30-feature risk, probability", aim, &row);
    }
}

/// Exact top-4 sets on the margin by the exact tree algorithm.
fn exact_tree_sets(entry: &Entry, applicants: &Array2<f64>) -> Vec<Vec<usize>> {
    applicants
        .rows()
        .into_iter()
        .map(|applicant| {
            let mut request = Request::new(applicant.to_vec());
            request.estimator = Some(EstimatorKind::TreeExact);
            request.budget = Duration::from_secs(60);
            let answer = prepare(entry.prepared(), request)
                .and_then(|job| job.run(Instant::now() + Duration::from_secs(60)))
                .expect("the exact tree algorithm");
            let zeros = vec![0.0; answer.estimate.values.len()];
            listed(entry, 1.0, &answer.estimate.values, &zeros, 0).0
        })
        .collect()
}
