//! ONNX models over real gRPC: a linear graph built here from the ONNX
//! operator definitions (MatMul, Add: onnx.ai operator documentation) must
//! give the same attributions as the same weights registered as a linear
//! model, and the closed form; it must survive a restart; and graphs that
//! cannot be used are refused naming the field. scikit-learn models
//! exported with skl2onnx must predict as onnxruntime does (committed
//! fixtures); `.ci/grpcio-check` repeats that live and adds Shapley values
//! computed from their definition with onnxruntime as the evaluator.

#![cfg(feature = "onnx")]

mod support;

use apportion::service::proto::{self, register_model_request::Model};
use prost_011::Message;
use tract_onnx::pb;
use tract_onnx::pb::tensor_shape_proto::{Dimension, dimension};
use tract_onnx::pb::type_proto;

const FLOAT: i32 = pb::tensor_proto::DataType::Float as i32;
const DOUBLE: i32 = pb::tensor_proto::DataType::Double as i32;

fn value_info(name: &str, elem_type: i32, dims: &[Option<i64>]) -> pb::ValueInfoProto {
    pb::ValueInfoProto {
        name: name.into(),
        r#type: Some(pb::TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type,
                shape: Some(pb::TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|d| Dimension {
                            value: Some(match d {
                                Some(size) => dimension::Value::DimValue(*size),
                                None => dimension::Value::DimParam("N".into()),
                            }),
                            ..Default::default()
                        })
                        .collect(),
                }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn initializer(name: &str, elem_type: i32, dims: &[i64], values: &[f64]) -> pb::TensorProto {
    let mut tensor = pb::TensorProto {
        name: name.into(),
        data_type: elem_type,
        dims: dims.to_vec(),
        ..Default::default()
    };
    if elem_type == DOUBLE {
        tensor.double_data = values.to_vec();
    } else {
        tensor.float_data = values.iter().map(|&v| v as f32).collect();
    }
    tensor
}

fn node(op: &str, inputs: &[&str], output: &str) -> pb::NodeProto {
    pb::NodeProto {
        op_type: op.into(),
        name: output.into(),
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: vec![output.into()],
        ..Default::default()
    }
}

/// y = x · w + b as an ONNX graph: input `x` [N, p], output `y` [N, 1].
fn linear_graph(weights: &[f64], intercept: f64, elem_type: i32) -> Vec<u8> {
    let p = weights.len() as i64;
    let graph = pb::GraphProto {
        name: "linear".into(),
        node: vec![
            node("MatMul", &["x", "w"], "xw"),
            node("Add", &["xw", "b"], "y"),
        ],
        initializer: vec![
            initializer("w", elem_type, &[p, 1], weights),
            initializer("b", elem_type, &[1], &[intercept]),
        ],
        input: vec![value_info("x", elem_type, &[None, Some(p)])],
        output: vec![value_info("y", elem_type, &[None, Some(1)])],
        ..Default::default()
    };
    pb::ModelProto {
        ir_version: 7,
        opset_import: vec![pb::OperatorSetIdProto {
            domain: String::new(),
            version: 13,
        }],
        graph: Some(graph),
        ..Default::default()
    }
    .encode_to_vec()
}

const WEIGHTS: [f64; 4] = [0.75, -1.25, 0.5, 2.0];
const INTERCEPT: f64 = -0.3;

fn background() -> proto::Matrix {
    let rows = 16;
    proto::Matrix {
        rows,
        cols: 4,
        values: (0..rows * 4)
            .map(|k| ((k * 37 % 23) as f64) / 7.0 - 1.5)
            .collect(),
    }
}

fn request(model_id: &str, model: Model) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: ["income", "arrears", "tenure", "savings"]
            .iter()
            .map(|name| proto::Feature {
                name: name.to_string(),
                ..Default::default()
            })
            .collect(),
        model: Some(model),
        link: proto::Link::Logistic as i32,
        background: Some(background()),
        ..Default::default()
    }
}

