//! The model registry: versions, persistence across restarts, corruption
//! handling and validation. These are operational behaviours, checked
//! against the contract in the registry's module documentation (common
//! practice, no source, unless a check says otherwise).

use std::ffi::OsString;
use std::fs;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use apportion::registry::{
    Background, FeatureSpec, ImportFormat, ImportSpec, LinkSpec, ModelBody, ModelInfo, ModelSpec,
    Registry, RegistryError, TreeBody, data_dir_from, spec_checksum,
};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use sha2::{Digest, Sha256};

fn feature(name: &str, group: &str, reason: &str) -> FeatureSpec {
    FeatureSpec {
        name: name.to_string(),
        group: group.to_string(),
        reason_code: if reason.is_empty() {
            String::new()
        } else {
            format!("R-{name}")
        },
        reason_text: reason.to_string(),
    }
}

fn plain_features(count: usize) -> Vec<FeatureSpec> {
    (0..count)
        .map(|j| feature(&format!("f{j}"), "", &format!("reason for f{j}")))
        .collect()
}

/// Full-precision random values, so a persistence round trip that lost a
/// single bit would show.
fn random_background(rng: &mut ChaCha8Rng, rows: usize, cols: usize) -> Background {
    Background {
        rows,
        cols,
        values: (0..rows * cols)
            .map(|_| rng.random::<f64>() * 20.0 - 10.0)
            .collect(),
    }
}

fn linear_spec(model_id: &str, seed: u64) -> ModelSpec {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let cols = 3;
    ModelSpec {
        model_id: model_id.to_string(),
        features: plain_features(cols),
        model: ModelBody::Linear {
            weights: (0..cols).map(|_| rng.random::<f64>() - 0.5).collect(),
            intercept: rng.random::<f64>(),
        },
        link: LinkSpec::Logistic,
        background: random_background(&mut rng, 7, cols),
        description: format!("linear model {model_id}"),
        imported: None,
        decision: None,
    }
}

/// Two depth-2 trees over three features, random thresholds and leaves.
fn tree_spec(model_id: &str, seed: u64) -> ModelSpec {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut tree = |root_feature: i32, child_feature: i32| TreeBody {
        feature: vec![root_feature, -1, child_feature, -1, -1],
        threshold: vec![
            rng.random::<f64>() * 4.0 - 2.0,
            0.0,
            rng.random::<f64>() * 4.0 - 2.0,
            0.0,
            0.0,
        ],
        left: vec![1, -1, 3, -1, -1],
        right: vec![2, -1, 4, -1, -1],
        value: vec![0.0, rng.random(), 0.0, rng.random(), rng.random()],
        missing_left: vec![true, false, false, false, false],
    };
    let trees = vec![tree(0, 1), tree(2, 0)];
    let mut rng = ChaCha8Rng::seed_from_u64(seed + 1000);
    ModelSpec {
        model_id: model_id.to_string(),
        features: vec![
            feature("income", "", "income is low"),
            feature("debt_card", "debt", "debt is high"),
            feature("debt_loan", "debt", ""),
        ],
        model: ModelBody::Trees {
            trees,
            base_score: -0.25,
        },
        link: LinkSpec::Identity,
        background: random_background(&mut rng, 9, 3),
        description: String::new(),
        imported: None,
        decision: None,
    }
}

/// A tree model whose background lacks some values (NaN), as tree models
/// allow: the first feature of every third row and one whole row.
fn tree_with_missing_background(model_id: &str, seed: u64) -> ModelSpec {
    let mut spec = tree_spec(model_id, seed);
    let cols = spec.background.cols;
    for row in (0..spec.background.rows).step_by(3) {
        spec.background.values[row * cols] = f64::NAN;
    }
    for value in &mut spec.background.values[cols..2 * cols] {
        *value = f64::NAN;
    }
    spec
}

