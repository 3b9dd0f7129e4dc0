//! ONNX graphs of one ai.onnx.ml tree or linear operator imported as native
//! models: predictions equal onnxruntime's scores on the rows
//! tests/fixtures/onnx_ml_fixtures.py recorded (held-out doubles not rounded
//! to float32, missing cells, probes at every threshold), exact attributions
//! equal enumeration, and the choices of output, class and link are never
//! silent. The operators are those of the ONNX operator specification
//! (ai.onnx.ml domain: TreeEnsembleRegressor, TreeEnsembleClassifier,
//! LinearRegressor, LinearClassifier, Scaler, Imputer).

mod support;

use support::{json_numbers, worst_relative};

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::{Model, Players, PreparedModel, Request, Summary, prepare};
use apportion::model::import::{self, OnnxChoice, OnnxImport};
use apportion::model::{LinearModel, Link, TreeEnsemble, logistic};
use apportion::service::proto::{self, register_model_request::Model as Body};
use ndarray::Array2;
use serde_json::Value;
use tonic::Code;

fn fixture_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/import")
}

fn graph(name: &str) -> Vec<u8> {
    std::fs::read(fixture_dir().join(format!("{name}.onnx"))).expect("fixture present")
}

struct Recorded {
    rows: Array2<f64>,
    class_index: u32,
    margin: Vec<f64>,
    output: Option<Vec<f64>>,
}

fn recorded(name: &str) -> Recorded {
    let path = fixture_dir().join(format!("{name}.onnx.rows.json"));
    let json: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let features = json["features"].as_u64().unwrap() as usize;
    let values: Vec<f64> = json["rows"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(json_numbers)
        .collect();
    Recorded {
        rows: Array2::from_shape_vec((values.len() / features, features), values).unwrap(),
        class_index: json["class_index"].as_u64().unwrap() as u32,
        margin: json_numbers(&json["margin"]),
        output: json.get("output").map(json_numbers),
    }
}

fn choice(class_index: Option<u32>) -> OnnxChoice<'static> {
    OnnxChoice {
        output: "",
        column: 0,
        class_index,
        features: 0,
    }
}

/// The imported model, its link and inputs.
fn native(imported: &OnnxImport) -> (Arc<dyn Model>, Link, usize) {
    match imported {
        OnnxImport::Trees { trees, .. } => {
            let inputs = trees.feature_names.len();
            let built = trees
                .trees
                .iter()
                .map(|t| t.clone().into_tree(inputs).expect("valid native trees"))
                .collect();
            let ensemble =
                TreeEnsemble::try_new(built, trees.base_score, trees.link, inputs).unwrap();
            (Arc::new(ensemble), trees.link, inputs)
        }
        OnnxImport::Linear { linear, .. } => {
            let model = LinearModel::try_new(linear.weights.clone(), linear.intercept, linear.link)
                .unwrap();
            (Arc::new(model), linear.link, linear.weights.len())
        }
        OnnxImport::Graph { why, .. } => panic!("not imported: {why}"),
    }
}

fn predictions(model: &dyn Model, rows: &Array2<f64>) -> Vec<f64> {
    let mut out = vec![0.0; rows.nrows()];
    model.predict(rows.view(), &mut out);
    out
}

const FIXTURES: [(&str, &str, Link); 11] = [
    ("onnx_cancer_boosting", "trees", Link::Logistic),
    ("onnx_cancer_boosting_two_scores", "trees", Link::Identity),
    ("onnx_wine_boosting", "trees", Link::Identity),
    ("onnx_diabetes_boosting", "trees", Link::Identity),
    ("onnx_diabetes_forest", "trees", Link::Identity),
    ("onnx_cancer_imputed_forest", "trees", Link::Identity),
    ("onnx_modes", "trees", Link::Identity),
    ("onnx_double_cast", "trees", Link::Logistic),
    ("onnx_cancer_logistic", "linear", Link::Logistic),
    ("onnx_wine_logistic", "linear", Link::Identity),
    ("onnx_diabetes_linear", "linear", Link::Identity),
];

