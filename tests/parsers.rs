//! Hostile bytes for every model-file parser: XGBoost JSON, LightGBM text,
//! ONNX graphs, and the JSON model file `apportion register` reads (with the
//! request it builds converted as the server would). Arbitrary bytes and
//! mutations of the valid files in `tests/fixtures/import/` and
//! `tests/fixtures/model_files/` must give either
//! a model or an error naming a field with a message, never a panic
//! (common practice for parser robustness, no source). Bounded: a fixed
//! number of cases per parser, on files of at most a few tens of KiB.

use std::path::{Path, PathBuf};

use apportion::client;
use apportion::engine::EngineError;
use apportion::model::import::{self, OnnxChoice};
use apportion::registry::ModelSpec;
use proptest::prelude::*;

fn fixture(name: &str) -> Vec<u8> {
    // The CLI's model files are ours, the rest the libraries' (regenerated
    // and compared by .ci/import-fixtures-check, so kept apart).
    let folder = if name.starts_with("model_file_") {
        "tests/fixtures/model_files"
    } else {
        "tests/fixtures/import"
    };
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join(folder)
        .join(name);
    std::fs::read(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// An error a caller can act on: it names a field and says something.
fn is_clear(error: &EngineError) -> bool {
    !error.field.is_empty() && !error.message.trim().is_empty()
}

/// `bytes` with each `(where, byte)` edit applied at `where` × its length,
/// then cut to `keep` × its length when `keep` is given.
fn mutate(mut bytes: Vec<u8>, edits: &[(f64, u8)], keep: Option<f64>) -> Vec<u8> {
    for &(at, byte) in edits {
        let index = ((bytes.len() - 1) as f64 * at) as usize;
        bytes[index] = byte;
    }
    if let Some(keep) = keep {
        bytes.truncate((bytes.len() as f64 * keep) as usize);
    }
    bytes
}

/// Edits that keep most of a file's structure, so parsing goes deep: a few
/// bytes replaced, often by one a parser cares about, and sometimes a cut.
fn edits() -> impl Strategy<Value = (Vec<(f64, u8)>, Option<f64>)> {
    let byte = prop_oneof![
        any::<u8>(),
        prop::sample::select(b"0123456789-.eE,:[]{}\"\n =".to_vec()),
    ];
    (
        prop::collection::vec((0.0..1.0f64, byte), 1..6),
        prop::option::weighted(0.3, 0.0..1.0f64),
    )
}

fn config() -> ProptestConfig {
    ProptestConfig {
        cases: 256,
        failure_persistence: None,
        ..ProptestConfig::default()
    }
}

/// Each fixture with the class its valid form needs (the wine sets have
/// three classes).
const XGBOOST: [(&str, Option<u32>); 3] = [
    ("xgb_cancer.json", None),
    ("xgb_diabetes.json", None),
    ("xgb_wine.json", Some(1)),
];
const LIGHTGBM: [(&str, Option<u32>); 3] = [
    ("lgb_cancer.txt", None),
    ("lgb_diabetes_nan.txt", None),
    ("lgb_wine.txt", Some(2)),
];
const ONNX: [(&str, Option<u32>); 5] = [
    ("onnx_cancer_logistic.onnx", None),
    ("onnx_diabetes_forest.onnx", None),
    ("onnx_wine_boosting.onnx", Some(0)),
    ("onnx_modes.onnx", None),
    ("onnx_cancer_imputed_forest.onnx", None),
];
const MODEL_FILES: [&str; 3] = [
    "model_file_linear.json",
    "model_file_trees.json",
    "model_file_xgboost.json",
];

fn check_trees(result: apportion::engine::Result<import::ImportedTrees>) {
    if let Err(error) = result {
        assert!(is_clear(&error), "{error:?}");
    }
}

fn check_onnx(bytes: &[u8], class_index: Option<u32>) {
    let choice = OnnxChoice {
        output: "",
        column: 0,
        class_index,
        features: 0,
    };
    if let Err(error) = import::onnx_graph(bytes, choice) {
        assert!(is_clear(&error), "{error:?}");
    }
}

/// Writes `bytes` as a model file beside a copy of the XGBoost fixture it
/// may name, reads it as `apportion register` does, and converts the
/// request as the server does.
fn check_model_file(dir: &Path, bytes: &[u8]) {
    let path: PathBuf = dir.join("model.json");
    std::fs::write(&path, bytes).unwrap();
    match client::registration(&path, None, None) {
        Ok(request) => {
            if let Err(error) = ModelSpec::try_from(request) {
                assert!(!error.to_string().trim().is_empty(), "{error:?}");
            }
        }
        Err(error) => assert!(!error.to_string().trim().is_empty(), "{error:?}"),
    }
}

fn model_file_dir() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("xgb_wine.json"), fixture("xgb_wine.json")).unwrap();
    dir
}

#[test]
fn the_unmutated_fixtures_parse() {
    // The mutations below start from valid files; were these not valid, the
    // properties would only ever test the first check.
    for (name, class) in XGBOOST {
        import::xgboost_json(&fixture(name), class).unwrap();
    }
    for (name, class) in LIGHTGBM {
        import::lightgbm_text(&fixture(name), class).unwrap();
    }
    for (name, class_index) in ONNX {
        let choice = OnnxChoice {
            output: "",
            column: 0,
            class_index,
            features: 0,
        };
        import::onnx_graph(&fixture(name), choice).unwrap_or_else(|e| panic!("{name}: {e:?}"));
    }
    let dir = model_file_dir();
    for name in MODEL_FILES {
        std::fs::write(dir.path().join("model.json"), fixture(name)).unwrap();
        let request = client::registration(&dir.path().join("model.json"), None, None).unwrap();
        ModelSpec::try_from(request).unwrap();
    }
}

proptest! {
    #![proptest_config(config())]

    #[test]
    fn arbitrary_bytes_never_panic_a_parser(bytes in prop::collection::vec(any::<u8>(), 0..2048)) {
        check_trees(import::xgboost_json(&bytes, None));
        check_trees(import::lightgbm_text(&bytes, None));
        check_onnx(&bytes, None);
        check_model_file(model_file_dir().path(), &bytes);
    }

    #[test]
    fn mutated_xgboost_files_never_panic(which in 0..XGBOOST.len(), (edits, keep) in edits()) {
        let (name, class) = XGBOOST[which];
        check_trees(import::xgboost_json(&mutate(fixture(name), &edits, keep), class));
    }

    #[test]
    fn mutated_lightgbm_files_never_panic(which in 0..LIGHTGBM.len(), (edits, keep) in edits()) {
        let (name, class) = LIGHTGBM[which];
        check_trees(import::lightgbm_text(&mutate(fixture(name), &edits, keep), class));
    }

    #[test]
    fn mutated_onnx_files_never_panic(which in 0..ONNX.len(), (edits, keep) in edits()) {
        let (name, class) = ONNX[which];
        check_onnx(&mutate(fixture(name), &edits, keep), class);
    }

    #[test]
    fn mutated_model_files_never_panic(which in 0..MODEL_FILES.len(), (edits, keep) in edits()) {
        let dir = model_file_dir();
        check_model_file(dir.path(), &mutate(fixture(MODEL_FILES[which]), &edits, keep));
    }
}
