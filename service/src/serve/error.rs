//! What can go wrong while serving a request, in domain terms. [`crate::serve::status`] turns each case into a
//! gRPC status; nothing else does.

use probity_models::EvalError;

/// Why a request was not answered.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// A request field is malformed, out of range or breaks the route's policy. `field` is a path into the request
    /// such as `rows[3].named.values["amount"]`.
    #[error("{field}: {message}")]
    InvalidField {
        /// Path of the offending field.
        field: String,
        /// What is wrong with it.
        message: String,
    },
    /// The request names a route the configuration does not have.
    #[error("route `{route}` is not configured (configured: {known})")]
    RouteNotFound {
        /// The route asked for.
        route: String,
        /// The configured route names, comma-separated.
        known: String,
    },
    /// The route exists but the model it serves is not loaded.
    #[error("route `{route}` is not ready: model `{model}` is not loaded (loaded: {loaded})")]
    RouteNotReady {
        /// The route asked for.
        route: String,
        /// The model it serves.
        model: String,
        /// The loaded models' names, comma-separated, or `none`.
        loaded: String,
    },
    /// No loaded model has this name.
    #[error("model `{model}` is not loaded")]
    ModelNotFound {
        /// The model asked for.
        model: String,
    },
    /// The engine refused a row; `field` names the row (`row` or `rows[i]`).
    #[error("{field}: {error}")]
    Eval {
        /// Path of the row in the request.
        field: String,
        /// The engine's error.
        error: EvalError,
    },
    /// An explanation was asked of a model that cannot give one (a tree ensemble without per-node cover).
    #[error("model `{model}`: {message}")]
    NotExplainable {
        /// The model's name.
        model: String,
        /// Why, naming the missing key.
        message: String,
    },
    /// The deadline passed before all rows were scored.
    #[error("deadline exceeded after {rows_done} of {rows} rows")]
    DeadlineExceeded {
        /// Rows scored before the deadline.
        rows_done: usize,
        /// Rows asked for.
        rows: usize,
    },
    /// The prediction store is not configured (`store.directory`), so outcomes and reports are not available.
    #[error("the prediction store is off on this server (set store.directory)")]
    StoreOff,
    /// The prediction store failed.
    #[error("prediction store: {0}")]
    Store(#[from] crate::store::StoreError),
    /// A call on a route with `record = "before-answer"` whose predictions were not committed: it is refused
    /// rather than answered without its record.
    #[error(
        "the prediction store did not record this call's predictions ({0}); the call is not answered, send it again"
    )]
    NotRecorded(crate::store::writer::NotRecorded),
    /// The call's deadline passed while it waited for its predictions to be committed (`record = "before-answer"`).
    #[error(
        "the deadline passed before this call's predictions were committed to the prediction store; the call is \
         not answered (its predictions may still be recorded)"
    )]
    RecordDeadline,
    /// A call without valid credentials.
    #[error("{reason}")]
    Unauthenticated {
        /// What is missing or wrong (never a token).
        reason: String,
    },
    /// A known caller without the role the call needs.
    #[error("{caller} does not have {needs}, which this call needs")]
    PermissionDenied {
        /// The caller's configured name (or the certificate name of an unconfigured client certificate).
        caller: String,
        /// What the call needs, e.g. "the role `admin`".
        needs: String,
    },
    /// A method the access table does not list.
    #[error("this method is not served")]
    UnknownMethod,
    /// A promotion was refused.
    #[error("{0}")]
    Promotion(#[from] crate::serve::promotion::PromotionError),
    /// A comparison could not be built from the log (no such models on the route, ...).
    #[error("{0}")]
    Comparison(String),
    /// The model directory could not be listed during a reload.
    #[error("cannot read the model directory {dir}: {error}")]
    ModelDirectory {
        /// The directory.
        dir: String,
        /// The I/O error text.
        error: String,
    },
}

impl ServeError {
    /// An [`ServeError::InvalidField`].
    pub fn invalid(field: impl Into<String>, message: impl Into<String>) -> Self {
        ServeError::InvalidField {
            field: field.into(),
            message: message.into(),
        }
    }
}
