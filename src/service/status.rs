//! The service layer's one error type and the one place where errors become
//! gRPC statuses. Every error has a kind (engine, registry and service
//! alike), and each kind maps to one code: bad input is INVALID_ARGUMENT
//! naming the API field, an unknown model NOT_FOUND, a model or background
//! that cannot serve a well-formed request FAILED_PRECONDITION, a refused
//! admission RESOURCE_EXHAUSTED, an exact computation stopped by its
//! deadline DEADLINE_EXCEEDED (one stopped by its call's cancellation
//! CANCELLED, which no caller is left to read), storage trouble UNAVAILABLE,
//! and INTERNAL is kept for bugs.

use tonic::{Code, Status};

use crate::engine::{EngineError, ErrorKind};
use crate::registry::RegistryError;

/// Why the service refused or failed a call.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    /// Bad input, from the service's own checks or the engine's; names the
    /// field.
    #[error("{0}")]
    Invalid(#[from] EngineError),
    #[error("{0}")]
    Registry(#[from] RegistryError),
    /// A feature this build does not have.
    #[error("{0}")]
    Unimplemented(String),
    /// Admission control refused the work: the compute pool is predicted
    /// to have no free thread early enough for the call to finish in time.
    /// `retry_after` is the predicted wait, sent in the
    /// [`RETRY_AFTER_METADATA`] trailer.
    #[error("{message}")]
    Busy {
        message: String,
        retry_after: std::time::Duration,
    },
    /// The server is draining before it stops: new calls are refused, and
    /// computations still running at the drain timeout are stopped.
    #[error("{0}")]
    ShuttingDown(String),
    /// The answer was ready only after the call's deadline: it is not sent.
    #[error("{0}")]
    Late(String),
    /// A bug: an engine panic or a broken invariant.
    #[error("internal error: {0}")]
    Internal(String),
    #[error("the gRPC server failed: {0}")]
    Transport(#[from] tonic::transport::Error),
    #[error("the reflection service could not be built: {0}")]
    Reflection(#[from] tonic_reflection::server::Error),
    #[error("{0}")]
    Telemetry(#[from] crate::telemetry::TelemetryError),
    /// The attribution log's file cannot be opened (at start only).
    #[error("attribution_log: {0}")]
    AttributionLog(std::io::Error),
    /// The token file cannot be used (at start only).
    #[error("tokens_file: {0}")]
    Tokens(#[from] super::auth::TokenFileError),
    /// A TLS file cannot be used (at start; a reload keeps the old files).
    #[error("{0}")]
    Tls(#[from] super::tls::TlsError),
    /// A listener could not be set up.
    #[error("{0}")]
    Io(#[from] std::io::Error),
}

impl ServiceError {
    /// An INVALID_ARGUMENT about `field`.
    pub fn invalid(field: impl Into<String>, message: impl Into<String>) -> ServiceError {
        ServiceError::Invalid(EngineError::new(field, message))
    }
}

/// The API's name for a field the engine or registry names in its own
/// terms, so every message points at something the caller can change.
fn api_field(field: &str) -> &str {
    match field {
        "width" => "neighbor_width",
        "kernel.width" => "kernel_width",
        "dataset.labels" => "dataset_labels",
        "dataset.rows" => "dataset",
        "players" => "features",
        other => other,
    }
}

impl ServiceError {
    /// Whose fault the error is, in the shared vocabulary of kinds.
    pub fn kind(&self) -> ErrorKind {
        match self {
            ServiceError::Invalid(engine) => engine.kind,
            ServiceError::Registry(registry) => registry.kind(),
            ServiceError::Unimplemented(_) => ErrorKind::Unimplemented,
            ServiceError::Busy { .. } => ErrorKind::ResourceExhausted,
            ServiceError::ShuttingDown(_) => ErrorKind::Unavailable,
            ServiceError::Late(_) => ErrorKind::DeadlineExceeded,
            ServiceError::Internal(_)
            | ServiceError::Transport(_)
            | ServiceError::Reflection(_)
            | ServiceError::Telemetry(_)
            | ServiceError::Tokens(_)
            | ServiceError::AttributionLog(_)
            | ServiceError::Tls(_)
            | ServiceError::Io(_) => ErrorKind::Internal,
        }
    }
}

/// The one mapping from error kinds to gRPC status codes.
fn code_of(kind: ErrorKind) -> Code {
    match kind {
        ErrorKind::InvalidArgument => Code::InvalidArgument,
        ErrorKind::NotFound => Code::NotFound,
        ErrorKind::FailedPrecondition => Code::FailedPrecondition,
        ErrorKind::ResourceExhausted => Code::ResourceExhausted,
        ErrorKind::DeadlineExceeded => Code::DeadlineExceeded,
        ErrorKind::Cancelled => Code::Cancelled,
        ErrorKind::Unimplemented => Code::Unimplemented,
        ErrorKind::Unavailable => Code::Unavailable,
        ErrorKind::Internal => Code::Internal,
    }
}

/// The status a caller receives for `error`: the code its kind maps to,
/// and a message that starts with the API's name of the field at fault.
pub fn status_of(error: &ServiceError) -> Status {
    let engine = match error {
        ServiceError::Invalid(engine) | ServiceError::Registry(RegistryError::Invalid(engine)) => {
            Some(engine)
        }
        _ => None,
    };
    let message = match engine {
        Some(engine) => format!("{}: {}", api_field(&engine.field), engine.message),
        None => error.to_string(),
    };
    let mut status = Status::new(code_of(error.kind()), message);
    if let ServiceError::Busy { retry_after, .. } = error {
        let millis = retry_after.as_millis().max(1).to_string();
        // Digits are always a valid metadata value.
        if let Ok(value) = millis.parse() {
            status.metadata_mut().insert(RETRY_AFTER_METADATA, value);
        }
    }
    status
}

/// The metadata key of a refusal's retry hint: milliseconds after which the
/// compute pool is predicted to have room for the same call.
pub const RETRY_AFTER_METADATA: &str = "apportion-retry-after-ms";

/// The status for one that tonic made itself, before any handler ran, where
/// it differs from gRPC's table: tonic refuses a message over the server's
/// maximum (`max_decoding_message_size`, `max_encoding_message_size`) with
/// OUT_OF_RANGE, where the table says RESOURCE_EXHAUSTED for a message
/// larger than the configured maximum (gRPC status codes, grpc.io
/// documentation). The services never answer OUT_OF_RANGE themselves
/// ([`code_of`] has no kind for it), so every OUT_OF_RANGE is tonic's.
pub fn transport_status(status: &Status) -> Option<Status> {
    (status.code() == Code::OutOfRange).then(|| {
        Status::new(
            Code::ResourceExhausted,
            format!(
                "the message is over this server's maximum size (setting max_message_mib): {}; \
                 send a smaller message (fewer background or data set rows, a smaller model) or \
                 raise max_message_mib",
                status.message()
            ),
        )
    })
}

impl From<ServiceError> for Status {
    fn from(error: ServiceError) -> Status {
        status_of(&error)
    }
}

/// The error of one batch instance or stream request, carried in its
/// item: the same code and message its unary call would have had.
pub fn item_error(error: &ServiceError) -> super::proto::ItemError {
    let status = status_of(error);
    super::proto::ItemError {
        code: status.code() as i32,
        code_name: code_label(status.code()).to_string(),
        message: status.message().to_string(),
    }
}

/// The status code as a metric label (`OK`, `INVALID_ARGUMENT`, …), spelled
/// as in the gRPC status code list.
pub fn code_label(code: Code) -> &'static str {
    match code {
        Code::Ok => "OK",
        Code::Cancelled => "CANCELLED",
        Code::Unknown => "UNKNOWN",
        Code::InvalidArgument => "INVALID_ARGUMENT",
        Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        Code::NotFound => "NOT_FOUND",
        Code::AlreadyExists => "ALREADY_EXISTS",
        Code::PermissionDenied => "PERMISSION_DENIED",
        Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        Code::FailedPrecondition => "FAILED_PRECONDITION",
        Code::Aborted => "ABORTED",
        Code::OutOfRange => "OUT_OF_RANGE",
        Code::Unimplemented => "UNIMPLEMENTED",
        Code::Internal => "INTERNAL",
        Code::Unavailable => "UNAVAILABLE",
        Code::DataLoss => "DATA_LOSS",
        Code::Unauthenticated => "UNAUTHENTICATED",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The code choices follow the gRPC status code guide (grpc.io, "Status
    // codes and their use in gRPC").

    #[test]
    fn tonic_size_refusals_become_resource_exhausted() {
        let tonic_own = Status::out_of_range("decoded message length too large");
        let mapped = transport_status(&tonic_own).expect("remapped");
        assert_eq!(mapped.code(), Code::ResourceExhausted);
        assert!(mapped.message().contains("max_message_mib"), "{mapped:?}");
        assert!(transport_status(&Status::internal("bug")).is_none());
    }

    #[test]
    fn engine_fields_are_renamed_to_the_api_fields() {
        let status = status_of(&ServiceError::invalid("width", "must be > 0"));
        assert_eq!(status.code(), Code::InvalidArgument);
        assert!(
            status.message().starts_with("neighbor_width:"),
            "{}",
            status.message()
        );
    }

    #[test]
    fn each_error_kind_gets_its_code() {
        let not_found = ServiceError::Registry(RegistryError::NotFound {
            model_id: "m".into(),
            version: 3,
        });
        assert_eq!(status_of(&not_found).code(), Code::NotFound);
        let busy = status_of(&ServiceError::Busy {
            message: "busy".into(),
            retry_after: std::time::Duration::from_micros(12_400),
        });
        assert_eq!(busy.code(), Code::ResourceExhausted);
        assert_eq!(busy.metadata().get(RETRY_AFTER_METADATA).unwrap(), "12");
        assert_eq!(
            status_of(&ServiceError::ShuttingDown("draining".into())).code(),
            Code::Unavailable
        );
        assert_eq!(
            status_of(&ServiceError::Late("late".into())).code(),
            Code::DeadlineExceeded
        );
        assert_eq!(
            status_of(&ServiceError::Unimplemented("onnx".into())).code(),
            Code::Unimplemented
        );
        assert_eq!(
            status_of(&ServiceError::Internal("bug".into())).code(),
            Code::Internal
        );
        let stopped = |kind| ServiceError::Invalid(EngineError::of_kind(kind, "budget_ms", "late"));
        let late = status_of(&stopped(ErrorKind::DeadlineExceeded));
        assert_eq!(late.code(), Code::DeadlineExceeded);
        assert!(
            late.message().starts_with("budget_ms:"),
            "{}",
            late.message()
        );
        assert_eq!(
            status_of(&stopped(ErrorKind::Cancelled)).code(),
            Code::Cancelled
        );
    }
}