/// The model's raw outputs on its own background, as bit patterns.
fn background_prediction_bits(registry: &Registry, model_id: &str, version: u64) -> Vec<u64> {
    let entry = registry.get(model_id, version).unwrap();
    let mut out = vec![0.0; entry.background().nrows()];
    entry.model().predict(entry.background(), &mut out);
    out.iter().map(|v| v.to_bits()).collect()
}

fn files_under(dir: &Path) -> Vec<PathBuf> {
    let mut files = Vec::new();
    let mut pending = vec![dir.to_path_buf()];
    while let Some(dir) = pending.pop() {
        for entry in fs::read_dir(&dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                pending.push(path);
            } else {
                files.push(path);
            }
        }
    }
    files.sort();
    files
}

fn record_path(dir: &Path, model_id: &str, version: u64) -> PathBuf {
    // The layout documented in the registry module.
    dir.join("models")
        .join(model_id)
        .join(format!("v{version}.json"))
}

#[test]
fn versions_count_up_and_are_never_reused() {
    // Common practice, no source: a version number names one registration
    // forever, so a client holding "v2" never silently gets another model.
    let dir = tempfile::tempdir().unwrap();
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");

    let first = registry.register(linear_spec("rent", 1)).unwrap();
    let second = registry.register(linear_spec("rent", 2)).unwrap();
    registry.register(tree_spec("arrears", 3)).unwrap();
    assert_eq!((first.version, second.version), (1, 2));

    assert_eq!(registry.get("rent", 0).unwrap().info(), &second);
    assert_eq!(registry.get("rent", 1).unwrap().info(), &first);
    let listed: Vec<(String, u64)> = registry
        .list()
        .into_iter()
        .map(|info| (info.model_id, info.version))
        .collect();
    assert_eq!(
        listed,
        vec![
            ("arrears".to_string(), 1),
            ("rent".to_string(), 1),
            ("rent".to_string(), 2)
        ]
    );

    assert_eq!(registry.delete("rent", 1).unwrap(), 1);
    assert!(!record_path(dir.path(), "rent", 1).exists());
    let missing = registry.get("rent", 1).unwrap_err();
    assert!(matches!(
        missing,
        RegistryError::NotFound { version: 1, .. }
    ));
    assert_eq!(missing.field(), Some("version"));
    assert!(matches!(
        registry.delete("rent", 1),
        Err(RegistryError::NotFound { .. })
    ));
    assert_eq!(
        registry.register(linear_spec("rent", 4)).unwrap().version,
        3
    );

    assert_eq!(registry.delete("rent", 0).unwrap(), 2);
    assert!(matches!(
        registry.get("rent", 0),
        Err(RegistryError::NotFound { version: 0, .. })
    ));
    assert_eq!(registry.list().len(), 1);
    assert_eq!(
        registry.register(linear_spec("rent", 5)).unwrap().version,
        4
    );
    assert_eq!(registry.delete("rent", 0).unwrap(), 1);

    // Every file of "rent" is gone; the next version must still be 5.
    drop(registry);
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");
    assert!(registry.get("rent", 0).is_err());
    assert_eq!(
        registry.register(linear_spec("rent", 6)).unwrap().version,
        5
    );
    assert_eq!(
        registry.register(tree_spec("arrears", 7)).unwrap().version,
        2
    );
}

/// What registration fixed: everything but the preparation time, which is
/// measured afresh each time a load prepares the model again.
fn as_registered(info: &ModelInfo) -> ModelInfo {
    ModelInfo {
        preparation_ms: 0.0,
        ..info.clone()
    }
}

