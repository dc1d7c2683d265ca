//! Typed errors of the computation crate.
//!
//! Every error about a model file names a JSON path in one style: keys joined by `.`, array positions in brackets,
//! for example `ensemble.trees[3].nodes[17].left`; the document itself is `$`.

/// Why a model file was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ModelError {
    /// The text is not well-formed JSON (or ends early).
    #[error("line {line}, column {column}: {message}")]
    Syntax {
        /// 1-based line of the offending character.
        line: usize,
        /// 1-based column of the offending character.
        column: usize,
        /// What the JSON reader expected.
        message: String,
    },
    /// Well-formed JSON of the wrong shape: an unknown, missing or duplicated key, or a value of the wrong type.
    #[error("{path}: {message}")]
    Structure {
        /// JSON path of the offending value.
        path: String,
        /// What is wrong with it.
        message: String,
    },
    /// A value of the right type that breaks a rule of the format (`docs/model-format.md`).
    #[error("{path}: {message}")]
    Rule {
        /// JSON path of the offending value.
        path: String,
        /// The rule broken, with the offending value.
        message: String,
    },
    /// A count above one of the format's limits.
    #[error("{path}: {got} {what}, the limit is {limit}")]
    TooLarge {
        /// JSON path of the offending value (`$` for the document).
        path: String,
        /// What was counted (`bytes`, `trees`, `nodes in all`, ...).
        what: &'static str,
        /// The count found.
        got: usize,
        /// The format's limit.
        limit: usize,
    },
}

impl ModelError {
    /// The JSON path the error names (`None` for a syntax error, which has a line and column instead).
    pub fn path(&self) -> Option<&str> {
        match self {
            ModelError::Syntax { .. } => None,
            ModelError::Structure { path, .. }
            | ModelError::Rule { path, .. }
            | ModelError::TooLarge { path, .. } => Some(path),
        }
    }

    pub(crate) fn rule(path: impl Into<String>, message: impl Into<String>) -> Self {
        ModelError::Rule {
            path: path.into(),
            message: message.into(),
        }
    }
}

/// Why a row could not be evaluated.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EvalError {
    /// A single row of the wrong length.
    #[error("row has {got} values, the model has {expected} features")]
    RowLength {
        /// The number of features.
        expected: usize,
        /// The row's length.
        got: usize,
    },
    /// A batch whose buffers do not fit together: `values` must be `out * features` long.
    #[error("batch of {values} values and {out} outputs does not fit {features} features per row")]
    BatchShape {
        /// Length of the row-major value buffer.
        values: usize,
        /// Length of the output buffer (the number of rows).
        out: usize,
        /// The number of features per row.
        features: usize,
    },
    /// A linear term met a missing value and the model gives no contribution for that case.
    #[error("feature `{feature}` is missing and the model has no rule for a missing value")]
    MissingValue {
        /// The feature's name.
        feature: String,
    },
    /// A linear categorical term met an unknown category and the model gives no contribution for that case.
    #[error("feature `{feature}` has a category the model does not know and no rule for it")]
    UnknownCategory {
        /// The feature's name.
        feature: String,
    },
    /// A linear model's terms overflowed on extreme (finite) values: contributions of `+inf` and `-inf`, or
    /// `0 * inf`, leave the margin undefined. `feature` is the first term whose contribution is not finite.
    #[error(
        "the margin is not a number: feature `{feature}` contributes {contribution}; values this extreme \
         overflow the model's arithmetic"
    )]
    Overflow {
        /// The feature of the first term with a non-finite contribution.
        feature: String,
        /// That term's contribution (infinite or NaN).
        contribution: f64,
    },
    /// An error in one row of a batch.
    #[error("row {row}: {error}")]
    InRow {
        /// 0-based position of the row in the batch.
        row: usize,
        /// What went wrong in it.
        error: Box<EvalError>,
    },
}

/// Why one text cell could not be encoded for a feature (see [`crate::Schema::encode_text`]).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CellError {
    /// A numeric feature got text that is not a number and not a missing-value marker.
    #[error("feature `{feature}`: `{text}` is not a number")]
    NotANumber {
        /// The feature's name.
        feature: String,
        /// The text as given.
        text: String,
    },
    /// The feature index is not in the schema.
    #[error("feature index {index} is out of range (the schema has {len} features)")]
    NoSuchFeature {
        /// The index asked for.
        index: usize,
        /// The number of features.
        len: usize,
    },
}
