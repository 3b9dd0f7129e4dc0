//! The thin gRPC client behind `apportion register`, `apportion models` and
//! `apportion explain`: reads model files and instances (CSV or JSON lines)
//! and writes one JSON object per answer, for scripts and operators.

use std::path::{Path, PathBuf};

use serde::Deserialize;
use serde_json::{Value, json};
use tonic::metadata::{Ascii, MetadataValue};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

use crate::service::proto::{
    self, attributions_client::AttributionsClient, registry_client::RegistryClient,
};

pub type Failure = Box<dyn std::error::Error + Send + Sync>;

/// How the client reaches a server: its address, the TLS to speak, and the
/// bearer token to send (never shown by `Debug`).
#[derive(Clone, Default)]
pub struct Connection {
    /// `HOST:PORT`, or a URI with `http://` or `https://`.
    pub address: String,
    /// PEM CA certificates the server's certificate must chain to; with
    /// them the client speaks TLS (`https`).
    pub tls_ca: Option<PathBuf>,
    /// PEM client certificate chain and its key, for a server that asks
    /// for one (mutual TLS).
    pub tls_cert: Option<PathBuf>,
    pub tls_key: Option<PathBuf>,
    /// The name the server's certificate must carry, when the address
    /// does not say it (an IP address, a load balancer's name).
    pub tls_server_name: Option<String>,
    /// Sent as `authorization: Bearer TOKEN` with every call.
    pub token: Option<String>,
}

impl std::fmt::Debug for Connection {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Connection")
            .field("address", &self.address)
            .field("tls_ca", &self.tls_ca)
            .field("tls_cert", &self.tls_cert)
            .field("tls_key", &self.tls_key)
            .field("tls_server_name", &self.tls_server_name)
            .field("token", &self.token.as_ref().map(|_| "(set)"))
            .finish()
    }
}

/// Adds the bearer token, if any, to every call (what
/// `service::auth` checks).
#[derive(Clone)]
pub struct Bearer(Option<MetadataValue<Ascii>>);

impl tonic::service::Interceptor for Bearer {
    fn call(
        &mut self,
        mut request: tonic::Request<()>,
    ) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(value) = &self.0 {
            request
                .metadata_mut()
                .insert("authorization", value.clone());
        }
        Ok(request)
    }
}

/// A channel with the token attached, as the generated clients take it.
pub type Connected = InterceptedService<Channel, Bearer>;

impl Connection {
    /// A plaintext connection to `address` with no token.
    pub fn plaintext(address: impl Into<String>) -> Connection {
        Connection {
            address: address.into(),
            ..Connection::default()
        }
    }

    /// The endpoint URI and TLS settings, checked before any connection is
    /// tried; each problem names its flag.
    fn endpoint(&self) -> Result<(String, Option<ClientTlsConfig>), Failure> {
        let read = |flag: &str, path: &Path| {
            std::fs::read(path).map_err(|e| format!("{flag} {}: cannot read: {e}", path.display()))
        };
        let identity = match (&self.tls_cert, &self.tls_key) {
            (Some(cert), Some(key)) => Some(Identity::from_pem(
                read("--tls-cert", cert)?,
                read("--tls-key", key)?,
            )),
            (None, None) => None,
            _ => {
                return Err(
                    "--tls-cert and --tls-key go together (a certificate and its key)".into(),
                );
            }
        };
        let scheme = self.address.split_once("://").map(|(scheme, _)| scheme);
        let Some(ca) = &self.tls_ca else {
            if identity.is_some() {
                return Err(
                    "--tls-cert needs --tls-ca (the CA that signed the server's certificate)"
                        .into(),
                );
            }
            if scheme == Some("https") {
                return Err(format!(
                    "{}: https needs --tls-ca (the CA that signed the server's certificate)",
                    self.address
                )
                .into());
            }
            let uri = match scheme {
                Some(_) => self.address.clone(),
                None => format!("http://{}", self.address),
            };
            return Ok((uri, None));
        };
        let uri = match scheme {
            Some("https") => self.address.clone(),
            Some(other) => {
                return Err(format!(
                    "{}: --tls-ca speaks TLS, so the scheme must be https, not {other}",
                    self.address
                )
                .into());
            }
            None => format!("https://{}", self.address),
        };
        let mut tls =
            ClientTlsConfig::new().ca_certificate(Certificate::from_pem(read("--tls-ca", ca)?));
        if let Some(identity) = identity {
            tls = tls.identity(identity);
        }
        if let Some(name) = &self.tls_server_name {
            tls = tls.domain_name(name.clone());
        }
        Ok((uri, Some(tls)))
    }

