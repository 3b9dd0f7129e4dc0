//! XGBoost and LightGBM model files imported as native trees: predictions
//! equal each library's own raw margins on the rows tests/fixtures/
//! make_import_fixtures.py recorded, exact tree attributions of an imported
//! model equal brute-force enumeration, and every refusal over gRPC names
//! its field and registers nothing.

mod support;

use support::{json_numbers, worst_relative};

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion::engine::estimate::EstimatorKind;
use apportion::engine::{Model, Players, PreparedModel, Request, Summary, prepare};
use apportion::model::import::{self, ImportedTrees};
use apportion::model::{Link, TreeEnsemble};
use apportion::service::proto::{self, register_model_request::Model as Body};
use ndarray::Array2;
use serde_json::Value;
use tonic::Code;

fn fixture_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/import")
}

fn model_bytes(name: &str) -> Vec<u8> {
    std::fs::read(fixture_dir().join(name)).expect("fixture present")
}

/// The recorded rows (null = NaN) and reference columns of one model file.
struct Recorded {
    rows: Array2<f64>,
    class_index: u32,
    feature_names: Vec<String>,
    margin: Vec<f64>,
    leaf_sum: Option<Vec<f64>>,
}

fn recorded(name: &str) -> Recorded {
    let text = std::fs::read_to_string(fixture_dir().join(format!("{name}.rows.json"))).unwrap();
    let json: Value = serde_json::from_str(&text).unwrap();
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
        feature_names: json["feature_names"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap().to_string())
            .collect(),
        margin: json_numbers(&json["margin"]),
        leaf_sum: json.get("leaf_sum").map(json_numbers),
    }
}

fn ensemble(imported: &ImportedTrees) -> TreeEnsemble {
    let inputs = imported.feature_names.len();
    let trees = imported
        .trees
        .iter()
        .map(|t| {
            t.clone()
                .into_tree(inputs)
                .expect("imported trees are valid native trees")
        })
        .collect();
    TreeEnsemble::try_new(trees, imported.base_score, imported.link, inputs).unwrap()
}

fn predictions(model: &TreeEnsemble, rows: &Array2<f64>) -> Vec<f64> {
    let mut out = vec![0.0; rows.nrows()];
    model.predict(rows.view(), &mut out);
    out
}

type Importer = fn(&[u8], Option<u32>) -> apportion::engine::Result<ImportedTrees>;

fn import_fixture(file: &str, importer: Importer) -> (ImportedTrees, Recorded) {
    let reference = recorded(file);
    let imported = importer(&model_bytes(file), Some(reference.class_index)).unwrap();
    assert_eq!(imported.feature_names, reference.feature_names, "{file}");
    assert_eq!(imported.class_index, reference.class_index);
    (imported, reference)
}

/// XGBoost's documentation ("Introduction to Model IO", the JSON schema
/// doc/model.schema) defines the file; the reference values are XGBoost's
/// own: its per-tree leaf values (`pred_leaf`) summed in double with the
/// base margin must match to 1e-9, and its own margin (summed in float32)
/// to about float32 precision.
#[test]
fn xgboost_files_predict_the_library_margin() {
    for (file, link) in [
        ("xgb_cancer.json", Link::Logistic),
        ("xgb_diabetes.json", Link::Identity),
        ("xgb_wine.json", Link::Identity),
    ] {
        let (imported, reference) = import_fixture(file, import::xgboost_json);
        assert_eq!(imported.link, link, "{file}");
        let got = predictions(&ensemble(&imported), &reference.rows);
        let (error, row) = worst_relative(&got, reference.leaf_sum.as_ref().unwrap());
        let margin_error = worst_relative(&got, &reference.margin).0;
        println!(
            "{file}: {} rows, leaf sum {error:e}, margin {margin_error:e}",
            got.len()
        );
        assert!(
            error <= 1e-9,
            "{file}: leaf sum off by {error:e} at row {row}"
        );
        let (error, row) = worst_relative(&got, &reference.margin);
        // XGBoost sums in float32: about float32 precision.
        assert!(
            error <= 1e-6,
            "{file}: margin off by {error:e} at row {row}"
        );
        assert!(reference.rows.nrows() > 200, "{file}: probes recorded");
    }
}

