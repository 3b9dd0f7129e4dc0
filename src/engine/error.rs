//! The engine's one error type: every refusal names the offending field and
//! says how to fix it, so the service can pass it on unchanged.

/// Why the engine refused a request. Nothing is computed when one is
/// returned.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{field}: {message}")]
pub struct EngineError {
    /// The request field at fault, as the API names it (`instance`,
    /// `fixed_values`, `label`, `estimator`, …).
    pub field: String,
    /// What is wrong and what would be accepted instead.
    pub message: String,
}

impl EngineError {
    pub fn new(field: impl Into<String>, message: impl Into<String>) -> EngineError {
        EngineError {
            field: field.into(),
            message: message.into(),
        }
    }
}

pub type Result<T> = std::result::Result<T, EngineError>;