    fn bearer(&self) -> Result<Bearer, Failure> {
        match &self.token {
            None => Ok(Bearer(None)),
            // The token itself is never part of a message.
            Some(token) => MetadataValue::try_from(format!("Bearer {}", token.trim()))
                .map(|value| Bearer(Some(value)))
                .map_err(|_| "--token: must be printable ASCII (it travels as a header)".into()),
        }
    }

    /// Connects, saying why it could not: the whole chain of causes (a
    /// refused certificate is several layers below "transport error").
    pub async fn connect(&self) -> Result<Connected, Failure> {
        let (uri, tls) = self.endpoint()?;
        let bearer = self.bearer()?;
        let mut endpoint = Channel::from_shared(uri.clone())
            .map_err(|e| format!("{}: not an address: {e}", self.address))?;
        if let Some(tls) = tls {
            endpoint = endpoint
                .tls_config(tls)
                .map_err(|e| format!("{uri}: {}", causes(&e)))?;
        }
        let channel = endpoint
            .connect()
            .await
            .map_err(|e| format!("{uri}: cannot connect: {}", causes(&e)))?;
        Ok(InterceptedService::new(channel, bearer))
    }
}

/// An error and its sources, joined with `: `.
fn causes(error: &dyn std::error::Error) -> String {
    let mut text = error.to_string();
    let mut source = error.source();
    while let Some(cause) = source {
        text.push_str(&format!(": {cause}"));
        source = cause.source();
    }
    text
}

/// What `models` and `register` print about one model version.
fn info_json(m: &proto::ModelInfo) -> Value {
    let mut info = json!({
        "model_id": m.model_id,
        "version": m.version,
        "model_kind": m.model_kind,
        "features": m.features.iter().map(|f| &f.name).collect::<Vec<_>>(),
        "background_rows": m.background_rows,
        "row_cost_ns": m.row_cost_ns,
        "registered_unix_ms": m.registered_unix_ms,
        "checksum": m.checksum,
    });
    // Only imported models say where they came from, so native ones print
    // as before.
    if !m.import_format.is_empty() {
        info["import_format"] = json!(m.import_format);
        info["import_objective"] = json!(m.import_objective);
        info["import_class_index"] = json!(m.import_class_index);
    }
    if !m.import_output.is_empty() {
        info["import_output"] = json!(m.import_output);
    }
    info
}

/// Every registered model version, one JSON object each.
pub async fn models(server: &Connection) -> Result<Vec<Value>, Failure> {
    let mut registry = RegistryClient::new(server.connect().await?);
    let listed = registry
        .list_models(proto::ListModelsRequest {})
        .await?
        .into_inner();
    Ok(listed.models.iter().map(info_json).collect())
}

/// A model file for `apportion register`: one JSON object.
///
/// ```json
/// { "model_id": "screening", "description": "…", "link": "logistic",
///   "features": [{ "name": "income", "group": "", "reason_code": "R01",
///                  "reason_text": "Income is low for the rent" }, …],
///   "model": { "kind": "linear", "weights": [0.8, …], "intercept": -1.2 },
///   "background": [[3100.0, …], [2400.0, null, …]] }
/// ```
///
/// `model` may instead be `{ "kind": "trees", "base_score": 0.0, "trees":
/// [{ "feature", "threshold", "left", "right", "value", "missing_left" }] }`
/// with the node arrays of the API's `Tree` message, or `{ "kind": "onnx",
/// "path": "model.onnx", "output": "probabilities", "column": 1,
/// "class_index": 1 }` (all but the path optional; path
/// relative to the model file; output and column as in the API), or
/// `{ "kind": "xgboost", "path": "model.json", "class_index": 2 }` (the JSON
/// XGBoost's `save_model` writes) or `{ "kind": "lightgbm", "path":
/// "model.txt" }` (LightGBM's `save_model` text), whose `class_index` is
/// optional and whose `features` may be left out to take the file's names.
/// `link` defaults to `identity` (for those two: as the objective says); `group`, `reason_code`, `reason_text` and `description` may
/// be left out; `background` may be left out when a background file is
/// given. Rows are arrays of numbers, `null` for a missing value.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModelFile {
    #[serde(default)]
    pub model_id: String,
    #[serde(default)]
    pub description: String,
    #[serde(default = "identity")]
    pub link: String,
    #[serde(default)]
    pub features: Vec<FeatureEntry>,
    pub model: ModelEntry,
    #[serde(default)]
    pub background: Option<Vec<Vec<Option<f64>>>>,
    /// `{ "favourable": "higher" | "lower", "space": "output" |
    /// "probability", "threshold": 0.2 }`, every member optional.
    #[serde(default)]
    pub decision: Option<DecisionEntry>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DecisionEntry {
    #[serde(default)]
    pub favourable: Option<String>,
    #[serde(default)]
    pub space: Option<String>,
    #[serde(default)]
    pub threshold: Option<f64>,
}