/// LightGBM's documentation of its model text (and `Tree::NumericalDecision`
/// in include/LightGBM/tree.h) defines the decisions; the reference is its
/// own `raw_score`, computed in double.
#[test]
fn lightgbm_files_predict_the_library_raw_score() {
    for (file, link) in [
        ("lgb_cancer.txt", Link::Logistic),
        ("lgb_diabetes.txt", Link::Identity),
        ("lgb_diabetes_nan.txt", Link::Identity),
        ("lgb_wine.txt", Link::Identity),
    ] {
        let (imported, reference) = import_fixture(file, import::lightgbm_text);
        assert_eq!(imported.link, link, "{file}");
        let got = predictions(&ensemble(&imported), &reference.rows);
        let (error, row) = worst_relative(&got, &reference.margin);
        println!("{file}: {} rows, raw score {error:e}", got.len());
        assert!(
            error <= 1e-9,
            "{file}: raw score off by {error:e} at row {row}"
        );
        assert!(reference.rows.nrows() > 100, "{file}: probes recorded");
    }
}

/// Class 0 of a binary model is the negated margin: σ(−m) = 1 − σ(m)
/// (common practice, no source), checked against the library's margin.
#[test]
fn the_negative_class_of_a_binary_model_is_the_negated_margin() {
    let reference = recorded("lgb_cancer.txt");
    let imported = import::lightgbm_text(&model_bytes("lgb_cancer.txt"), Some(0)).unwrap();
    let got = predictions(&ensemble(&imported), &reference.rows);
    let negated: Vec<f64> = reference.margin.iter().map(|m| -m).collect();
    assert!(worst_relative(&got, &negated).0 <= 1e-9);
    let unset = import::xgboost_json(&model_bytes("xgb_cancer.json"), None).unwrap();
    assert_eq!(unset.class_index, 1, "the positive class by default");
}

/// The exact tree algorithm ("From local explanations to global
/// understanding with explainable AI for trees", Nature Machine
/// Intelligence 2(1), 2020) on imported models, through the engine's front
/// door, against enumerating every coalition over the same predictions.
#[test]
fn exact_tree_attributions_of_imported_models_equal_enumeration() {
    let cases: [(&str, Importer); 4] = [
        ("xgb_diabetes.json", import::xgboost_json),
        ("lgb_diabetes.txt", import::lightgbm_text),
        ("lgb_wine.txt", import::lightgbm_text),
        ("xgb_cancer.json", import::xgboost_json),
    ];
    for (file, importer) in cases {
        let (imported, reference) = import_fixture(file, importer);
        let names = imported.feature_names.clone();
        // 30 cancer features form 10 players by measurement (p ≤ 12 keeps
        // enumeration small); the others are singletons.
        let groups: Vec<String> = names
            .iter()
            .map(|n| {
                if names.len() > 12 {
                    n.trim_start_matches("mean_")
                        .trim_start_matches("worst_")
                        .trim_end_matches("_error")
                        .to_string()
                } else {
                    String::new()
                }
            })
            .collect();
        let players = Players::try_new(&names, &groups).unwrap();
        let model: Arc<dyn Model> = Arc::new(ensemble(&imported));
        // Held-out rows, some with missing cells, as the background.
        let background = reference.rows.slice(ndarray::s![1..20, ..]).to_owned();
        let prepared = Arc::new(PreparedModel::try_new(model, players, background, 50.0).unwrap());
        for instance in [0, 15] {
            let row = reference.rows.row(instance).to_vec();
            for summary in [Summary::Shapley, Summary::Banzhaf] {
                let mut request = Request::new(row.clone());
                request.summary = summary;
                request.budget = Duration::from_secs(60);
                request.estimator = Some(EstimatorKind::TreeExact);
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
                    "{file} {summary:?}: off by {error:e} at player {at}"
                );
            }
        }
    }
}