/// onnxruntime is the reference: its score with the operator's
/// post_transform set to NONE is the margin the import must give, to 1e-6
/// relative (onnxruntime sums in float32); where the transform is the
/// logistic one, σ(margin) must also equal the unchanged graph's
/// probability. Trees are compared on probes at and around every
/// threshold, where a single misplaced split would show.
#[test]
fn imported_operators_give_onnxruntime_scores() {
    for (name, kind, link) in FIXTURES {
        let reference = recorded(name);
        let imported = import::onnx_graph(&graph(name), choice(Some(reference.class_index)))
            .unwrap_or_else(|e| panic!("{name}: {e}"));
        let got_kind = match &imported {
            OnnxImport::Trees { .. } => "trees",
            OnnxImport::Linear { .. } => "linear",
            OnnxImport::Graph { .. } => "graph",
        };
        assert_eq!(got_kind, kind, "{name}");
        let (model, got_link, inputs) = native(&imported);
        assert_eq!(got_link, link, "{name}");
        assert_eq!(inputs, reference.rows.ncols(), "{name}");
        let got = predictions(model.as_ref(), &reference.rows);
        let (error, row) = worst_relative(&got, &reference.margin);
        let mut line = format!("{name}: {} rows, margin {error:.1e}", got.len());
        assert!(
            error <= 1e-6,
            "{name}: margin {} vs onnxruntime {} at row {row} ({:?})",
            got[row],
            reference.margin[row],
            reference.rows.row(row)
        );
        if let (Some(output), Link::Logistic) = (&reference.output, link) {
            let worst = got
                .iter()
                .zip(output)
                .map(|(m, p)| (logistic(*m) - p).abs())
                .fold(0.0, f64::max);
            line += &format!(", probability {worst:.1e}");
            assert!(worst <= 1e-6, "{name}: probability off by {worst:e}");
        }
        println!("{line}");
    }
}

/// Class 0 of a classifier scoring one class of two under the logistic
/// transform is the negated score (σ(−s) = 1 − σ(s), common practice, no
/// source), checked against onnxruntime's probability of class 0.
#[test]
fn the_other_class_of_a_one_score_classifier_is_the_negated_margin() {
    let reference = recorded("onnx_cancer_boosting");
    let imported = import::onnx_graph(&graph("onnx_cancer_boosting"), choice(Some(0))).unwrap();
    let (model, _, _) = native(&imported);
    let got = predictions(model.as_ref(), &reference.rows);
    let negated: Vec<f64> = reference.margin.iter().map(|m| -m).collect();
    assert!(worst_relative(&got, &negated).0 <= 1e-6);
    let default = import::onnx_graph(&graph("onnx_cancer_boosting"), choice(None)).unwrap();
    let OnnxImport::Trees { trees, output } = default else {
        panic!("trees")
    };
    assert_eq!(trees.class_index, 1, "the positive class by default");
    assert_eq!(output, "probabilities");
    assert!(
        trees
            .objective
            .starts_with("TreeEnsembleClassifier post_transform=LOGISTIC"),
        "{}",
        trees.objective
    );
}

/// The exact tree algorithm ("From local explanations to global
/// understanding with explainable AI for trees", Nature Machine
/// Intelligence 2(1), 2020) and the linear closed form ("A unified
/// approach to interpreting model predictions", NeurIPS 2017) on imported
/// graphs, through the front door, equal enumeration over the same
/// predictions; 30-feature models in 10 groups of three (p ≤ 12).
#[test]
fn exact_attributions_of_imported_graphs_equal_enumeration() {
    for (name, exact) in [
        ("onnx_cancer_boosting", EstimatorKind::TreeExact),
        ("onnx_cancer_imputed_forest", EstimatorKind::TreeExact),
        ("onnx_modes", EstimatorKind::TreeExact),
        ("onnx_diabetes_boosting", EstimatorKind::TreeExact),
        ("onnx_cancer_logistic", EstimatorKind::LinearExact),
        ("onnx_diabetes_linear", EstimatorKind::LinearExact),
    ] {
        let reference = recorded(name);
        let imported =
            import::onnx_graph(&graph(name), choice(Some(reference.class_index))).unwrap();
        let (model, _, inputs) = native(&imported);
        let names: Vec<String> = (0..inputs).map(|j| format!("x{j}")).collect();
        let groups: Vec<String> = (0..inputs)
            .map(|j| {
                if inputs > 12 {
                    format!("g{}", j % 10)
                } else {
                    String::new()
                }
            })
            .collect();
        let players = Players::try_new(&names, &groups).unwrap();
        // Held-out rows as the background; trees take the missing cells too.
        let rows = reference.rows.slice(ndarray::s![0..12, ..]).to_owned();
        let prepared = Arc::new(PreparedModel::try_new(model, players, rows, 50.0).unwrap());
        for instance in [0, 5] {
            let row = reference.rows.row(instance).to_vec();
            let summaries: &[Summary] = if exact == EstimatorKind::TreeExact {
                &[Summary::Shapley, Summary::Banzhaf]
            } else {
                &[Summary::Shapley]
            };
            for &summary in summaries {
                let mut request = Request::new(row.clone());
                request.summary = summary;
                request.budget = Duration::from_secs(60);
                request.estimator = Some(exact);
                let fast = prepare(&prepared, request.clone())
                    .unwrap()
                    .run(Instant::now() + request.budget)
                    .unwrap();
                request.estimator = Some(EstimatorKind::Exact);
                let slow = prepare(&prepared, request.clone())
                    .unwrap()
                    .run(Instant::now() + request.budget)
                    .unwrap();
                let (error, at) = worst_relative(&fast.estimate.values, &slow.estimate.values);
                assert!(
                    error <= 1e-9,
                    "{name} {summary:?}: off by {error:e} at player {at}"
                );
            }
        }
    }
}