#[test]
fn acknowledged_models_come_back_bit_for_bit_after_a_restart() {
    // Common practice, no source: whatever register acknowledged is served
    // unchanged after the process restarts.
    let dir = tempfile::tempdir().unwrap();
    let specs = [
        linear_spec("rent", 11),
        linear_spec("rent", 12),
        tree_spec("arrears", 13),
        tree_spec("deposit.v2_final-3", 14),
        tree_with_missing_background("history", 15),
    ];
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let mut before = Vec::new();
    for spec in &specs {
        let info = registry.register(spec.clone()).unwrap();
        assert!(info.row_cost_ns.is_finite() && info.row_cost_ns >= 0.0);
        let bits = background_prediction_bits(&registry, &info.model_id, info.version);
        before.push((info, bits));
    }
    drop(registry);

    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");
    assert_eq!(registry.list().len(), specs.len());
    for (spec, (info, bits)) in specs.iter().zip(&before) {
        let entry = registry.get(&info.model_id, info.version).unwrap();
        assert_eq!(
            as_registered(entry.info()),
            as_registered(info),
            "same checksum, features, cost and time"
        );
        assert_eq!(
            &entry.spec(),
            spec,
            "the spec, background included, bit for bit"
        );
        let background_bits: Vec<u64> = entry.background().iter().map(|v| v.to_bits()).collect();
        let spec_bits: Vec<u64> = spec.background.values.iter().map(|v| v.to_bits()).collect();
        assert_eq!(background_bits, spec_bits);
        assert_eq!(
            &background_prediction_bits(&registry, &info.model_id, info.version),
            bits
        );
    }
}

#[test]
fn players_and_reason_statements_follow_the_feature_list() {
    // DESIGN.md conventions: features sharing a group form one player named
    // after the group, players ordered by first appearance.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    registry.register(tree_spec("arrears", 21)).unwrap();
    let entry = registry.get("arrears", 0).unwrap();
    assert_eq!(entry.players().names(), ["income", "debt"]);
    assert_eq!(entry.reason_statements(), ["income is low", "debt is high"]);
    assert_eq!(entry.reason_codes(), ["R-income", "R-debt_card"]);
    assert_eq!(entry.info().model_kind, "trees");
}

#[test]
fn damaged_files_are_reported_and_skipped_while_the_rest_is_served() {
    // Common practice, no source: a damaged entry must never be served and
    // must never stop the others from loading.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let mut flipped = linear_spec("flipped", 31);
    flipped.model = ModelBody::Linear {
        weights: vec![0.125, 2.5, -3.75],
        intercept: 0.5,
    };
    for spec in [
        linear_spec("truncated", 32),
        tree_spec("garbage", 33),
        flipped,
        linear_spec("good-a", 34),
        tree_spec("good-b", 35),
    ] {
        registry.register(spec).unwrap();
    }
    let good: Vec<_> = ["good-a", "good-b"]
        .iter()
        .map(|id| registry.get(id, 0).unwrap().info().clone())
        .collect();
    drop(registry);

    let truncated = record_path(dir.path(), "truncated", 1);
    let bytes = fs::read(&truncated).unwrap();
    fs::write(&truncated, &bytes[..bytes.len() / 2]).unwrap();
    let garbage = record_path(dir.path(), "garbage", 1);
    fs::write(&garbage, b"\x00\xffthis is not a model record").unwrap();
    let flipped = record_path(dir.path(), "flipped", 1);
    let text = fs::read_to_string(&flipped).unwrap();
    let weights_at = text.find("\"weights\":[0.125,").unwrap();
    let mut altered = text.clone();
    altered.replace_range(weights_at..weights_at + 16, "\"weights\":[0.175");
    assert_ne!(altered, text);
    fs::write(&flipped, altered).unwrap();
    let stray = dir
        .path()
        .join("models")
        .join("good-b")
        .join(".v2.json.tmp");
    fs::write(&stray, b"{\"format\":\"apportion-mo").unwrap();

    let (registry, problems) = Registry::open(dir.path()).unwrap();
    let mut reported: Vec<PathBuf> = problems.iter().map(|p| p.path.clone()).collect();
    reported.sort();
    let mut expected = vec![truncated, garbage, flipped.clone(), stray.clone()];
    expected.sort();
    assert_eq!(reported, expected, "{problems:#?}");
    let why = |path: &Path| {
        problems
            .iter()
            .find(|p| p.path == path)
            .map(|p| p.reason.clone())
            .unwrap()
    };
    assert!(why(&flipped).contains("digest"), "{}", why(&flipped));
    assert!(why(&stray).contains("temporary"), "{}", why(&stray));

    for id in ["truncated", "garbage", "flipped"] {
        assert!(registry.get(id, 0).is_err(), "{id} must not be served");
    }
    for info in &good {
        assert_eq!(
            as_registered(registry.get(&info.model_id, 0).unwrap().info()),
            as_registered(info)
        );
    }
    assert_eq!(registry.list().len(), 2);
    // The damaged version stays taken.
    assert_eq!(
        registry
            .register(linear_spec("truncated", 36))
            .unwrap()
            .version,
        2
    );
}

