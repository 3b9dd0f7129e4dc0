//! The engine's one error type: every refusal names the offending field,
//! says how to fix it and carries a kind, so the service can tell the
//! caller's mistakes from the model's limits and its own faults.

/// Whose fault an error is, in the terms gRPC's status codes use; the
/// service maps each kind to one status.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ErrorKind {
    /// The caller asked for something malformed or contradictory.
    InvalidArgument,
    /// The caller named something that is not there.
    NotFound,
    /// The request is well formed, but the registered model or its
    /// background cannot serve it (a non-finite output, a background with
    /// missing values under a removal that needs complete rows).
    FailedPrecondition,
    /// A limit was reached: memory or a cap.
    ResourceExhausted,
    /// The deadline passed before an estimator that cannot return a
    /// partial answer (an exact one) finished.
    DeadlineExceeded,
    /// Whoever asked no longer wants the answer (the call was cancelled or
    /// dropped); the computation stopped early.
    Cancelled,
    /// A capability this build does not have.
    Unimplemented,
    /// A resource outside the request (storage, a database) failed and
    /// may recover; the operator's to fix.
    Unavailable,
    /// A broken invariant: a bug, never the caller's doing.
    Internal,
}

/// Why the engine refused or stopped a request. Refusals come before any
/// computing; only [`ErrorKind::DeadlineExceeded`] and
/// [`ErrorKind::Cancelled`] end a computation that had started.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{field}: {message}")]
pub struct EngineError {
    pub kind: ErrorKind,
    /// The request field at fault, as the API names it (`instance`,
    /// `fixed_values`, `label`, `estimator`, …).
    pub field: String,
    /// What is wrong and what would be accepted instead.
    pub message: String,
}

impl EngineError {
    /// An invalid argument: the most common refusal.
    pub fn new(field: impl Into<String>, message: impl Into<String>) -> EngineError {
        EngineError::of_kind(ErrorKind::InvalidArgument, field, message)
    }

    /// A well-formed request the registered model cannot serve.
    pub fn failed_precondition(
        field: impl Into<String>,
        message: impl Into<String>,
    ) -> EngineError {
        EngineError::of_kind(ErrorKind::FailedPrecondition, field, message)
    }

    pub fn of_kind(
        kind: ErrorKind,
        field: impl Into<String>,
        message: impl Into<String>,
    ) -> EngineError {
        EngineError {
            kind,
            field: field.into(),
            message: message.into(),
        }
    }
}

pub type Result<T> = std::result::Result<T, EngineError>;
