//! The binary as operators and scripts use it: `serve` settings from flags,
//! environment and a TOML file, and the thin client (`register`, `models`,
//! `explain`) against a real server on loopback.

use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::Path;
use std::process::{Child, Command, Output};
use std::time::{Duration, Instant};

use serde_json::Value;

/// The binary with none of its settings inherited from the environment.
fn apportion() -> Command {
    let mut command = Command::new(env!("CARGO_BIN_EXE_apportion"));
    for variable in [
        "APPORTION_CONFIG",
        "APPORTION_ADDRESS",
        "APPORTION_DATA_DIR",
        "APPORTION_METRICS_ADDRESS",
        "APPORTION_LOG_FORMAT",
        "APPORTION_DEFAULT_BUDGET_MS",
        "APPORTION_COMPUTE_THREADS",
        "APPORTION_MAX_MESSAGE_MIB",
        "APPORTION_MAX_BUDGET_MS",
        "APPORTION_MAX_EVALUATIONS",
        "APPORTION_MAX_DRAWS",
        "APPORTION_MAX_COALITION_ROWS",
        "APPORTION_MAX_BATCH_INSTANCES",
        "APPORTION_MAX_STREAM_IN_FLIGHT",
        "APPORTION_TOKENS_FILE",
        "APPORTION_TLS_CERT_FILE",
        "APPORTION_TLS_KEY_FILE",
        "APPORTION_TLS_CLIENT_CA_FILE",
        "APPORTION_TLS_POLL_SECONDS",
        "APPORTION_PLAINTEXT",
        "APPORTION_HEALTH_ADDRESS",
        "APPORTION_TLS_CA",
        "APPORTION_TLS_CERT",
        "APPORTION_TLS_KEY",
        "APPORTION_TLS_SERVER_NAME",
        "APPORTION_TOKEN",
        "RUST_LOG",
    ] {
        command.env_remove(variable);
    }
    command
}