/// `text` with the first ASCII digit at or after `from` changed to another
/// digit that keeps the JSON valid (never a new leading zero), so only a
/// digest can notice.
fn bump_digit(text: &str, from: usize) -> String {
    let at = from
        + text[from..]
            .bytes()
            .position(|byte| byte.is_ascii_digit())
            .expect("a digit follows");
    let digit = text.as_bytes()[at];
    let bumped = if digit == b'9' { b'8' } else { digit + 1 };
    let mut altered = text.as_bytes().to_vec();
    altered[at] = bumped;
    String::from_utf8(altered).unwrap()
}

/// The offset just after `key`'s `"key":` in a compact JSON record.
fn after_key(text: &str, key: &str) -> usize {
    let pattern = format!("\"{key}\":");
    text.find(&pattern)
        .unwrap_or_else(|| panic!("{key} in the record"))
        + pattern.len()
}

#[test]
fn every_damaged_byte_of_a_record_is_reported_and_never_served() {
    // Common practice, no source: a record that differs in any way from
    // what was written — cut short, a flipped bit, one digit of a header
    // field or of a background value — must be reported and never served,
    // and must not stop any other record from loading.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let pristine_ids = ["kept-a", "kept-b"];
    registry.register(linear_spec("kept-a", 90)).unwrap();
    registry.register(tree_spec("kept-b", 91)).unwrap();
    let pristine: Vec<ModelInfo> = pristine_ids
        .iter()
        .map(|id| registry.get(id, 0).unwrap().info().clone())
        .collect();
    // One damaged copy per case; each case gets its own model id so the
    // reports can be told apart.
    type Damage = Box<dyn Fn(&str) -> Vec<u8>>;
    let mut cases: Vec<(String, Damage)> = Vec::new();
    for fraction in [0.0, 0.01, 0.25, 0.5, 0.75, 0.999] {
        cases.push((
            format!("cut-{}", (fraction * 1000.0) as u32),
            Box::new(move |text: &str| {
                let keep = ((text.len() as f64) * fraction) as usize;
                text.as_bytes()[..keep.min(text.len() - 1)].to_vec()
            }),
        ));
    }
    for fraction in [0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 0.99] {
        // Bit 0 flipped: a digit becomes another digit, a letter another
        // letter, punctuation something else.
        cases.push((
            format!("flip-{}", (fraction * 100.0) as u32),
            Box::new(move |text: &str| {
                let mut bytes = text.as_bytes().to_vec();
                let at = (((bytes.len() - 1) as f64) * fraction) as usize;
                bytes[at] ^= 1;
                bytes
            }),
        ));
    }
    for key in ["row_cost_ns", "registered_unix_ms", "values", "intercept"] {
        cases.push((
            format!("digit-{}", key.replace('_', "-")),
            Box::new(move |text: &str| bump_digit(text, after_key(text, key)).into_bytes()),
        ));
    }
    // The last digit of the registration time: a shift of milliseconds.
    cases.push((
        "digit-last-ms".to_string(),
        Box::new(|text: &str| {
            let start = after_key(text, "registered_unix_ms");
            let end = start
                + text[start..]
                    .bytes()
                    .position(|byte| !byte.is_ascii_digit())
                    .unwrap();
            bump_digit(text, end - 1).into_bytes()
        }),
    ));
    for (id, _) in &cases {
        registry.register(linear_spec(id, 92)).unwrap();
    }
    drop(registry);

    let mut damaged = Vec::new();
    for (id, damage) in &cases {
        let path = record_path(dir.path(), id, 1);
        let text = fs::read_to_string(&path).unwrap();
        let altered = damage(&text);
        assert_ne!(
            altered,
            text.as_bytes(),
            "{id}: the damage changes the file"
        );
        fs::write(&path, altered).unwrap();
        damaged.push(path);
    }

    let (registry, problems) = Registry::open(dir.path()).unwrap();
    let mut reported: Vec<PathBuf> = problems.iter().map(|p| p.path.clone()).collect();
    reported.sort();
    damaged.sort();
    assert_eq!(reported, damaged, "{problems:#?}");
    for problem in &problems {
        let name = problem.path.display().to_string();
        if name.contains("digit-") {
            // Still valid JSON with a plausible value: only the digest
            // tells.
            assert!(problem.reason.contains("digest"), "{problem}");
        }
    }
    for (id, _) in &cases {
        assert!(registry.get(id, 0).is_err(), "{id} must not be served");
    }
    for info in &pristine {
        assert_eq!(
            as_registered(registry.get(&info.model_id, 0).unwrap().info()),
            as_registered(info)
        );
    }
    assert_eq!(registry.list().len(), pristine.len());
}

