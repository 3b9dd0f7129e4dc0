//! Models as libraries write them: the breast-cancer gradient-boosted
//! classifier (30 features; tests/fixtures/import) explained with the exact
//! tree algorithm after import from its ONNX export and, as a second model
//! trained the same way, from XGBoost's JSON, beside the same ONNX graph run
//! in the graph runtime under AUTO at a 50 ms budget (and, on the smallest
//! background, at a budget it can finish in). Prints a markdown table; the
//! machine is on the first line.
//!
//! `cargo bench --bench import` (add `-- --quick` for fewer repeats).

mod support;

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::{Explanation, Model, Players, PreparedModel, Request, prepare};
use apportion::model::import::{self, ImportedTrees, OnnxChoice, OnnxImport};
use apportion::model::{Link, OnnxModel, TreeEnsemble};
use ndarray::{Array2, ArrayView2, s};
use serde_json::Value;

const FEATURES: usize = 30;
const INSTANCES: usize = 12;
/// Background sizes, each with the budgets (ms) the graph runtime is given:
/// the 50 ms of the comparison, and on the smallest background enough time
/// for the sampler to finish at all.
const CASES: [(usize, &[u64]); 3] = [(10, &[50, 20_000]), (100, &[50]), (1000, &[50])];

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/fixtures/import")
        .join(name)
}

/// The recorded rows of a fixture: held-out rows, then threshold probes
/// (held-out rows with one feature moved), as typical inputs.
fn recorded_rows(name: &str) -> Array2<f64> {
    let text = std::fs::read_to_string(fixture(&format!("{name}.rows.json"))).unwrap();
    let json: Value = serde_json::from_str(&text).unwrap();
    let values: Vec<f64> = json["rows"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|row| {
            row.as_array()
                .unwrap()
                .iter()
                .map(|v| v.as_f64().unwrap_or(f64::NAN))
                .collect::<Vec<_>>()
        })
        .collect();
    Array2::from_shape_vec((values.len() / FEATURES, FEATURES), values).unwrap()
}

fn onnx_trees(name: &str) -> ImportedTrees {
    let bytes = std::fs::read(fixture(name)).unwrap();
    let choice = OnnxChoice {
        output: "",
        column: 0,
        class_index: None,
        features: 0,
    };
    match import::onnx_graph(&bytes, choice).unwrap() {
        OnnxImport::Trees { trees, .. } => trees,
        other => panic!("{name} is not imported as trees: {other:?}"),
    }
}

fn ensemble(imported: &ImportedTrees) -> Arc<dyn Model> {
    let trees = imported
        .trees
        .iter()
        .map(|t| t.clone().into_tree(FEATURES).unwrap())
        .collect();
    Arc::new(TreeEnsemble::try_new(trees, imported.base_score, imported.link, FEATURES).unwrap())
}

/// Nanoseconds per row of a batched prediction, as registration measures it.
fn row_cost(model: &dyn Model, rows: ArrayView2<'_, f64>) -> f64 {
    let mut out = vec![0.0; rows.nrows()];
    let start = Instant::now();
    let mut passes = 0;
    while start.elapsed() < Duration::from_millis(20) {
        model.predict(rows, &mut out);
        passes += 1;
    }
    start.elapsed().as_nanos() as f64 / (passes * rows.nrows()) as f64
}

fn prepared(model: Arc<dyn Model>, background: &Array2<f64>) -> Arc<PreparedModel> {
    let cost = row_cost(model.as_ref(), background.view());
    Arc::new(
        PreparedModel::try_new(
            model,
            Players::singletons(FEATURES),
            background.clone(),
            cost,
        )
        .unwrap(),
    )
}

/// Median time of one explanation per instance, over `repeats` rounds, and
/// the explanations of the last round; or the refusal.
fn explain_all(
    model: &Arc<PreparedModel>,
    instances: &Array2<f64>,
    estimator: Option<EstimatorKind>,
    budget: Duration,
    repeats: usize,
) -> Result<(Duration, Vec<Explanation>), String> {
    let mut times = Vec::new();
    let mut last = Vec::new();
    for _ in 0..repeats {
        last.clear();
        for row in instances.rows() {
            let mut request = Request::new(row.to_vec());
            request.estimator = estimator;
            request.budget = budget;
            request.seed = times.len() as u64;
            let start = Instant::now();
            let explanation = prepare(model, request)
                .and_then(|job| job.run(start + budget))
                .map_err(|e| format!("{}: {}", e.field, e.message))?;
            times.push(start.elapsed());
            last.push(explanation);
        }
    }
    times.sort();
    Ok((times[times.len() / 2], last))
}