impl DecisionEntry {
    fn to_proto(&self) -> Result<proto::Decision, Failure> {
        let favourable = match self.favourable.as_deref() {
            None => proto::Favourable::Unspecified,
            Some("higher") => proto::Favourable::Higher,
            Some("lower") => proto::Favourable::Lower,
            Some(other) => {
                return Err(format!(
                    "decision.favourable: unknown direction {other:?}; use higher or lower"
                )
                .into());
            }
        };
        let space = match self.space.as_deref() {
            None => proto::DecisionSpace::Unspecified,
            Some("output") => proto::DecisionSpace::Output,
            Some("probability") => proto::DecisionSpace::Probability,
            Some(other) => {
                return Err(format!(
                    "decision.space: unknown space {other:?}; use output or probability"
                )
                .into());
            }
        };
        Ok(proto::Decision {
            favourable: favourable as i32,
            space: space as i32,
            threshold: self.threshold,
        })
    }
}

fn identity() -> String {
    "identity".into()
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureEntry {
    pub name: String,
    #[serde(default)]
    pub group: String,
    #[serde(default)]
    pub reason_code: String,
    #[serde(default)]
    pub reason_text: String,
}

#[derive(Debug, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum ModelEntry {
    Linear {
        weights: Vec<f64>,
        intercept: f64,
    },
    Trees {
        trees: Vec<TreeEntry>,
        #[serde(default)]
        base_score: f64,
    },
    /// An ONNX file, its path relative to the model file.
    Onnx {
        path: PathBuf,
        #[serde(default)]
        output: String,
        #[serde(default)]
        column: u32,
        #[serde(default)]
        class_index: Option<u32>,
    },
    /// An XGBoost JSON model file, its path relative to the model file.
    Xgboost {
        path: PathBuf,
        #[serde(default)]
        class_index: Option<u32>,
    },
    /// A LightGBM text model file, its path relative to the model file.
    Lightgbm {
        path: PathBuf,
        #[serde(default)]
        class_index: Option<u32>,
    },
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TreeEntry {
    pub feature: Vec<i32>,
    pub threshold: Vec<f64>,
    pub left: Vec<i32>,
    pub right: Vec<i32>,
    pub value: Vec<f64>,
    #[serde(default)]
    pub missing_left: Vec<bool>,
}

/// What `apportion register` sends: the model file, its `model_id`
/// replaced when `model_id` is given, its background replaced by the rows
/// of `background` when that is given. The server validates the rest.
pub fn registration(
    model_file: &Path,
    background: Option<&Path>,
    model_id: Option<&str>,
) -> Result<proto::RegisterModelRequest, Failure> {
    let text = std::fs::read_to_string(model_file)
        .map_err(|e| format!("{}: cannot read: {e}", model_file.display()))?;
    let file: ModelFile = serde_json::from_str(&text)
        .map_err(|e| format!("{}: not a model file: {e}", model_file.display()))?;
    let rows = match (background, file.background) {
        (Some(path), _) => read_instances(path)?,
        (None, Some(rows)) => rows
            .into_iter()
            .map(|row| row.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect())
            .collect(),
        (None, None) => {
            return Err(format!(
                "{}: has no \"background\"; add one or pass --background",
                model_file.display()
            )
            .into());
        }
    };
    // An imported model may leave its features to the file; the server
    // checks the background's width against it then.
    let cols = if file.features.is_empty() {
        rows.first().map_or(0, Vec::len)
    } else {
        file.features.len()
    };
    if let Some((at, row)) = rows.iter().enumerate().find(|(_, row)| row.len() != cols) {
        return Err(format!(
            "background row {}: has {} values for {cols} features",
            at + 1,
            row.len()
        )
        .into());
    }
    let link = proto::Link::from_str_name(&format!("LINK_{}", file.link.to_uppercase()))
        .ok_or_else(|| {
            format!(
                "link: unknown link {:?}; use identity or logistic",
                file.link
            )
        })?;
    let (mut onnx_output, mut onnx_output_column) = (String::new(), 0);
    let mut class_index = None;
    let beside = |path: PathBuf| -> Result<Vec<u8>, Failure> {
        let path = model_file.parent().unwrap_or(Path::new("")).join(path);
        std::fs::read(&path).map_err(|e| format!("{}: cannot read: {e}", path.display()).into())
    };
    let model = match file.model {
        ModelEntry::Xgboost {
            path,
            class_index: class,
        } => {
            class_index = class;
            proto::register_model_request::Model::XgboostJson(beside(path)?)
        }
        ModelEntry::Lightgbm {
            path,
            class_index: class,
        } => {
            class_index = class;
            proto::register_model_request::Model::LightgbmText(beside(path)?)
        }
        ModelEntry::Onnx {
            path,
            output,
            column,
            class_index: class,
        } => {
            (onnx_output, onnx_output_column) = (output, column);
            class_index = class;
            proto::register_model_request::Model::Onnx(beside(path)?)
        }
        ModelEntry::Linear { weights, intercept } => {
            proto::register_model_request::Model::Linear(proto::LinearModel { weights, intercept })
        }
        ModelEntry::Trees { trees, base_score } => {
            proto::register_model_request::Model::Trees(proto::TreeEnsemble {
                trees: trees
                    .into_iter()
                    .map(|t| proto::Tree {
                        feature: t.feature,
                        threshold: t.threshold,
                        left: t.left,
                        right: t.right,
                        value: t.value,
                        missing_left: t.missing_left,
                    })
                    .collect(),
                base_score,
            })
        }
    };
    let too_many = |_| {
        format!(
            "background: {} rows are more than a request can carry",
            rows.len()
        )
    };
    let matrix_rows = u32::try_from(rows.len()).map_err(too_many)?;
    Ok(proto::RegisterModelRequest {
        model_id: model_id.map_or(file.model_id, str::to_string),
        features: file
            .features
            .into_iter()
            .map(|f| proto::Feature {
                name: f.name,
                group: f.group,
                reason_code: f.reason_code,
                reason_text: f.reason_text,
            })
            .collect(),
        model: Some(model),
        link: link as i32,
        background: Some(proto::Matrix {
            rows: matrix_rows,
            cols: u32::try_from(cols).map_err(|_| "features: too many")?,
            values: rows.into_iter().flatten().collect(),
        }),
        description: file.description,
        onnx_output,
        onnx_output_column,
        class_index,
        decision: file
            .decision
            .as_ref()
            .map(DecisionEntry::to_proto)
            .transpose()?,
    })
}

/// Registers one model version; the answer is what `models` prints of it.
pub async fn register(
    server: &Connection,
    request: proto::RegisterModelRequest,
) -> Result<Vec<Value>, Failure> {
    let mut registry = RegistryClient::new(server.connect().await?);
    let info = registry.register_model(request).await?.into_inner();
    Ok(vec![info_json(&info)])
}

/// One input row of `apportion explain`: where it is in the file, and its
/// instance and label, or why it could not be read.
#[derive(Debug, Clone, PartialEq)]
pub struct InputRow {
    /// The line number in the file, from 1.
    pub line: usize,
    pub parsed: Result<Row, String>,
}

/// An instance, with its label when the input names a label column.
#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    pub instance: Vec<f64>,
    pub label: Option<f64>,
}