#[test]
fn invalid_registrations_name_the_field_and_leave_nothing_behind() {
    // Common practice, no source: refuse before any effect, and say which
    // field to fix.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let base = linear_spec("valid", 41);
    let trees = tree_spec("valid", 42);
    let with = |change: &dyn Fn(&mut ModelSpec)| {
        let mut spec = base.clone();
        change(&mut spec);
        spec
    };
    let with_tree = |change: &dyn Fn(&mut TreeBody)| {
        let mut spec = trees.clone();
        if let ModelBody::Trees { trees, .. } = &mut spec.model {
            change(&mut trees[1]);
        }
        spec
    };
    let cases: Vec<(&str, ModelSpec)> = vec![
        ("model_id", with(&|s| s.model_id.clear())),
        ("model_id", with(&|s| s.model_id = "rent/v1".to_string())),
        ("model_id", with(&|s| s.model_id = "..".to_string())),
        ("model_id", with(&|s| s.model_id = "x".repeat(129))),
        (
            "background.cols",
            with(&|s| {
                s.background.cols = 2;
                s.background.values.truncate(s.background.rows * 2);
            }),
        ),
        (
            "background.values",
            with(&|s| s.background.values[4] = f64::NAN),
        ),
        (
            "background.values",
            with(&|s| {
                s.background.values.pop();
            }),
        ),
        (
            "background.rows",
            with(&|s| {
                s.background.rows = 0;
                s.background.values.clear();
            }),
        ),
        ("background.rows", with(&|s| s.background.rows = 100_001)),
        ("features", with(&|s| s.features.clear())),
        (
            "features.name",
            with(&|s| s.features[2].name = "f0".to_string()),
        ),
        (
            "features.reason_text",
            with(&|s| {
                s.features[0].group = "g".to_string();
                s.features[1].group = "g".to_string();
                s.features[1].reason_code = s.features[0].reason_code.clone();
            }),
        ),
        (
            "linear.weights",
            with(&|s| {
                s.model = ModelBody::Linear {
                    weights: vec![1.0, 2.0],
                    intercept: 0.0,
                }
            }),
        ),
        (
            "linear.weights",
            with(&|s| {
                s.model = ModelBody::Linear {
                    weights: vec![1.0, f64::NAN, 2.0],
                    intercept: 0.0,
                }
            }),
        ),
        // Finite weights whose outputs overflow on the background: nothing
        // could be attributed.
        (
            "model",
            with(&|s| {
                s.model = ModelBody::Linear {
                    weights: vec![1e308; 3],
                    intercept: 0.0,
                }
            }),
        ),
        ("trees.left", with_tree(&|t| t.right[2] = 5)),
        ("trees.left", with_tree(&|t| t.left[2] = 0)),
        ("trees.feature", with_tree(&|t| t.feature[0] = 3)),
        // A leaf's threshold is never read, but it is persisted.
        (
            "trees.threshold",
            with_tree(&|t| t.threshold[3] = f64::INFINITY),
        ),
        ("trees.value", with_tree(&|t| t.value[4] = f64::NAN)),
        // Trees take missing values in their background, never infinities.
        ("background.values", {
            let mut spec = trees.clone();
            spec.background.values[5] = f64::NEG_INFINITY;
            spec
        }),
        (
            "description",
            with(&|s| s.description = "x".repeat(65 * 1024)),
        ),
    ];
    for (field, spec) in cases {
        let error = registry.register(spec).unwrap_err();
        assert_eq!(error.field(), Some(field), "{error}");
        assert!(
            error.to_string().starts_with(field),
            "the message names the field: {error}"
        );
    }
    assert!(registry.list().is_empty());
    assert!(files_under(&dir.path().join("models")).is_empty());
    drop(registry);
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty() && registry.list().is_empty());
    // The valid base really is valid, so the cases above fail for their
    // change alone.
    assert_eq!(registry.register(base).unwrap().version, 1);
    assert_eq!(registry.register(trees).unwrap().version, 2);
}

