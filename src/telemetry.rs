//! Logs and metrics for operators: a tracing subscriber (human or JSON lines,
//! filtered like `RUST_LOG`) and a Prometheus exporter on its own address.
//! The metric names live here so the service and its tests agree on them.

use std::net::SocketAddr;

use metrics_exporter_prometheus::{Matcher, PrometheusBuilder};

/// Requests by `rpc` and gRPC status `code` (counter).
pub const REQUESTS: &str = "apportion_requests_total";
/// Calls refused for their token, by reason (missing, malformed, unknown,
/// role); never the token itself.
pub const AUTH_FAILURES: &str = "apportion_auth_failures_total";
/// TLS handshakes completed, each a connection handed to the gRPC server
/// (counter); beside the failures, the share that fail.
pub const TLS_HANDSHAKES: &str = "apportion_tls_handshakes_total";
/// TLS handshakes that failed, by reason (timeout, client_certificate,
/// protocol, overload); the connection was dropped (counter).
pub const TLS_HANDSHAKE_FAILURES: &str = "apportion_tls_handshake_failures_total";
/// Reloads of the TLS certificate, key and client CA, by outcome (ok,
/// failed: the previous configuration stayed in use) (counter).
pub const TLS_RELOADS: &str = "apportion_tls_reloads_total";
/// Time from arrival to answer of successful Explain calls (histogram).
pub const EXPLAIN_SECONDS: &str = "apportion_explain_seconds";
/// Coalition values computed by Explain calls (counter).
pub const COALITIONS_EVALUATED: &str = "apportion_coalitions_evaluated_total";
/// Model rows predicted by Explain calls (counter).
pub const MODEL_ROWS_EVALUATED: &str = "apportion_model_rows_evaluated_total";
/// Coalition values served from the per-request cache (counter).
pub const CACHE_HITS: &str = "apportion_cache_hits_total";
/// Computations stopped because their call was cancelled or dropped before
/// the answer (counter).
pub const COMPUTATIONS_CANCELLED: &str = "apportion_computations_cancelled_total";
/// Panics caught by the guard around computations and registrations, by
/// `work`; each answered its caller with INTERNAL (counter).
pub const PANICS: &str = "apportion_panics_total";
/// Model versions currently registered (gauge).
pub const REGISTERED_MODELS: &str = "apportion_registered_models";
/// ExplainStream requests read and not yet handed to the transport, over
/// every open stream (gauge); each stream holds at most
/// `max_stream_in_flight`.
pub const STREAM_IN_FLIGHT: &str = "apportion_stream_requests_in_flight";
/// Instances and stream requests answered, by rpc (counter; an item with
/// an error counts too).
pub const ITEMS: &str = "apportion_items_total";
/// Mean |attribution| per model and player over the last closed drift
/// window (gauge).
pub const ATTRIBUTION_MEAN_ABS: &str = "apportion_attribution_mean_abs";
/// The last closed drift window's stability index against the earlier
/// windows kept, per model and player (gauge).
pub const ATTRIBUTION_STABILITY: &str = "apportion_attribution_stability_index";
/// Attribution-log lines dropped because the writer's queue was full.
pub const ATTRIBUTION_LOG_DROPPED: &str = "apportion_attribution_log_dropped_total";
/// Attribution-log lines that could not be written, by step.
pub const ATTRIBUTION_LOG_ERRORS: &str = "apportion_attribution_log_errors_total";
/// With the PostgreSQL store: 1 while the connection that LISTENs for other
/// replicas' changes is up, 0 while it is being re-made (gauge).
pub const STORE_LISTENING: &str = "apportion_registry_store_listening";
/// With the PostgreSQL store: full re-reads of the registry, by `outcome`
/// (`ok`, `failed`) (counter).
pub const STORE_REREADS: &str = "apportion_registry_store_rereads_total";
/// Stored records that could not be served (damaged, altered or invalid),
/// found on load or re-read; each is also logged (counter).
pub const RECORDS_SKIPPED: &str = "apportion_registry_records_skipped_total";

/// Bucket bounds of the latency histogram, in seconds: from well under a
/// millisecond to the longest sensible budget.
const LATENCY_BUCKETS: [f64; 12] = [
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 5.0,
];

/// How log lines are written.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "snake_case")]
pub enum LogFormat {
    /// Readable lines for a terminal.
    #[default]
    Human,
    /// One JSON object per line, for log collectors.
    Json,
}