fn succeeded(output: Output) -> String {
    let stdout = String::from_utf8_lossy(&output.stdout).into_owned();
    assert!(
        output.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    stdout
}

fn json_lines(stdout: &str) -> Vec<Value> {
    stdout
        .lines()
        .map(|line| serde_json::from_str(line).unwrap())
        .collect()
}

fn free_address() -> SocketAddr {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
}

#[test]
fn flags_beat_the_environment_which_beats_the_file_which_beats_the_defaults() {
    // Common practice for layered settings (no source).
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("apportion.toml");
    std::fs::write(
        &file,
        "address = \"127.0.0.1:7001\"\ncompute_threads = 3\nlog_format = \"json\"\n\
         default_budget_ms = 50\ndata_dir = \"registry\"\nmax_draws = 128\nmax_budget_ms = 9\n",
    )
    .unwrap();
    let output = apportion()
        .args([
            "serve",
            "--print-config",
            "--plaintext",
            "--compute-threads",
            "1",
        ])
        .args(["--max-evaluations", "99", "--max-stream-in-flight", "5"])
        .env("APPORTION_CONFIG", &file)
        .env("APPORTION_ADDRESS", "127.0.0.1:7002")
        .env("APPORTION_COMPUTE_THREADS", "2")
        .env("APPORTION_MAX_BUDGET_MS", "1234")
        .env("APPORTION_MAX_BATCH_INSTANCES", "77")
        .output()
        .unwrap();
    let printed: toml::Table = toml::from_str(&succeeded(output)).unwrap();
    assert_eq!(printed["compute_threads"].as_integer(), Some(1), "flag");
    assert_eq!(printed["address"].as_str(), Some("127.0.0.1:7002"), "env");
    assert_eq!(printed["log_format"].as_str(), Some("json"), "file");
    assert_eq!(printed["default_budget_ms"].as_integer(), Some(50), "file");
    assert_eq!(printed["max_draws"].as_integer(), Some(128), "file");
    assert_eq!(printed["max_budget_ms"].as_integer(), Some(1234), "env");
    assert_eq!(printed["max_evaluations"].as_integer(), Some(99), "flag");
    assert_eq!(
        printed["max_stream_in_flight"].as_integer(),
        Some(5),
        "flag"
    );
    assert_eq!(printed["max_batch_instances"].as_integer(), Some(77), "env");
    let data_dir = dir.path().join("registry");
    assert_eq!(
        printed["data_dir"].as_str(),
        data_dir.to_str(),
        "relative to the file"
    );
    assert_eq!(
        printed["metrics_address"].as_str(),
        Some("127.0.0.1:9464"),
        "default"
    );
    assert_eq!(printed["max_message_mib"].as_integer(), Some(64), "default");
    assert_eq!(printed["plaintext"].as_bool(), Some(true), "flag");

    std::fs::write(&file, "compute_thread = 3\n").unwrap();
    let output = apportion()
        .args(["serve", "--print-config", "--config"])
        .arg(&file)
        .output()
        .unwrap();
    assert!(!output.status.success());
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(stderr.contains("compute_thread"), "{stderr}");
}

#[test]
fn the_shipped_settings_file_is_valid() {
    let shipped = Path::new(env!("CARGO_MANIFEST_DIR")).join("deploy/apportion.toml");
    let output = apportion()
        .args(["serve", "--print-config", "--config"])
        .arg(&shipped)
        .output()
        .unwrap();
    let printed: toml::Table = toml::from_str(&succeeded(output)).unwrap();
    assert_eq!(printed["data_dir"].as_str(), Some("/var/lib/apportion"));
    assert_eq!(printed["log_format"].as_str(), Some("json"));
    assert_eq!(printed["max_budget_ms"].as_integer(), Some(60000));
    assert_eq!(printed["max_evaluations"].as_integer(), Some(4194304));
    assert_eq!(printed["max_draws"].as_integer(), Some(4096));
    assert_eq!(printed["max_coalition_rows"].as_integer(), Some(1048576));
    assert_eq!(
        printed["tokens_file"].as_str(),
        Some("/etc/apportion/tokens")
    );
    assert_eq!(printed["max_batch_instances"].as_integer(), Some(1024));
    assert_eq!(printed["max_stream_in_flight"].as_integer(), Some(16));
    assert_eq!(
        printed["tls_cert_file"].as_str(),
        Some("/etc/apportion/tls/tls.crt")
    );
    assert_eq!(
        printed["tls_key_file"].as_str(),
        Some("/etc/apportion/tls/tls.key")
    );
    assert_eq!(printed["plaintext"].as_bool(), Some(false));
}

/// A server started from a config file, killed when dropped.
struct Server {
    child: Child,
    address: SocketAddr,
}

impl Server {
    fn start(dir: &Path) -> Server {
        let address = free_address();
        let config = dir.join("serve.toml");
        std::fs::write(
            &config,
            format!(
                "address = \"{address}\"\nmetrics_address = \"{}\"\ndata_dir = \"registry\"\nlog_filter = \"warn\"\nplaintext = true\n",
                free_address()
            ),
        )
        .unwrap();
        let child = apportion()
            .args(["serve", "--config"])
            .arg(&config)
            .spawn()
            .unwrap();
        let started = Instant::now();
        while TcpStream::connect(address).is_err() {
            assert!(
                started.elapsed() < Duration::from_secs(60),
                "the server never listened"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        Server { child, address }
    }

    fn client(&self, command: &str) -> Command {
        let mut client = apportion();
        client.args([command, "--address", &self.address.to_string()]);
        client
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

#[test]
fn the_thin_client_registers_lists_and_explains() {
    let dir = tempfile::tempdir().unwrap();
    let server = Server::start(dir.path());

    // A logistic model with its background inline.
    let weights = [0.8, -1.5, 0.25];
    let background = [[1.0, 2.0, 3.0], [3.0, 0.0, 1.0], [2.0, 1.0, -1.0]];
    let linear = dir.path().join("linear.json");
    std::fs::write(
        &linear,
        serde_json::json!({
            "model_id": "screening",
            "link": "logistic",
            "features": [
                {"name": "income", "reason_code": "R1", "reason_text": "Income is low"},
                {"name": "arrears"},
                {"name": "tenure"},
            ],
            "model": {"kind": "linear", "weights": weights, "intercept": -0.5},
            "background": background,
        })
        .to_string(),
    )
    .unwrap();
    let registered = json_lines(&succeeded(
        server
            .client("register")
            .arg("--model")
            .arg(&linear)
            .output()
            .unwrap(),
    ));
    assert_eq!(registered[0]["model_id"], "screening");
    assert_eq!(registered[0]["version"], 1);
    assert_eq!(registered[0]["background_rows"], 3);

    // A one-split tree whose background comes from a CSV file with a
    // missing cell, under another id.
    let trees = dir.path().join("trees.json");
    std::fs::write(
        &trees,
        serde_json::json!({
            "features": [{"name": "income"}, {"name": "arrears"}],
            "model": {"kind": "trees", "base_score": 0.5, "trees": [{
                "feature": [1, -1, -1], "threshold": [0.5, 0.0, 0.0],
                "left": [1, -1, -1], "right": [2, -1, -1], "value": [0.0, 1.0, -1.0],
                "missing_left": [false, false, false],
            }]},
        })
        .to_string(),
    )
    .unwrap();
    let csv = dir.path().join("background.csv");
    std::fs::write(&csv, "income,arrears\n1,0\n2,\n3,1\n").unwrap();
    let registered = json_lines(&succeeded(
        server
            .client("register")
            .args(["--model-id", "history", "--model"])
            .arg(&trees)
            .arg("--background")
            .arg(&csv)
            .output()
            .unwrap(),
    ));
    assert_eq!(registered[0]["model_id"], "history");
    assert_eq!(registered[0]["model_kind"], "trees");

    let listed = json_lines(&succeeded(server.client("models").output().unwrap()));
    let mut ids: Vec<&str> = listed
        .iter()
        .map(|m| m["model_id"].as_str().unwrap())
        .collect();
    ids.sort();
    assert_eq!(ids, ["history", "screening"]);

    // Shapley values of a linear model under marginal removal, on the raw
    // output: w_j (x_j − mean_j) ("Explaining prediction models and
    // individual predictions with feature contributions", Knowledge and
    // Information Systems, 2014).
    let instances = dir.path().join("instances.jsonl");
    std::fs::write(&instances, "[4.0, 1.0, 0.0]\n[0.0, 3.0, 2.0]\n").unwrap();
    let answers = json_lines(&succeeded(
        server
            .client("explain")
            .args(["--model-id", "screening", "--input"])
            .arg(&instances)
            .output()
            .unwrap(),
    ));
    assert_eq!(answers.len(), 2);
    // Answers come as they are ready, each naming its input line.
    let mut answers = answers;
    answers.sort_by_key(|answer| answer["line"].as_u64());
    let rows = [[4.0, 1.0, 0.0], [0.0, 3.0, 2.0]];
    for (answer, x) in answers.iter().zip(rows) {
        assert_eq!(answer["estimator"], "ESTIMATOR_LINEAR_EXACT");
        for (j, attribution) in answer["attributions"]
            .as_array()
            .unwrap()
            .iter()
            .enumerate()
        {
            let mean = background.iter().map(|row| row[j]).sum::<f64>() / 3.0;
            let expected = weights[j] * (x[j] - mean);
            let got = attribution["value"].as_f64().unwrap();
            assert!((got - expected).abs() < 1e-12, "{j}: {got} vs {expected}");
        }
    }

    // A model the server refuses: the status names the field, and the
    // server keeps serving.
    std::fs::write(
        &linear,
        serde_json::json!({
            "model_id": "broken",
            "features": [{"name": "income"}, {"name": "arrears"}],
            "model": {"kind": "linear", "weights": [1.0], "intercept": 0.0},
            "background": [[1.0, 2.0]],
        })
        .to_string(),
    )
    .unwrap();
    let refused = server
        .client("register")
        .arg("--model")
        .arg(&linear)
        .output()
        .unwrap();
    assert!(!refused.status.success());
    let stderr = String::from_utf8_lossy(&refused.stderr);
    assert!(stderr.contains("linear.weights"), "{stderr}");
    let listed = json_lines(&succeeded(server.client("models").output().unwrap()));
    assert_eq!(listed.len(), 2);
}

#[test]
fn explain_reports_bad_rows_by_line_goes_on_and_fails_only_if_a_row_failed() {
    // How a command-line filter treats bad records: report each with its
    // line and carry on, exit non-zero if any failed (common practice, no
    // source; the line:message form is the one compilers use).
    let dir = tempfile::tempdir().unwrap();
    let server = Server::start(dir.path());
    let weights = [0.8, -1.5, 0.25];
    let model = dir.path().join("model.json");
    std::fs::write(
        &model,
        serde_json::json!({
            "model_id": "screening",
            "link": "logistic",
            "features": [{"name": "income"}, {"name": "arrears"}, {"name": "tenure"}],
            "model": {"kind": "linear", "weights": weights, "intercept": -0.5},
            "background": [[1.0, 2.0, 3.0], [3.0, 0.0, 1.0], [2.0, 1.0, -1.0]],
        })
        .to_string(),
    )
    .unwrap();
    succeeded(
        server
            .client("register")
            .arg("--model")
            .arg(&model)
            .output()
            .unwrap(),
    );

    // Line 3 cannot be read; line 5 has a missing value, which a linear
    // model refuses; line 6 is one value short. The label column `paid`
    // is not part of the instance.
    let rows = dir.path().join("rows.csv");
    std::fs::write(
        &rows,
        "income,paid,arrears,tenure\n4,1,1,0\n2,zero,1,1\n0,0,3,2\n1,1,,2\n1,0,2\n3,1,0,1\n",
    )
    .unwrap();
    let explain = |extra: &[&str], input: &Path| {
        server
            .client("explain")
            .args([
                "--model-id",
                "screening",
                "--target",
                "loss",
                "--label-column",
                "paid",
            ])
            .args(["--max-reasons", "1", "--input"])
            .arg(input)
            .args(extra)
            .output()
            .unwrap()
    };
    let output = explain(&[], &rows);
    assert!(!output.status.success(), "a row failed, so the run fails");
    let stderr = String::from_utf8_lossy(&output.stderr);
    let mut answers = json_lines(&String::from_utf8_lossy(&output.stdout));
    answers.sort_by_key(|answer| answer["line"].as_u64());
    let lines: Vec<u64> = answers
        .iter()
        .map(|a| a["line"].as_u64().unwrap())
        .collect();
    assert_eq!(lines, [2, 4, 7], "{stderr}");
    for answer in &answers {
        assert_eq!(answer["request_id"], format!("cli-{}", answer["line"]));
        assert!(answer["reasons"].as_array().unwrap().len() <= 1);
    }
    let shown = rows.display().to_string();
    assert!(stderr.contains(&format!("{shown}:3: column 2")), "{stderr}");
    assert!(
        stderr.contains(&format!("{shown}:5: INVALID_ARGUMENT: instance")),
        "{stderr}"
    );
    assert!(
        stderr.contains(&format!("{shown}:6: INVALID_ARGUMENT: instance")),
        "{stderr}"
    );
    assert!(
        stderr.contains("3 of 6 rows explained, 3 failed (lines 3, 5, 6)"),
        "{stderr}"
    );
    // Not a terminal: no progress line.
    assert!(!stderr.contains('\r'), "{stderr:?}");

    // The label of each row is its own: line 2 (paid 1) explained alone
    // gives the same answer as in the run above, and a run of good rows
    // succeeds.
    let good = dir.path().join("good.csv");
    std::fs::write(&good, "income,paid,arrears,tenure\n4,1,1,0\n").unwrap();
    let output = explain(&["--max-evaluations", "64", "--tolerance", "0.5"], &good);
    let stderr = String::from_utf8_lossy(&output.stderr).into_owned();
    let alone = json_lines(&succeeded(output));
    assert_eq!(alone[0]["attributions"], answers[0]["attributions"]);
    assert!(
        stderr.contains("1 of 1 rows explained, 0 failed"),
        "{stderr}"
    );

    // Fixed values name their flag's field when they do not fit.
    let output = explain(&["--removal", "fixed", "--fixed-values", "1,2"], &good);
    assert!(!output.status.success());
    let stderr = String::from_utf8_lossy(&output.stderr);
    assert!(
        stderr.contains(":2: INVALID_ARGUMENT: fixed_values"),
        "{stderr}"
    );
}

#[cfg(unix)]
#[test]
fn sigterm_stops_the_server_cleanly_and_the_registry_survives() {
    // Service managers and container runtimes stop a service with SIGTERM
    // (systemd.kill(5); `docker stop`).
    let dir = tempfile::tempdir().unwrap();
    let mut server = Server::start(dir.path());
    let model = dir.path().join("model.json");
    std::fs::write(
        &model,
        serde_json::json!({
            "model_id": "kept",
            "features": [{"name": "income"}],
            "model": {"kind": "linear", "weights": [1.0], "intercept": 0.0},
            "background": [[1.0], [2.0]],
        })
        .to_string(),
    )
    .unwrap();
    succeeded(
        server
            .client("register")
            .arg("--model")
            .arg(&model)
            .output()
            .unwrap(),
    );
    let killed = Command::new("kill")
        .args(["-TERM", &server.child.id().to_string()])
        .status()
        .unwrap();
    assert!(killed.success());
    let started = Instant::now();
    let status = loop {
        if let Some(status) = server.child.try_wait().unwrap() {
            break status;
        }
        assert!(
            started.elapsed() < Duration::from_secs(30),
            "still running after SIGTERM"
        );
        std::thread::sleep(Duration::from_millis(20));
    };
    assert!(status.success(), "{status:?}");
    drop(server);

    let server = Server::start(dir.path());
    let listed = json_lines(&succeeded(server.client("models").output().unwrap()));
    assert_eq!(listed.len(), 1);
    assert_eq!(listed[0]["model_id"], "kept");
}