#[test]
fn a_missing_background_value_is_stored_as_null() {
    // The record layout in the registry module: JSON has no NaN, so a
    // missing background value is written as null and read back as NaN.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let spec = tree_with_missing_background("history", 61);
    let info = registry.register(spec.clone()).unwrap();
    let text = fs::read_to_string(record_path(dir.path(), "history", info.version)).unwrap();
    let record: serde_json::Value = serde_json::from_str(&text).unwrap();
    let stored = record["spec"]["background"]["values"].as_array().unwrap();
    for (value, original) in stored.iter().zip(&spec.background.values) {
        if original.is_nan() {
            assert!(value.is_null(), "{value}");
        } else {
            assert_eq!(value.as_f64(), Some(*original));
        }
    }
    assert_eq!(info.checksum, spec_checksum(&spec).unwrap());
}

#[test]
fn the_checksum_depends_on_the_content_only() {
    // Definition in the registry module: lower-case hex sha256 of the spec's
    // compact JSON. Recomputed here from that definition.
    let spec = linear_spec("rent", 51);
    let expected: String = Sha256::digest(serde_json::to_vec(&spec).unwrap())
        .iter()
        .map(|byte| format!("{byte:02x}"))
        .collect();
    assert_eq!(spec_checksum(&spec).unwrap(), expected);
    assert_eq!(spec_checksum(&spec.clone()).unwrap(), expected);

    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let first = registry.register(spec.clone()).unwrap();
    let second = registry.register(spec.clone()).unwrap();
    assert_eq!(first.checksum, expected);
    assert_eq!(second.checksum, expected);
    assert_eq!(
        spec_checksum(&registry.get("rent", 2).unwrap().spec()).unwrap(),
        expected
    );

    // One unit in the last place of one weight.
    let mut changed = spec.clone();
    if let ModelBody::Linear { weights, .. } = &mut changed.model {
        weights[1] = f64::from_bits(weights[1].to_bits() + 1);
    }
    assert_ne!(spec_checksum(&changed).unwrap(), expected);
    assert_ne!(registry.register(changed).unwrap().checksum, expected);
}

/// A record as the registry wrote it before specs could say where an
/// imported model came from: compact JSON, spec fields in declaration order,
/// no `imported` member. Written out by hand so the check does not depend on
/// today's serialisation.
const RECORD_WITHOUT_IMPORT_SPEC: &str = concat!(
    r#"{"model_id":"legacy","features":["#,
    r#"{"name":"income","group":"","reason_code":"R1","reason_text":"income is low"},"#,
    r#"{"name":"debt","group":"","reason_code":"","reason_text":""}],"#,
    r#""model":{"kind":"trees","trees":[{"feature":[1,-1,-1],"threshold":[0.25,0.0,0.0],"#,
    r#""left":[1,-1,-1],"right":[2,-1,-1],"value":[0.0,-1.5,2.0],"missing_left":[true,false,false]}],"#,
    r#""base_score":0.125},"link":"logistic","#,
    r#""background":{"rows":2,"cols":2,"values":[1.0,null,-0.5,3.0]},"#,
    r#""description":"written before imports were recorded"}"#
);