/// What a run of `apportion explain` did, for its summary line.
#[derive(Debug, Clone, Default)]
pub struct Tally {
    pub rows: usize,
    pub explained: usize,
    /// Line numbers of the rows that failed, to read or to explain.
    pub failed_lines: Vec<usize>,
    pub elapsed: std::time::Duration,
}

impl Tally {
    /// One line: rows explained and failed (the first failed lines named),
    /// time and rate.
    pub fn summary(&self, input: &Path) -> String {
        let seconds = self.elapsed.as_secs_f64();
        let mut line = format!(
            "{}: {} of {} rows explained, {} failed",
            input.display(),
            self.explained,
            self.rows,
            self.failed_lines.len()
        );
        if !self.failed_lines.is_empty() {
            let mut lines = self.failed_lines.clone();
            lines.sort_unstable();
            let shown: Vec<String> = lines.iter().take(10).map(|l| l.to_string()).collect();
            let more = if lines.len() > 10 { ", …" } else { "" };
            line.push_str(&format!(" (lines {}{more})", shown.join(", ")));
        }
        line.push_str(&format!(
            " in {seconds:.2} s ({:.0} rows/s)",
            self.explained as f64 / seconds.max(1e-9)
        ));
        line
    }
}

/// The answer as `apportion explain` prints it: one JSON object, with the
/// input line it answers.
pub fn explanation_json(line: usize, e: &proto::Explanation) -> Value {
    let estimator =
        proto::Estimator::try_from(e.estimator_used).map_or("UNKNOWN", |k| k.as_str_name());
    json!({
        "line": line,
        "request_id": e.request_id,
        "model_id": e.model_id,
        "version": e.version,
        "value_full": e.value_full,
        "value_empty": e.value_empty,
        "attributions": e.attributions.iter().map(|a| json!({
            "name": a.name, "value": a.value, "std_error": a.std_error,
        })).collect::<Vec<_>>(),
        "estimator": estimator,
        "plan_reason": e.plan_reason,
        "converged": e.converged,
        "coalitions_evaluated": e.coalitions_evaluated,
        "elapsed_us": e.elapsed_us,
        "reasons": e.reasons.iter().map(|r| json!({
            "name": r.name, "code": r.reason_code, "statement": r.statement, "weight": r.weight,
        })).collect::<Vec<_>>(),
    })
}

