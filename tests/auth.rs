//! Bearer tokens with roles over real loopback gRPC: every role × RPC gives
//! the documented status (UNAUTHENTICATED without a known token,
//! PERMISSION_DENIED for a role that may not, as gRPC's status code table
//! in the grpc.io documentation describes the two), health and reflection
//! stay open, and a token file with a bad line stops the server at start
//! naming the line.

mod support;

use std::process::Command;

use apportion::service::Config;
use apportion::service::auth::digest_line;
use apportion::service::proto::{self, register_model_request::Model};
use tonic::metadata::MetadataValue;
use tonic::{Code, Request};

const ADMIN: &str = "admin-token-7f3a";
const EXPLAIN: &str = "explain-token-91c2";
const MONITOR: &str = "monitor-token-05be";

fn with_token<T>(message: T, token: Option<&str>) -> Request<T> {
    let mut request = Request::new(message);
    if let Some(token) = token {
        request.metadata_mut().insert(
            "authorization",
            MetadataValue::try_from(format!("Bearer {token}")).unwrap(),
        );
    }
    request
}

fn linear(model_id: &str) -> proto::RegisterModelRequest {
    proto::RegisterModelRequest {
        model_id: model_id.into(),
        features: ["a", "b"]
            .iter()
            .map(|n| proto::Feature {
                name: n.to_string(),
                ..Default::default()
            })
            .collect(),
        model: Some(Model::Linear(proto::LinearModel {
            weights: vec![1.0, -2.0],
            intercept: 0.5,
        })),
        background: Some(proto::Matrix {
            rows: 2,
            cols: 2,
            values: vec![0.0, 1.0, 2.0, 3.0],
        }),
        ..Default::default()
    }
}

fn code<T>(result: Result<tonic::Response<T>, tonic::Status>) -> Code {
    match result {
        Ok(_) => Code::Ok,
        Err(status) => {
            assert!(
                !status.message().contains("token-"),
                "a token leaked into a message: {status:?}"
            );
            status.code()
        }
    }
}

#[tokio::test]
async fn every_role_and_rpc_gets_the_documented_status() {
    let dir = tempfile::tempdir().unwrap();
    let tokens = dir.path().join("tokens");
    std::fs::write(
        &tokens,
        format!(
            "# test tokens\n{} admin ops\n{} explain scoring\n{} monitor dashboards\n",
            digest_line(ADMIN),
            digest_line(EXPLAIN),
            digest_line(MONITOR)
        ),
    )
    .unwrap();
    let server = support::start_with(Config {
        data_dir: Some(dir.path().join("registry")),
        compute_threads: 2,
        tokens_file: Some(tokens),
        ..Config::default()
    })
    .await;
    let mut registry = server.registry_client();
    let mut attributions = server.attributions_client();
    let mut diagnostics = proto::diagnostics_client::DiagnosticsClient::new(server.channel.clone());
    let mut monitoring = proto::monitoring_client::MonitoringClient::new(server.channel.clone());
    registry
        .register_model(with_token(linear("shared"), Some(ADMIN)))
        .await
        .unwrap();

    // (token, register, get, list, explain, echo, drift, delete): the table
    // in the README, "Running it in production". Drift finds answers: the
    // admin's explain comes first.
    let ok = Code::Ok;
    let denied = Code::PermissionDenied;
    let unknown = Code::Unauthenticated;
    let table = [
        (Some(ADMIN), [ok, ok, ok, ok, ok, ok, ok]),
        (Some(EXPLAIN), [denied, ok, ok, ok, ok, ok, denied]),
        (Some(MONITOR), [denied, ok, ok, denied, ok, ok, denied]),
        (Some("not-a-known-token-x"), [unknown; 7]),
        (None, [unknown; 7]),
    ];
    for (round, (token, expected)) in table.into_iter().enumerate() {
        let id = format!("m{round}");
        let got = [
            code(
                registry
                    .register_model(with_token(linear(&id), token))
                    .await,
            ),
            code(
                registry
                    .get_model(with_token(
                        proto::GetModelRequest {
                            model_id: "shared".into(),
                            version: 0,
                        },
                        token,
                    ))
                    .await,
            ),
            code(
                registry
                    .list_models(with_token(proto::ListModelsRequest {}, token))
                    .await,
            ),
            code(
                attributions
                    .explain(with_token(
                        proto::ExplainRequest {
                            model_id: "shared".into(),
                            instance: vec![1.0, 2.0],
                            ..Default::default()
                        },
                        token,
                    ))
                    .await,
            ),
            code(
                diagnostics
                    .echo(with_token(
                        proto::EchoRequest {
                            payload: b"x".to_vec(),
                        },
                        token,
                    ))
                    .await,
            ),
            code(
                monitoring
                    .attribution_drift(with_token(
                        proto::AttributionDriftRequest {
                            model_id: "shared".into(),
                            ..Default::default()
                        },
                        token,
                    ))
                    .await,
            ),
            code(
                registry
                    .delete_model(with_token(
                        proto::DeleteModelRequest {
                            model_id: id.clone(),
                            version: 0,
                        },
                        token,
                    ))
                    .await,
            ),
        ];
        // Only an admin registered `id`, so its delete is the one that
        // finds something; others are refused before looking.
        assert_eq!(got, expected, "token {token:?}");
    }

    // Health stays open without a token.
    let mut health = tonic_health::pb::health_client::HealthClient::new(server.channel.clone());
    let status = health
        .check(tonic_health::pb::HealthCheckRequest {
            service: String::new(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        status.status,
        tonic_health::pb::health_check_response::ServingStatus::Serving as i32
    );
    server.stop().await;
}

#[test]
fn a_token_file_with_a_bad_line_stops_the_server_naming_the_line() {
    let dir = tempfile::tempdir().unwrap();
    let tokens = dir.path().join("tokens");
    std::fs::write(
        &tokens,
        format!("{} admin ops\nplain-token admin oops\n", digest_line(ADMIN)),
    )
    .unwrap();
    let output = Command::new(env!("CARGO_BIN_EXE_apportion"))
        .args([
            "serve",
            "--plaintext",
            "--address",
            "127.0.0.1:0",
            "--metrics-address",
            "127.0.0.1:0",
        ])
        .arg("--data-dir")
        .arg(dir.path().join("registry"))
        .arg("--tokens-file")
        .arg(&tokens)
        .output()
        .unwrap();
    assert!(!output.status.success());
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.contains("line 2"), "{stderr}");
    assert!(
        !stderr.contains("plain-token"),
        "the line's token is not echoed: {stderr}"
    );
}

#[test]
fn hash_token_prints_the_digest_line() {
    use std::io::Write;
    let mut child = Command::new(env!("CARGO_BIN_EXE_apportion"))
        .arg("hash-token")
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    child.stdin.take().unwrap().write_all(b"abc\n").unwrap();
    let output = child.wait_with_output().unwrap();
    // FIPS 180-4 test vector: SHA-256("abc").
    assert_eq!(
        String::from_utf8_lossy(&output.stdout).trim(),
        "sha256:ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    );
}