#[test]
fn a_record_written_without_the_import_field_loads_unchanged() {
    // The record layout in the registry module, as written before the
    // `imported` member existed: it must load as a native model, keep its
    // checksum, and serialise back to the very same bytes (the serde
    // default and skip; common practice, no source).
    let spec_text = RECORD_WITHOUT_IMPORT_SPEC;
    let checksum: String = Sha256::digest(spec_text.as_bytes())
        .iter()
        .map(|byte| format!("{byte:02x}"))
        .collect();
    let dir = tempfile::tempdir().unwrap();
    let path = record_path(dir.path(), "legacy", 1);
    fs::create_dir_all(path.parent().unwrap()).unwrap();
    fs::write(
        &path,
        format!(
            r#"{{"format":"apportion-model","format_version":1,"model_id":"legacy","version":1,"checksum":"{checksum}","registered_unix_ms":1764000000000,"row_cost_ns":40.0,"spec":{spec_text}}}"#
        ),
    )
    .unwrap();

    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");
    let entry = registry.get("legacy", 1).unwrap();
    assert_eq!(entry.info().imported, None);
    assert_eq!(entry.info().checksum, checksum);
    assert_eq!(entry.info().model_kind, "trees");
    let spec = entry.spec();
    assert_eq!(spec.imported, None);
    assert_eq!(serde_json::to_string(&spec).unwrap(), spec_text);
    assert_eq!(spec_checksum(&spec).unwrap(), checksum);

    // Registered again today, the same spec gets the same checksum and a
    // record with no `imported` member.
    let again = registry.register(spec).unwrap();
    assert_eq!(again.checksum, checksum);
    let text = fs::read_to_string(record_path(dir.path(), "legacy", again.version)).unwrap();
    let record: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert!(record["spec"].get("imported").is_none(), "{text}");

    // The open rewrote the format-1 record as format 2, sealed with a
    // record digest over the header it had, so a later change to it shows.
    drop(registry);
    let upgraded_path = record_path(dir.path(), "legacy", 1);
    let upgraded = fs::read_to_string(&upgraded_path).unwrap();
    let record: serde_json::Value = serde_json::from_str(&upgraded).unwrap();
    assert_eq!(record["format_version"], 2, "{upgraded}");
    assert_eq!(record["checksum"], checksum.as_str());
    assert_eq!(record["registered_unix_ms"], 1764000000000u64);
    assert_eq!(record["row_cost_ns"], 40.0);
    assert_eq!(record["record_digest"].as_str().map(str::len), Some(64));
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");
    assert_eq!(registry.get("legacy", 1).unwrap().info().checksum, checksum);
    drop(registry);
    fs::write(&upgraded_path, upgraded.replace(":40.0,", ":41.0,")).unwrap();
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert_eq!(problems.len(), 1, "{problems:?}");
    assert!(problems[0].reason.contains("digest"), "{problems:?}");
    assert!(registry.get("legacy", 1).is_err());
}