/// How far a run has got, for the progress line on a terminal.
#[derive(Debug, Clone, Copy)]
pub struct Progress {
    pub done: usize,
    pub total: usize,
    pub elapsed: std::time::Duration,
}

impl Progress {
    /// `done/total rows, rate/s, time left`.
    pub fn line(&self) -> String {
        let seconds = self.elapsed.as_secs_f64().max(1e-9);
        let rate = self.done as f64 / seconds;
        let left = if rate > 0.0 {
            format!("{:.0} s left", (self.total - self.done) as f64 / rate)
        } else {
            "time left unknown".into()
        };
        format!("{}/{} rows, {rate:.0}/s, {left}", self.done, self.total)
    }
}

/// Explains every readable row over one ExplainStream with the choices in
/// `template` (its `instance`, and its `label` where a row has one, are
/// replaced). Each answer is written to `out` as a JSON line as it
/// arrives (in the order answers are ready, each naming its input `line`);
/// each bad row, read or explained, is reported to `report` with its line
/// number, and the run goes on. `progress` is called after each answer.
/// Fails only when the stream itself fails (the server cannot be reached,
/// or the call ends with an error status).
pub async fn explain_rows(
    server: &Connection,
    template: proto::ExplainRequest,
    input: &Path,
    rows: Vec<InputRow>,
    out: &mut (dyn std::io::Write + Send),
    report: &mut (dyn std::io::Write + Send),
    progress: &mut (dyn FnMut(Progress) + Send),
) -> Result<Tally, Failure> {
    let started = std::time::Instant::now();
    let mut tally = Tally {
        rows: rows.len(),
        ..Tally::default()
    };
    let mut sent_lines = Vec::new();
    let mut requests = Vec::new();
    for row in rows {
        match row.parsed {
            Ok(Row { instance, label }) => {
                requests.push(proto::ExplainRequest {
                    instance,
                    label: label.or(template.label),
                    request_id: format!("{}-{}", template.request_id, row.line),
                    ..template.clone()
                });
                sent_lines.push(row.line);
            }
            Err(why) => {
                say(report, format!("{}:{}: {why}", input.display(), row.line))?;
                tally.failed_lines.push(row.line);
            }
        }
    }
    let mut attributions = AttributionsClient::new(server.connect().await?);
    // The request stream is fed from a small channel, so only what the
    // server's flow control lets through is encoded ahead.
    let (feed, fed) = tokio::sync::mpsc::channel(64);
    tokio::spawn(async move {
        for request in requests {
            if feed.send(request).await.is_err() {
                break;
            }
        }
    });
    let mut answers = attributions
        .explain_stream(tokio_stream::wrappers::ReceiverStream::new(fed))
        .await?
        .into_inner();
    let mut done = tally.failed_lines.len();
    while let Some(outcome) = answers.message().await? {
        let line = usize::try_from(outcome.index)
            .ok()
            .and_then(|index| sent_lines.get(index).copied())
            .ok_or_else(|| format!("the server answered an unknown request {}", outcome.index))?;
        match outcome.outcome {
            Some(proto::explain_outcome::Outcome::Explanation(explanation)) => {
                writeln!(out, "{}", explanation_json(line, &explanation))?;
                tally.explained += 1;
            }
            Some(proto::explain_outcome::Outcome::Error(error)) => {
                say(
                    report,
                    format!(
                        "{}:{line}: {}: {}",
                        input.display(),
                        error.code_name,
                        error.message
                    ),
                )?;
                tally.failed_lines.push(line);
            }
            None => {
                say(
                    report,
                    format!(
                        "{}:{line}: the server sent an empty answer",
                        input.display()
                    ),
                )?;
                tally.failed_lines.push(line);
            }
        }
        done += 1;
        progress(Progress {
            done,
            total: tally.rows,
            elapsed: started.elapsed(),
        });
    }
    out.flush()?;
    tally.elapsed = started.elapsed();
    Ok(tally)
}