/// Relative L2 error of sampled answers against exact ones of the same
/// function, and the share of values within 1.96 reported std errors.
fn errors(sampled: &[Explanation], exact: &[Explanation]) -> (f64, f64) {
    let (mut error, mut norm, mut covered, mut total) = (0.0, 0.0, 0, 0);
    for (estimate, exact) in sampled.iter().zip(exact) {
        let estimate = &estimate.estimate;
        for ((a, se), b) in estimate
            .values
            .iter()
            .zip(&estimate.std_errors)
            .zip(&exact.estimate.values)
        {
            error += (a - b).powi(2);
            norm += b * b;
            covered += usize::from((a - b).abs() <= 1.96 * se);
            total += 1;
        }
    }
    ((error / norm).sqrt(), covered as f64 / total.max(1) as f64)
}

fn ms(d: Duration) -> String {
    format!("{:.3} ms", d.as_secs_f64() * 1e3)
}

fn main() {
    let quick = std::env::args().any(|a| a == "--quick");
    let repeats = if quick { 1 } else { 5 };
    println!("machine: {}", support::machine());
    println!();

    let rows = recorded_rows("onnx_cancer_boosting.onnx");
    let instances = rows.slice(s![..INSTANCES, ..]).to_owned();
    let from_onnx = onnx_trees("onnx_cancer_boosting.onnx");
    let from_two_scores = onnx_trees("onnx_cancer_boosting_two_scores.onnx");
    let xgb_bytes = std::fs::read(fixture("xgb_cancer.json")).unwrap();
    let from_xgboost = import::xgboost_json(&xgb_bytes, None).unwrap();
    let graph_bytes = std::fs::read(fixture("onnx_cancer_boosting_two_scores.onnx")).unwrap();
    let graph: Arc<dyn Model> = Arc::new(
        OnnxModel::try_new(&graph_bytes, FEATURES, "probabilities", 1, Link::Identity)
            .expect("the graph runtime loads the two-score form"),
    );
    let exact = Some(EstimatorKind::TreeExact);
    let long = Duration::from_secs(60);

    println!(
        "| breast-cancer boosted classifier, 30 features (median of {} explanations) | background rows | per explanation | vs ONNX import, TREE_EXACT | error against exact |",
        INSTANCES * repeats
    );
    println!("|---|---|---|---|---|");
    for (rows_used, budgets) in CASES {
        let background = rows
            .slice(s![INSTANCES..INSTANCES + rows_used, ..])
            .to_owned();
        let onnx_model = prepared(ensemble(&from_onnx), &background);
        let xgb_model = prepared(ensemble(&from_xgboost), &background);
        let reference_model = prepared(ensemble(&from_two_scores), &background);
        let graph_model = prepared(graph.clone(), &background);
        let (onnx_time, _) = explain_all(&onnx_model, &instances, exact, long, repeats).unwrap();
        let (xgb_time, _) = explain_all(&xgb_model, &instances, exact, long, repeats).unwrap();
        let (_, reference) = explain_all(&reference_model, &instances, exact, long, 1).unwrap();
        println!(
            "| ONNX export (scikit-learn, {} trees of depth 3) imported, TREE_EXACT | {rows_used} | {} | 1× | exact |",
            from_onnx.trees.len(),
            ms(onnx_time)
        );
        println!(
            "| XGBoost JSON ({} trees of depth 3) imported, TREE_EXACT | {rows_used} | {} | {:.2}× | exact |",
            from_xgboost.trees.len(),
            ms(xgb_time),
            xgb_time.as_secs_f64() / onnx_time.as_secs_f64()
        );
        let cost = graph_model.row_cost_ns() / 1e3;
        for &budget_ms in budgets {
            let budget = Duration::from_millis(budget_ms);
            match explain_all(&graph_model, &instances, None, budget, repeats) {
                Ok((graph_time, sampled)) => {
                    let (error, coverage) = errors(&sampled, &reference);
                    let first = &sampled[0];
                    println!(
                        "| the same graph in the graph runtime ({cost:.0} µs a row), AUTO at {budget_ms} ms: {}, {} coalitions, converged {} | {rows_used} | {} | {:.0}× | relative L2 {error:.2e}; {:.0}% within 1.96 std errors |",
                        first.estimator.name(),
                        first.coalitions_evaluated,
                        first.estimate.converged,
                        ms(graph_time),
                        graph_time.as_secs_f64() / onnx_time.as_secs_f64(),
                        100.0 * coverage
                    );
                }
                Err(refusal) => println!(
                    "| the same graph in the graph runtime ({cost:.0} µs a row), AUTO at {budget_ms} ms | {rows_used} | refused: {refusal} | — | — |"
                ),
            }
        }
    }
}