#[test]
fn import_provenance_is_stored_with_the_record_and_only_on_trees() {
    // The record layout in the registry module: `imported` is part of the
    // spec, so of its checksum, and comes back after a restart.
    let dir = tempfile::tempdir().unwrap();
    let imported = ImportSpec {
        format: ImportFormat::LightgbmText,
        objective: "binary sigmoid:1".to_string(),
        class_index: 1,
        output: String::new(),
    };
    let mut spec = tree_spec("imported", 71);
    spec.imported = Some(imported.clone());
    let info = {
        let (registry, _) = Registry::open(dir.path()).unwrap();
        let info = registry.register(spec.clone()).unwrap();
        assert_eq!(info.imported.as_ref(), Some(&imported));
        assert_ne!(
            info.checksum,
            spec_checksum(&tree_spec("imported", 71)).unwrap(),
            "the provenance is part of the content"
        );
        info
    };
    let text = fs::read_to_string(record_path(dir.path(), "imported", 1)).unwrap();
    let record: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert_eq!(
        record["spec"]["imported"],
        serde_json::json!({"format": "lightgbm_text", "objective": "binary sigmoid:1", "class_index": 1})
    );
    let (registry, problems) = Registry::open(dir.path()).unwrap();
    assert!(problems.is_empty(), "{problems:?}");
    let reopened = registry.get("imported", 1).unwrap();
    assert_eq!(as_registered(reopened.info()), as_registered(&info));
    assert_eq!(reopened.spec(), spec);

    // Library files give trees, and only ONNX graphs give linear models:
    // LightGBM provenance on a linear model is refused, ONNX's is kept.
    let mut linear = linear_spec("not-imported", 72);
    linear.imported = Some(imported);
    match registry.register(linear) {
        Err(RegistryError::Invalid(error)) => assert_eq!(error.field, "imported"),
        other => panic!("expected a refusal naming `imported`, got {other:?}"),
    }
    assert!(registry.get("not-imported", 0).is_err());
    let mut from_onnx = linear_spec("from-onnx", 73);
    from_onnx.imported = Some(ImportSpec {
        format: ImportFormat::Onnx,
        objective: "LinearRegressor post_transform=NONE after Scaler".to_string(),
        class_index: 0,
        output: "variable".to_string(),
    });
    let info = registry.register(from_onnx.clone()).unwrap();
    assert_eq!(info.imported, from_onnx.imported);
}

#[test]
fn concurrent_registrations_get_distinct_versions() {
    // Common practice, no source: the write path is serialised, so no two
    // registrations of one model id share a version.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    let registry = Arc::new(registry);
    let mut versions: Vec<u64> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..2u64)
            .map(|worker| {
                let registry = Arc::clone(&registry);
                scope.spawn(move || {
                    (0..6)
                        .map(|i| {
                            registry
                                .register(linear_spec("rent", worker * 100 + i))
                                .unwrap()
                                .version
                        })
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        workers
            .into_iter()
            .flat_map(|worker| worker.join().unwrap())
            .collect()
    });
    versions.sort();
    assert_eq!(versions, (1..=12).collect::<Vec<_>>());
    assert_eq!(registry.list().len(), 12);
}

#[test]
fn a_data_directory_is_held_by_one_registry_at_a_time() {
    // Common practice, no source: two processes assigning versions in one
    // directory would collide.
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    assert!(matches!(
        Registry::open(dir.path()),
        Err(RegistryError::InUse { .. })
    ));
    drop(registry);
    assert!(Registry::open(dir.path()).is_ok());
}

#[test]
fn the_default_data_directory_follows_the_xdg_rules() {
    // XDG Base Directory Specification (freedesktop.org): $XDG_DATA_HOME,
    // else $HOME/.local/share; relative or empty values are ignored.
    let os = |s: &str| Some(OsString::from(s));
    assert_eq!(
        data_dir_from(os("/data"), os("/home/ana")),
        Some(PathBuf::from("/data/apportion"))
    );
    assert_eq!(
        data_dir_from(None, os("/home/ana")),
        Some(PathBuf::from("/home/ana/.local/share/apportion"))
    );
    assert_eq!(
        data_dir_from(os(""), os("/home/ana")),
        Some(PathBuf::from("/home/ana/.local/share/apportion"))
    );
    assert_eq!(
        data_dir_from(os("relative/dir"), os("/home/ana")),
        Some(PathBuf::from("/home/ana/.local/share/apportion"))
    );
    assert_eq!(data_dir_from(None, None), None);
}
