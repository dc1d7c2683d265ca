//! Typed errors of the computation crate.
//! PLACEHOLDER: to be completed by the model-file work.

/// Why a model file was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ModelError {
    #[error("{path}: {message}")]
    Invalid { path: String, message: String },
}

/// Why a row could not be evaluated.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EvalError {
    #[error("row has {got} values, the model has {expected} features")]
    RowLength { expected: usize, got: usize },
}