/// One report line in one write, so a terminal's progress line is cleared
/// once before it.
fn say(report: &mut (dyn std::io::Write + Send), mut text: String) -> std::io::Result<()> {
    text.push('\n');
    report.write_all(text.as_bytes())
}

/// Rows for `apportion explain` from `path`, each with its line number,
/// bad rows kept with the reason so the run can report them and go on.
///
/// JSON lines (`.jsonl`/`.json`): a line is an array of numbers (`null` =
/// missing), or an object `{"instance": [...], "<label_field>": 1}`. CSV
/// (anything else): a first line that is not numeric is the header; empty,
/// `NA` and `NaN` cells are missing. With `label_field`, the label is that
/// field of each object, or the CSV column of that name (which is then not
/// part of the instance, and needs a header).
pub fn read_rows(path: &Path, label_field: Option<&str>) -> Result<Vec<InputRow>, Failure> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| format!("{}: cannot read: {e}", path.display()))?;
    let json_lines = matches!(
        path.extension().and_then(|e| e.to_str()),
        Some("jsonl" | "json")
    );
    let mut rows = Vec::new();
    let mut label_column = None;
    for (number, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let parsed = if json_lines {
            json_row(line, label_field)
        } else {
            let cells: Vec<&str> = line.split(',').map(str::trim).collect();
            if number == 0 && cells.iter().any(|cell| cell_value(cell).is_err()) {
                if let Some(name) = label_field {
                    label_column =
                        Some(cells.iter().position(|c| *c == name).ok_or_else(|| {
                            format!(
                                "{}:1: --label-column {name:?} is not in the header ({})",
                                path.display(),
                                cells.join(", ")
                            )
                        })?);
                }
                continue; // a header
            }
            if let (Some(name), None) = (label_field, label_column) {
                return Err(format!(
                    "{}:1: --label-column {name:?} needs a header line naming the columns",
                    path.display()
                )
                .into());
            }
            csv_row(&cells, label_column, label_field.unwrap_or_default())
        };
        rows.push(InputRow {
            line: number + 1,
            parsed,
        });
    }
    if rows.is_empty() {
        return Err(format!("{}: no instances found", path.display()).into());
    }
    Ok(rows)
}

fn cell_value(cell: &str) -> Result<f64, String> {
    match cell {
        "" | "NA" | "NaN" | "nan" => Ok(f64::NAN),
        number => number
            .parse()
            .map_err(|_| format!("{number:?} is not a number")),
    }
}

fn csv_row(cells: &[&str], label_column: Option<usize>, label_name: &str) -> Result<Row, String> {
    let mut instance = Vec::with_capacity(cells.len());
    let mut label = None;
    for (column, cell) in cells.iter().enumerate() {
        let value = cell_value(cell).map_err(|why| format!("column {}: {why}", column + 1))?;
        if Some(column) == label_column {
            if value.is_nan() {
                return Err(format!("the label column {label_name:?} is empty"));
            }
            label = Some(value);
        } else {
            instance.push(value);
        }
    }
    if label_column.is_some_and(|column| column >= cells.len()) {
        return Err(format!("has no value in the label column {label_name:?}"));
    }
    Ok(Row { instance, label })
}