fn request(model_id: &str, body: Body, features: usize) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.to_string(),
        model: Some(body),
        background: Some(proto::Matrix {
            rows: 1,
            cols: features as u32,
            values: vec![0.5; features],
        }),
        ..Default::default()
    }
}

fn edited_json(file: &str, edit: impl FnOnce(&mut Value)) -> Vec<u8> {
    let mut json: Value = serde_json::from_slice(&model_bytes(file)).unwrap();
    edit(&mut json);
    serde_json::to_vec(&json).unwrap()
}

fn edited_text(file: &str, edit: impl FnOnce(String) -> String) -> Vec<u8> {
    edit(String::from_utf8(model_bytes(file)).unwrap()).into_bytes()
}

/// Each refusal, over gRPC: INVALID_ARGUMENT, the field named first in the
/// message with what was found, and no model left behind (common practice,
/// no source).
#[tokio::test]
async fn refusals_name_their_field_and_register_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();

    // What is accepted: names from the file, the link from the objective.
    let info = registry
        .register_model(request(
            "xgb",
            Body::XgboostJson(model_bytes("xgb_cancer.json")),
            30,
        ))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(info.model_kind, "trees");
    assert_eq!(info.link, proto::Link::Logistic as i32);
    assert_eq!(info.features[0].name, "mean_radius");
    let mut wine = request("lgb", Body::LightgbmText(model_bytes("lgb_wine.txt")), 13);
    wine.class_index = Some(2);
    let info = registry.register_model(wine).await.unwrap().into_inner();
    assert_eq!(info.link, proto::Link::Identity as i32);
    assert_eq!(info.features.len(), 13);

    let xgb = |bytes: Vec<u8>, features| request("refused", Body::XgboostJson(bytes), features);
    let lgb = |bytes: Vec<u8>, features| request("refused", Body::LightgbmText(bytes), features);
    let mut cases: Vec<(&str, &str, proto::RegisterModelRequest)> = vec![
        (
            "xgboost_json",
            "truncated",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    let model = &mut j["learner"]["gradient_booster"]["model"];
                    model["trees"].as_array_mut().unwrap().pop();
                    model["tree_info"].as_array_mut().unwrap().pop();
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "not JSON",
            xgb(model_bytes("xgb_diabetes.json")[..5000].to_vec(), 10),
        ),
        (
            "xgboost_json",
            "reg:pseudohubererror",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["objective"]["name"] = "reg:pseudohubererror".into();
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "categorical",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["gradient_booster"]["model"]["trees"][3]["split_type"][0] =
                        1.into();
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "categorical",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["feature_types"] =
                        serde_json::json!(["q", "c", "q", "q", "q", "q", "q", "q", "q", "q"]);
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "dart",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["gradient_booster"]["name"] = "dart".into();
                }),
                10,
            ),
        ),
        (
            "class_index",
            "required",
            xgb(model_bytes("xgb_wine.json"), 13),
        ),
        ("link", "reg:squarederror", {
            let mut r = xgb(model_bytes("xgb_diabetes.json"), 10);
            r.link = proto::Link::Logistic as i32;
            r
        }),
        ("features", "10 inputs", {
            let mut r = xgb(model_bytes("xgb_diabetes.json"), 3);
            r.features = ["a", "b", "c"]
                .iter()
                .map(|n| proto::Feature {
                    name: n.to_string(),
                    ..Default::default()
                })
                .collect();
            r
        }),
        (
            "lightgbm_text",
            "truncated",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    let cut = t.find("Tree=19").unwrap();
                    format!("{}end of trees\n", &t[..cut])
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "truncated",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t[..t.find("Tree=5").unwrap()].to_string()
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "categorical",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t.replacen("num_cat=0", "num_cat=1", 1)
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "categorical",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t.replacen("decision_type=6", "decision_type=7", 1)
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "linear",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t.replacen("is_linear=0", "is_linear=1", 1)
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "huber",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t.replacen("objective=regression", "objective=huber", 1)
                }),
                10,
            ),
        ),
        (
            "class_index",
            "required",
            lgb(model_bytes("lgb_wine.txt"), 13),
        ),
        ("link", "regression", {
            let mut r = lgb(model_bytes("lgb_diabetes.txt"), 10);
            r.link = proto::Link::Logistic as i32;
            r
        }),
    ];
    cases.extend([
        (
            "xgboost_json",
            "targets",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["learner_model_param"]["num_target"] = "2".into();
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "vector leaves",
            xgb(
                edited_json("xgb_diabetes.json", |j| {
                    j["learner"]["gradient_booster"]["model"]["trees"][0]["tree_param"]
                        ["size_leaf_vector"] = "3".into();
                }),
                10,
            ),
        ),
        (
            "xgboost_json",
            "not a probability",
            xgb(
                edited_json("xgb_cancer.json", |j| {
                    j["learner"]["learner_model_param"]["base_score"] = "[1.5E0]".into();
                }),
                30,
            ),
        ),
        (
            "lightgbm_text",
            "average_output",
            lgb(
                edited_text("lgb_diabetes.txt", |t| {
                    t.replacen("objective=regression", "objective=regression\naverage_output", 1)
                }),
                10,
            ),
        ),
        (
            "lightgbm_text",
            "does not start",
            lgb(model_bytes("xgb_diabetes.json"), 10),
        ),
    ]);
    let mut out_of_range = lgb(model_bytes("lgb_wine.txt"), 13);
    out_of_range.class_index = Some(3);
    cases.push(("class_index", "out of range", out_of_range));
    let mut binary = xgb(model_bytes("xgb_cancer.json"), 30);
    binary.class_index = Some(2);
    cases.push(("class_index", "out of range", binary));
    let mut linear = request(
        "refused",
        Body::Linear(proto::LinearModel {
            weights: vec![1.0],
            intercept: 0.0,
        }),
        1,
    );
    linear.features = vec![proto::Feature {
        name: "x".into(),
        ..Default::default()
    }];
    linear.class_index = Some(0);
    cases.push(("class_index", "xgboost_json", linear));

    for (field, found, case) in cases {
        let status = registry.register_model(case).await.unwrap_err();
        assert_eq!(status.code(), Code::InvalidArgument, "{}", status.message());
        assert!(
            status.message().starts_with(field) && status.message().contains(found),
            "expected `{field}` … `{found}`: {}",
            status.message()
        );
    }
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    let ids: Vec<&str> = listed.models.iter().map(|m| m.model_id.as_str()).collect();
    assert_eq!(
        ids,
        ["lgb", "xgb"],
        "refused registrations leave nothing behind"
    );
    server.stop().await;
}