fn explain_request(
    model_id: &str,
    removal: proto::Removal,
    target: proto::Target,
) -> proto::ExplainRequest {
    proto::ExplainRequest {
        model_id: model_id.into(),
        instance: vec![1.5, -0.5, 2.0, 0.25],
        removal: removal as i32,
        target: target as i32,
        label: (target == proto::Target::Loss).then_some(1.0),
        seed: 5,
        ..Default::default()
    }
}

#[tokio::test]
async fn an_onnx_linear_graph_is_explained_like_the_same_linear_model() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let mut checksums = Vec::new();
    for (model_id, elem_type) in [("onnx", DOUBLE), ("onnx-float", FLOAT)] {
        let graph = linear_graph(&WEIGHTS, INTERCEPT, elem_type);
        let info = registry
            .register_model(request(model_id, Model::Onnx(graph)))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(info.model_kind, "onnx-graph");
        checksums.push(info.checksum);
    }
    registry
        .register_model(request(
            "linear",
            Model::Linear(proto::LinearModel {
                weights: WEIGHTS.to_vec(),
                intercept: INTERCEPT,
            }),
        ))
        .await
        .unwrap();

    let mut attributions = server.attributions_client();
    let background = background();
    let mean: Vec<f64> = (0..4)
        .map(|j| {
            (0..background.rows as usize)
                .map(|i| background.values[i * 4 + j])
                .sum::<f64>()
                / f64::from(background.rows)
        })
        .collect();
    // Shapley values of a linear model under marginal removal, raw output:
    // w_j (x_j − mean_j) ("Explaining prediction models and individual
    // predictions with feature contributions", Knowledge and Information
    // Systems, 2014).
    let marginal = attributions
        .explain(explain_request(
            "onnx",
            proto::Removal::Marginal,
            proto::Target::Output,
        ))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(marginal.estimator_used, proto::Estimator::Exact as i32);
    let x = [1.5, -0.5, 2.0, 0.25];
    for (j, a) in marginal.attributions.iter().enumerate() {
        let expected = WEIGHTS[j] * (x[j] - mean[j]);
        assert!(
            (a.value - expected).abs() < 1e-12,
            "{j}: {} vs {expected}",
            a.value
        );
    }

    // Every removal and target, against the linear model (exact enumeration
    // on both sides: 16 coalitions).
    for removal in [
        proto::Removal::Marginal,
        proto::Removal::Fixed,
        proto::Removal::Independent,
        proto::Removal::ConditionalGaussian,
        proto::Removal::ConditionalNeighbors,
    ] {
        for target in [
            proto::Target::Output,
            proto::Target::Probability,
            proto::Target::Loss,
        ] {
            let mut reference = explain_request("linear", removal, target);
            reference.estimator = proto::Estimator::Exact as i32;
            let reference = attributions.explain(reference).await.unwrap().into_inner();
            for (model_id, tolerance) in [("onnx", 1e-12), ("onnx-float", 1e-5)] {
                let got = attributions
                    .explain(explain_request(model_id, removal, target))
                    .await
                    .unwrap()
                    .into_inner();
                for (a, b) in got.attributions.iter().zip(&reference.attributions) {
                    assert!(
                        (a.value - b.value).abs() < tolerance,
                        "{model_id} {removal:?} {target:?} {}: {} vs {}",
                        a.name,
                        a.value,
                        b.value
                    );
                }
            }
        }
    }
    server.stop().await;

    // The graph comes back after a restart, checksum and answers unchanged.
    let server = support::start(dir.path()).await;
    let again = server
        .registry_client()
        .get_model(proto::GetModelRequest {
            model_id: "onnx".into(),
            version: 0,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(again.checksum, checksums[0]);
    let repeated = server
        .attributions_client()
        .explain(explain_request(
            "onnx",
            proto::Removal::Marginal,
            proto::Target::Output,
        ))
        .await
        .unwrap()
        .into_inner();
    let values = |e: &proto::Explanation| {
        e.attributions
            .iter()
            .map(|a| a.value.to_bits())
            .collect::<Vec<_>>()
    };
    assert_eq!(values(&repeated), values(&marginal));
    server.stop().await;
}

#[tokio::test]
async fn unusable_graphs_are_refused_naming_the_field() {
    let dir = tempfile::tempdir().unwrap();
    let server = support::start(dir.path()).await;
    let mut registry = server.registry_client();
    let graph = linear_graph(&WEIGHTS, INTERCEPT, DOUBLE);
    let mut wrong_column = request("bad", Model::Onnx(graph.clone()));
    wrong_column.onnx_output_column = 1;
    let mut wrong_output = request("bad", Model::Onnx(graph.clone()));
    wrong_output.onnx_output = "probabilities".into();
    let cases = [
        ("onnx", request("bad", Model::Onnx(b"not a graph".to_vec()))),
        // A graph declared [batch, 3] for four registered features.
        (
            "features",
            request("bad", Model::Onnx(linear_graph(&WEIGHTS[..3], 0.0, DOUBLE))),
        ),
        ("onnx_output_column", wrong_column),
        ("onnx_output", wrong_output),
    ];
    for (field, bad) in cases {
        let status = registry.register_model(bad).await.unwrap_err();
        assert_eq!(status.code(), tonic::Code::InvalidArgument, "{status:?}");
        assert!(
            status.message().starts_with(field),
            "{field}: {}",
            status.message()
        );
    }
    // Nothing was kept, and the server still serves.
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await
        .unwrap()
        .into_inner();
    assert!(listed.models.is_empty());
    registry
        .register_model(request("good", Model::Onnx(graph)))
        .await
        .unwrap();
    server.stop().await;
}

/// scikit-learn models on its bundled data sets, exported with skl2onnx,
/// with onnxruntime's outputs on 40 rows (`tests/fixtures/onnx`, made by
/// `tests/fixtures/make_fixtures.py`): tract's outputs must match to 1e-6 relative.
#[test]
fn exported_scikit_learn_models_predict_as_onnxruntime_does() {
    use apportion::registry::{Background, FeatureSpec, LinkSpec, ModelBody, ModelSpec, Registry};

    let fixtures = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/onnx");
    let dir = tempfile::tempdir().unwrap();
    let (registry, _) = Registry::open(dir.path()).unwrap();
    for name in ["breast_cancer_forest", "diabetes_network"] {
        let reference: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(fixtures.join(format!("{name}.json"))).unwrap(),
        )
        .unwrap();
        let features = reference["features"].as_u64().unwrap() as usize;
        let rows: Vec<Vec<f64>> = serde_json::from_value(reference["rows"].clone()).unwrap();
        let expected: Vec<f64> = serde_json::from_value(reference["onnxruntime"].clone()).unwrap();
        let spec = ModelSpec {
            model_id: name.replace('_', "-"),
            features: (0..features)
                .map(|j| FeatureSpec {
                    name: format!("x{j}"),
                    group: String::new(),
                    reason_code: String::new(),
                    reason_text: String::new(),
                })
                .collect(),
            model: ModelBody::Onnx {
                graph: std::fs::read(fixtures.join(format!("{name}.onnx"))).unwrap(),
                output: reference["output"].as_str().unwrap().to_string(),
                column: reference["column"].as_u64().unwrap() as usize,
            },
            link: LinkSpec::Identity,
            background: Background {
                rows: rows.len(),
                cols: features,
                values: rows.iter().flatten().copied().collect(),
            },
            description: String::new(),
            imported: None,
            decision: None,
        };
        let info = registry.register(spec).unwrap();
        let entry = registry.get(&info.model_id, info.version).unwrap();
        let mut got = vec![0.0; rows.len()];
        entry.model().predict(entry.background(), &mut got);
        for (row, (a, b)) in got.iter().zip(&expected).enumerate() {
            assert!(
                (a - b).abs() <= 1e-6 * b.abs().max(f64::MIN_POSITIVE),
                "{name} row {row}: tract {a} vs onnxruntime {b}"
            );
        }
    }
}