fn background(features: usize) -> proto::Matrix {
    proto::Matrix {
        rows: 2,
        cols: features as u32,
        values: (0..2 * features).map(|k| 0.1 * k as f64).collect(),
    }
}

fn register(name: &str, features: usize) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: name.replace('_', "-"),
        model: Some(Body::Onnx(graph(name))),
        background: Some(background(features)),
        ..Default::default()
    }
}

/// Over gRPC: what was imported is reported (common practice, no source),
/// and each ambiguous or contradictory choice is refused with
/// INVALID_ARGUMENT naming its field, registering nothing.
#[tokio::test]
async fn registration_reports_the_import_and_refuses_silent_choices() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();

    let info = registry
        .register_model(register("onnx_cancer_boosting", 30))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(info.model_kind, "trees");
    assert_eq!(info.link, proto::Link::Logistic as i32);
    assert_eq!(info.import_format, "onnx");
    assert_eq!(info.import_output, "probabilities");
    assert_eq!(info.import_class_index, Some(1));
    assert!(info.import_objective.contains("TreeEnsembleClassifier"));
    assert_eq!(info.features[29].name, "x29");

    let info = registry
        .register_model(register("onnx_cancer_logistic", 30))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(info.model_kind, "linear");
    assert!(
        info.import_objective.ends_with("after Scaler"),
        "{}",
        info.import_objective
    );
    let mut wine = register("onnx_wine_boosting", 13);
    wine.onnx_output = "probabilities".into();
    wine.onnx_output_column = 2;
    let info = registry.register_model(wine).await.unwrap().into_inner();
    assert_eq!(info.import_class_index, Some(2), "the column is the class");

    let mut cases: Vec<(&str, proto::RegisterModelRequest)> = Vec::new();
    let mut label = register("onnx_cancer_boosting", 30);
    label.onnx_output = "label".into();
    cases.push(("onnx_output", label));
    let mut missing = register("onnx_cancer_boosting", 30);
    missing.onnx_output = "no_such_output".into();
    cases.push(("onnx_output", missing));
    cases.push(("class_index", register("onnx_wine_boosting", 13)));
    let mut out_of_range = register("onnx_wine_boosting", 13);
    out_of_range.class_index = Some(3);
    cases.push(("class_index", out_of_range));
    let mut disagree = register("onnx_wine_boosting", 13);
    disagree.onnx_output = "probabilities".into();
    disagree.onnx_output_column = 1;
    disagree.class_index = Some(2);
    cases.push(("class_index", disagree));
    // The forest's scores are probabilities already (post_transform NONE).
    let mut twice = register("onnx_cancer_imputed_forest", 30);
    twice.link = proto::Link::Logistic as i32;
    cases.push(("link", twice));
    let mut width = register("onnx_cancer_boosting", 10);
    width.features = (0..10)
        .map(|j| proto::Feature {
            name: format!("f{j}"),
            ..Default::default()
        })
        .collect();
    cases.push(("features", width));
    // A linear model cannot fold an imputer: it takes no missing values.
    cases.push(("onnx", register("onnx_cancer_imputed_logistic", 30)));
    for (field, bad) in cases {
        let status = registry.register_model(bad).await.unwrap_err();
        assert_eq!(status.code(), Code::InvalidArgument, "{field}: {status:?}");
        assert!(
            status.message().starts_with(field),
            "{field}: {}",
            status.message()
        );
    }
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    assert_eq!(listed.models.len(), 3, "nothing refused was kept");
    server.stop().await;
}