/// `apportion register` model files of kind `xgboost` and `lightgbm`: the
/// file's bytes and class choice reach the server, which takes the feature
/// names from the model file when the model file gives none.
#[tokio::test]
async fn cli_model_files_register_library_files() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let entries = [
        (
            "wine",
            serde_json::json!({"kind": "lightgbm", "path": fixture_dir().join("lgb_wine.txt"), "class_index": 1}),
            13,
        ),
        (
            "cancer",
            serde_json::json!({"kind": "xgboost", "path": fixture_dir().join("xgb_cancer.json")}),
            30,
        ),
    ];
    for (id, model, width) in entries {
        let file = dir.path().join(format!("{id}.json"));
        std::fs::write(
            &file,
            serde_json::json!({"model_id": id, "model": model, "background": [vec![1.0; width]]})
                .to_string(),
        )
        .unwrap();
        let request = apportion::client::registration(&file, None, None).unwrap();
        assert_eq!(request.class_index, (id == "wine").then_some(1));
        let info = registry.register_model(request).await.unwrap().into_inner();
        assert_eq!(info.features.len(), width);
        assert_eq!(info.model_kind, "trees");
    }
    server.stop().await;
}

/// The objective as the file states it, read here straight from the file
/// format (XGBoost's JSON schema: `learner.objective.name`; LightGBM's text
/// model: the header line `objective=`), not through the importers.
fn objective_in_file(file: &str) -> String {
    let bytes = model_bytes(file);
    if file.ends_with(".json") {
        let json: Value = serde_json::from_slice(&bytes).unwrap();
        json["learner"]["objective"]["name"]
            .as_str()
            .unwrap()
            .to_string()
    } else {
        String::from_utf8(bytes)
            .unwrap()
            .lines()
            .find_map(|line| line.strip_prefix("objective="))
            .unwrap()
            .to_string()
    }
}