fn json_row(line: &str, label_field: Option<&str>) -> Result<Row, String> {
    let value: Value = serde_json::from_str(line).map_err(|e| format!("not JSON: {e}"))?;
    let numbers = |array: &Value| -> Result<Vec<f64>, String> {
        let Some(items) = array.as_array() else {
            return Err("expected an array of numbers or null".into());
        };
        items
            .iter()
            .map(|item| match item {
                Value::Null => Ok(f64::NAN),
                other => other
                    .as_f64()
                    .ok_or_else(|| format!("{other} is not a number or null")),
            })
            .collect()
    };
    match (&value, label_field) {
        (Value::Array(_), None) => Ok(Row {
            instance: numbers(&value)?,
            label: None,
        }),
        (Value::Array(_), Some(name)) => Err(format!(
            "expected an object {{\"instance\": [...], \"{name}\": …}} (--label-column {name:?})"
        )),
        (Value::Object(fields), _) => {
            let instance = numbers(fields.get("instance").ok_or("has no \"instance\" field")?)
                .map_err(|why| format!("instance: {why}"))?;
            let label = match label_field {
                Some(name) => Some(
                    fields
                        .get(name)
                        .and_then(Value::as_f64)
                        .ok_or_else(|| format!("has no number in its label field {name:?}"))?,
                ),
                None => None,
            };
            Ok(Row { instance, label })
        }
        _ => Err("expected an array of numbers or an object with \"instance\"".into()),
    }
}