#[derive(Debug, thiserror::Error)]
pub enum TelemetryError {
    #[error(
        "log filter {filter:?} is not valid ({reason}); use RUST_LOG syntax such as `info,apportion=debug`"
    )]
    Filter { filter: String, reason: String },
    #[error("a tracing subscriber is already installed in this process")]
    TracingInstalled,
    #[error("the Prometheus exporter could not start on {address}: {reason}")]
    Metrics { address: SocketAddr, reason: String },
}

/// Installs the global tracing subscriber. `filter` uses `RUST_LOG` syntax.
pub fn init_tracing(format: LogFormat, filter: &str) -> Result<(), TelemetryError> {
    let env_filter =
        tracing_subscriber::EnvFilter::try_new(filter).map_err(|e| TelemetryError::Filter {
            filter: filter.to_string(),
            reason: e.to_string(),
        })?;
    let builder = tracing_subscriber::fmt().with_env_filter(env_filter);
    let installed = match format {
        LogFormat::Human => builder.try_init(),
        LogFormat::Json => builder.json().try_init(),
    };
    installed.map_err(|_| TelemetryError::TracingInstalled)
}

/// Installs the global metrics recorder and serves it for Prometheus at
/// `http://address/metrics` (any path answers). Called inside a tokio
/// runtime, the listener runs on that runtime; outside one, the exporter
/// starts its own background thread, which outlives any runtime.
pub fn install_metrics(address: SocketAddr) -> Result<(), TelemetryError> {
    let failed = |reason: String| TelemetryError::Metrics { address, reason };
    PrometheusBuilder::new()
        .with_http_listener(address)
        .set_buckets_for_metric(Matcher::Full(EXPLAIN_SECONDS.to_string()), &LATENCY_BUCKETS)
        .map_err(|e| failed(e.to_string()))?
        .install()
        .map_err(|e| failed(e.to_string()))?;
    describe_metrics();
    Ok(())
}

/// Help texts shown beside each metric in the exposition.
fn describe_metrics() {
    metrics::describe_counter!(REQUESTS, "gRPC requests by rpc and status code");
    metrics::describe_histogram!(
        EXPLAIN_SECONDS,
        metrics::Unit::Seconds,
        "Explain latency from arrival to answer"
    );
    metrics::describe_counter!(COALITIONS_EVALUATED, "coalition values computed");
    metrics::describe_counter!(MODEL_ROWS_EVALUATED, "model rows predicted");
    metrics::describe_counter!(CACHE_HITS, "coalition values served from the request cache");
    metrics::describe_counter!(
        COMPUTATIONS_CANCELLED,
        "computations stopped because their call was cancelled"
    );
    metrics::describe_counter!(
        PANICS,
        "panics caught around computations and registrations, each answered INTERNAL"
    );
    metrics::describe_counter!(TLS_HANDSHAKES, "TLS handshakes completed");
    metrics::describe_counter!(
        TLS_HANDSHAKE_FAILURES,
        "TLS handshakes that failed, by reason; the connection was dropped"
    );
    metrics::describe_counter!(
        TLS_RELOADS,
        "TLS configuration reloads by outcome; a failed one keeps the previous configuration"
    );
    metrics::describe_gauge!(REGISTERED_MODELS, "model versions registered");
    metrics::describe_gauge!(
        STREAM_IN_FLIGHT,
        "ExplainStream requests read and not yet handed to the transport"
    );
    metrics::describe_gauge!(
        ATTRIBUTION_MEAN_ABS,
        "mean |attribution| per model and player over the last closed drift window"
    );
    metrics::describe_gauge!(
        ATTRIBUTION_STABILITY,
        "stability index of the last closed drift window against the earlier ones, per model and player"
    );
    metrics::describe_counter!(
        ATTRIBUTION_LOG_DROPPED,
        "attribution-log lines dropped because the writer's queue was full"
    );
    metrics::describe_counter!(
        ATTRIBUTION_LOG_ERRORS,
        "attribution-log lines that could not be serialised, written, flushed or rotated, by step"
    );
    metrics::describe_counter!(
        ITEMS,
        "ExplainBatch instances and ExplainStream requests answered, by rpc and code"
    );
    metrics::describe_gauge!(
        STORE_LISTENING,
        "1 while the PostgreSQL store's listening connection is up"
    );
    metrics::describe_counter!(
        STORE_REREADS,
        "full re-reads of the PostgreSQL store, by outcome"
    );
    metrics::describe_counter!(RECORDS_SKIPPED, "stored records that could not be served");
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bad_filter_is_refused_with_the_filter_named() {
        // EnvFilter rejects an unparsable level (common practice, no source).
        let err = init_tracing(LogFormat::Human, "apportion=loudest").unwrap_err();
        assert!(err.to_string().contains("apportion=loudest"), "{err}");
    }
}