/// ModelInfo says what was imported (issue 7, part 5): the `model` field the
/// file came in, the objective the file names and the class whose margin is
/// served; a native registration says nothing. The record keeps it across a
/// restart with the same checksum (common practice, no source).
#[tokio::test]
async fn model_info_says_what_was_imported_and_keeps_it_across_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();

    let mut wine = request(
        "xgb-wine",
        Body::XgboostJson(model_bytes("xgb_wine.json")),
        13,
    );
    wine.class_index = Some(2);
    // Unset: the positive class of a binary model.
    let cancer = request(
        "lgb-cancer",
        Body::LightgbmText(model_bytes("lgb_cancer.txt")),
        30,
    );
    let native = proto::RegisterModelRequest {
        features: vec![proto::Feature {
            name: "x0".to_string(),
            ..Default::default()
        }],
        ..request(
            "native",
            Body::Trees(proto::TreeEnsemble {
                trees: vec![proto::Tree {
                    feature: vec![0, -1, -1],
                    threshold: vec![0.0, 0.0, 0.0],
                    left: vec![1, -1, -1],
                    right: vec![2, -1, -1],
                    value: vec![0.0, -1.0, 1.0],
                    missing_left: vec![],
                }],
                base_score: 0.0,
            }),
            1,
        )
    };
    let expected = [
        (
            "xgb-wine",
            "xgboost_json",
            objective_in_file("xgb_wine.json"),
            Some(2),
        ),
        (
            "lgb-cancer",
            "lightgbm_text",
            objective_in_file("lgb_cancer.txt"),
            Some(1),
        ),
        ("native", "", String::new(), None),
    ];
    assert_eq!(expected[0].2, "multi:softprob");
    assert_eq!(expected[1].2, "binary sigmoid:1");
    for (request, (id, format, objective, class)) in
        [wine, cancer, native].into_iter().zip(&expected)
    {
        let info = registry.register_model(request).await.unwrap().into_inner();
        assert_eq!(info.model_id, *id);
        assert_eq!(info.model_kind, "trees", "{id}");
        assert_eq!(info.import_format, *format, "{id}");
        assert_eq!(info.import_objective, *objective, "{id}");
        assert_eq!(info.import_class_index, *class, "{id}");
    }

    // The thin client's `models` prints them for imported models only.
    let connection = apportion::client::Connection::plaintext(server.address.to_string());
    let printed = apportion::client::models(&connection).await.unwrap();
    for (id, format, objective, class) in &expected {
        let line = printed.iter().find(|m| m["model_id"] == *id).unwrap();
        if format.is_empty() {
            assert!(line.get("import_format").is_none(), "{line}");
        } else {
            assert_eq!(line["import_format"], *format, "{line}");
            assert_eq!(line["import_objective"], *objective, "{line}");
            assert_eq!(line["import_class_index"], class.unwrap(), "{line}");
        }
    }

    let before = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner()
        .models;
    server.stop().await;
    let server = support::start(dir.path()).await;
    let after = server
        .registry_client()
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner()
        .models;
    assert_eq!(before.len(), 3);
    // Preparation is timed afresh on load; everything else is as registered.
    let registered = |info: &proto::ModelInfo| proto::ModelInfo {
        preparation_ms: 0.0,
        ..info.clone()
    };
    for (a, b) in before.iter().zip(&after) {
        assert_eq!(registered(a), registered(b));
    }
    server.stop().await;
}