/// Instances from `path`: JSON lines (`.jsonl`/`.json`: one array of
/// numbers per line, `null` for missing) or CSV (anything else: a header
/// line is skipped when it is not numeric; empty, `NA` and `NaN` cells are
/// missing).
pub fn read_instances(path: &Path) -> Result<Vec<Vec<f64>>, Failure> {
    let text = std::fs::read_to_string(path)
        .map_err(|e| format!("{}: cannot read: {e}", path.display()))?;
    let json_lines = matches!(
        path.extension().and_then(|e| e.to_str()),
        Some("jsonl" | "json")
    );
    let mut rows = Vec::new();
    for (number, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let at = |why: String| format!("{}:{}: {why}", path.display(), number + 1);
        let row = if json_lines {
            let values: Vec<Option<f64>> = serde_json::from_str(line)
                .map_err(|e| at(format!("expected an array of numbers or null: {e}")))?;
            values.into_iter().map(|v| v.unwrap_or(f64::NAN)).collect()
        } else {
            let cells: Result<Vec<f64>, String> = line
                .split(',')
                .map(|cell| match cell.trim() {
                    "" | "NA" | "NaN" | "nan" => Ok(f64::NAN),
                    number => number
                        .parse()
                        .map_err(|_| format!("{number:?} is not a number")),
                })
                .collect();
            match cells {
                Ok(values) => values,
                Err(_) if rows.is_empty() && number == 0 => continue, // a header
                Err(why) => return Err(at(why).into()),
            }
        };
        rows.push(row);
    }
    if rows.is_empty() {
        return Err(format!("{}: no instances found", path.display()).into());
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn tls_flags_that_cannot_work_are_refused_naming_the_flag() {
        // Common practice, no source: a client certificate needs its key and
        // a CA to check the server against; https needs that CA too.
        let dir = tempfile::tempdir().unwrap();
        let pem = dir.path().join("x.pem");
        std::fs::write(&pem, "-----BEGIN CERTIFICATE-----\n").unwrap();
        let base = Connection::plaintext("127.0.0.1:50051");
        let cases = [
            (
                Connection {
                    tls_cert: Some(pem.clone()),
                    ..base.clone()
                },
                "--tls-key",
            ),
            (
                Connection {
                    tls_cert: Some(pem.clone()),
                    tls_key: Some(pem.clone()),
                    ..base.clone()
                },
                "--tls-ca",
            ),
            (
                Connection {
                    address: "https://127.0.0.1:50051".into(),
                    ..base.clone()
                },
                "--tls-ca",
            ),
            (
                Connection {
                    address: "http://127.0.0.1:50051".into(),
                    tls_ca: Some(pem.clone()),
                    ..base.clone()
                },
                "https",
            ),
            (
                Connection {
                    tls_ca: Some(dir.path().join("absent.pem")),
                    ..base.clone()
                },
                "absent.pem",
            ),
            (
                Connection {
                    token: Some("bad\ntoken".into()),
                    ..base.clone()
                },
                "--token",
            ),
        ];
        for (connection, named) in cases {
            let error = match connection.endpoint() {
                Err(error) => error.to_string(),
                Ok(_) => connection
                    .bearer()
                    .err()
                    .map(|e| e.to_string())
                    .unwrap_or_default(),
            };
            assert!(error.contains(named), "{connection:?}: {error:?}");
            assert!(
                !error.contains("bad\ntoken"),
                "the token is not echoed: {error}"
            );
        }
        let secret = Connection {
            token: Some("s3cret".into()),
            ..base.clone()
        };
        assert!(!format!("{secret:?}").contains("s3cret"), "{secret:?}");
        let (uri, tls) = Connection {
            tls_ca: Some(pem.clone()),
            ..base.clone()
        }
        .endpoint()
        .unwrap();
        assert_eq!(uri, "https://127.0.0.1:50051");
        assert!(tls.is_some());
        let (uri, tls) = base.endpoint().unwrap();
        assert_eq!(uri, "http://127.0.0.1:50051");
        assert!(tls.is_none());
    }

    #[test]
    fn rows_keep_their_line_numbers_labels_and_reasons() {
        // Formats as documented on read_rows (common practice, no source).
        let dir = tempfile::tempdir().unwrap();
        let csv = dir.path().join("rows.csv");
        std::fs::write(
            &csv,
            "income,paid,rent\n3000,1,0.3\n\n2500,x,0.2\n2400,0,\n",
        )
        .unwrap();
        let rows = read_rows(&csv, Some("paid")).unwrap();
        assert_eq!(rows.len(), 3);
        assert_eq!(rows[0].line, 2);
        let first = rows[0].parsed.as_ref().unwrap();
        assert_eq!(
            (first.instance.clone(), first.label),
            (vec![3000.0, 0.3], Some(1.0))
        );
        assert_eq!(rows[1].line, 4);
        assert!(rows[1].parsed.as_ref().unwrap_err().contains("column 2"));
        assert!(rows[2].parsed.as_ref().unwrap().instance[1].is_nan());
        let missing = read_rows(&csv, Some("label")).unwrap_err().to_string();
        assert!(
            missing.contains("\"label\" is not in the header"),
            "{missing}"
        );

        let jsonl = dir.path().join("rows.jsonl");
        std::fs::write(
            &jsonl,
            "{\"instance\": [1, null], \"paid\": 0}\n[1, 2]\n{\"instance\": [3, 4]}\n",
        )
        .unwrap();
        let rows = read_rows(&jsonl, Some("paid")).unwrap();
        assert_eq!(rows[0].parsed.as_ref().unwrap().label, Some(0.0));
        assert!(
            rows[1]
                .parsed
                .as_ref()
                .unwrap_err()
                .contains("--label-column")
        );
        assert!(rows[2].parsed.as_ref().unwrap_err().contains("\"paid\""));
        let plain = read_rows(&jsonl, None).unwrap();
        assert_eq!(plain[1].parsed.as_ref().unwrap().instance, vec![1.0, 2.0]);
        assert_eq!(plain[2].parsed.as_ref().unwrap().label, None);
    }

    #[test]
    fn csv_and_json_lines_read_alike_with_missing_values() {
        // Formats as described above (common practice, no source).
        let dir = std::env::temp_dir().join(format!("apportion-client-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let csv = dir.join("rows.csv");
        std::fs::write(&csv, "income,rent\n3000,0.3\n2500,\n").unwrap();
        let jsonl = dir.join("rows.jsonl");
        std::fs::write(&jsonl, "[3000, 0.3]\n[2500, null]\n").unwrap();
        for path in [&csv, &jsonl] {
            let rows = read_instances(path).unwrap();
            assert_eq!(rows.len(), 2);
            assert_eq!(rows[0], vec![3000.0, 0.3]);
            assert!(rows[1][1].is_nan());
        }
        std::fs::write(&csv, "1,2\n3,x\n").unwrap();
        let err = read_instances(&csv).unwrap_err().to_string();
        assert!(err.contains(":2:"), "{err}");
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
