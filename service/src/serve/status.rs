//! The one mapping from [`ServeError`] to a gRPC [`Status`]. Every match is exhaustive with no wildcard arm, so a
//! new error case breaks the build here until it is given a code. Details that would only help an attacker or
//! confuse a caller (file system paths, I/O errors, engine invariants) are logged, and the caller gets a plain
//! message.

use probity_models::EvalError;
use tonic::{Code, Status};

use crate::serve::error::ServeError;
use crate::serve::promotion::PromotionError;

impl From<ServeError> for Status {
    fn from(error: ServeError) -> Status {
        let code = code_of(&error);
        let message = match &error {
            ServeError::ModelDirectory { dir, error: io } => {
                tracing::error!(%dir, error = %io, "model directory unreadable");
                "the model directory cannot be read; the server log has the details".to_string()
            }
            ServeError::Eval { field, error: eval } if code == Code::Internal => {
                tracing::error!(%field, error = %eval, "engine refused a row the service had checked");
                format!("{field}: internal error while scoring")
            }
            ServeError::Store(store)
                if store.write_failure() != crate::store::WriteFailure::Other =>
            {
                // Logged once per kind by the log's failure count (store::faults), not once per call.
                let why = match store.write_failure() {
                    crate::store::WriteFailure::DiskFull => "its disk is full",
                    _ => "its directory is read-only",
                };
                format!(
                    "the prediction store cannot be written now ({why}); nothing of this call was recorded, send it \
                     again later"
                )
            }
            ServeError::Store(store) if code == Code::Internal => {
                tracing::error!(error = %store, "prediction store failed");
                "the prediction store failed; the server log has the details".to_string()
            }
            ServeError::Promotion(PromotionError::History { file, error: io }) => {
                tracing::error!(%file, error = %io, "route history not written; change refused");
                "the change could not be recorded in the route history, so it was not made; the server log has the details"
                    .to_string()
            }
            ServeError::Store(_) | ServeError::StoreOff => error.to_string(),
            ServeError::Unauthenticated { .. }
            | ServeError::PermissionDenied { .. }
            | ServeError::UnknownMethod
            | ServeError::Promotion(_)
            | ServeError::Comparison(_) => error.to_string(),
            ServeError::Eval { .. }
            | ServeError::InvalidField { .. }
            | ServeError::RouteNotFound { .. }
            | ServeError::RouteNotReady { .. }
            | ServeError::ModelNotFound { .. }
            | ServeError::NotExplainable { .. }
            | ServeError::DeadlineExceeded { .. }
            | ServeError::NotRecorded(_)
            | ServeError::RecordDeadline => error.to_string(),
        };
        Status::new(code, message)
    }
}

/// The gRPC code of a serving error.
pub fn code_of(error: &ServeError) -> Code {
    match error {
        ServeError::InvalidField {
            field: _,
            message: _,
        } => Code::InvalidArgument,
        ServeError::RouteNotFound { route: _, known: _ } => Code::NotFound,
        ServeError::RouteNotReady {
            route: _,
            model: _,
            loaded: _,
        } => Code::Unavailable,
        ServeError::ModelNotFound { model: _ } => Code::NotFound,
        ServeError::Eval { field: _, error } => eval_code(error),
        ServeError::NotExplainable {
            model: _,
            message: _,
        } => Code::FailedPrecondition,
        ServeError::DeadlineExceeded {
            rows_done: _,
            rows: _,
        } => Code::DeadlineExceeded,
        ServeError::ModelDirectory { dir: _, error: _ } => Code::FailedPrecondition,
        ServeError::StoreOff => Code::FailedPrecondition,
        ServeError::Store(error) => log_code(error),
        // Retryable: the store may take it a moment later (or on another replica).
        ServeError::NotRecorded(_) => Code::Unavailable,
        ServeError::RecordDeadline => Code::DeadlineExceeded,
        ServeError::Unauthenticated { reason: _ } => Code::Unauthenticated,
        ServeError::PermissionDenied {
            caller: _,
            needs: _,
        } => Code::PermissionDenied,
        ServeError::UnknownMethod => Code::Unimplemented,
        ServeError::Promotion(error) => match error {
            PromotionError::NoRoute(_) => Code::NotFound,
            PromotionError::NotAChallenger {
                route: _,
                model: _,
                known: _,
            } => Code::FailedPrecondition,
            PromotionError::History { file: _, error: _ } => Code::Internal,
            PromotionError::BadModel(_) => Code::InvalidArgument,
            PromotionError::NoEarlierChampion(_) => Code::FailedPrecondition,
            PromotionError::NotOnRoute { route: _, model: _ } => Code::FailedPrecondition,
            PromotionError::NotLoaded {
                route: _,
                model: _,
                loaded: _,
            } => Code::FailedPrecondition,
        },
        ServeError::Comparison(_) => Code::FailedPrecondition,
    }
}

/// Prediction store errors: a log that is shutting down is unavailable; a full disk is RESOURCE_EXHAUSTED and a
/// read-only one UNAVAILABLE (both retryable once the operator has made room or remounted; the gRPC status code
/// list, grpc/doc/statuscodes.md, names "the entire file system is out of space" under RESOURCE_EXHAUSTED);
/// anything else is ours.
fn log_code(error: &crate::store::StoreError) -> Code {
    use crate::store::{StoreError, WriteFailure};
    let by_failure = |error: &StoreError| match error.write_failure() {
        WriteFailure::DiskFull => Code::ResourceExhausted,
        WriteFailure::ReadOnly => Code::Unavailable,
        WriteFailure::Other => Code::Internal,
    };
    match error {
        StoreError::Closed => Code::Unavailable,
        StoreError::Database { what: _, source: _ } => by_failure(error),
        StoreError::Directory { dir: _, source: _ } => by_failure(error),
        StoreError::NotWritable { dir: _, source: _ } => by_failure(error),
        StoreError::Schema {
            found: _,
            supported: _,
        } => Code::Internal,
        StoreError::Corrupt { what: _ } => Code::Internal,
        // The report's working file: a full disk is retryable once there is room.
        StoreError::Spill(_) => by_failure(error),
        StoreError::Postgres {
            what: _,
            message: _,
            code: _,
            lost: true,
        } => Code::Unavailable,
        StoreError::Postgres {
            what: _,
            message: _,
            code: _,
            lost: false,
        } => by_failure(error),
    }
}

/// Engine errors: a value the model cannot handle is the caller's; a shape error means the service built a bad
/// row, which is ours.
fn eval_code(error: &EvalError) -> Code {
    match error {
        EvalError::MissingValue { feature: _ } => Code::InvalidArgument,
        EvalError::UnknownCategory { feature: _ } => Code::InvalidArgument,
        EvalError::Overflow {
            feature: _,
            contribution: _,
        } => Code::InvalidArgument,
        EvalError::InRow { row: _, error } => eval_code(error),
        EvalError::RowLength {
            expected: _,
            got: _,
        } => Code::Internal,
        EvalError::BatchShape {
            values: _,
            out: _,
            features: _,
        } => Code::Internal,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn engine_value_errors_are_the_callers_and_shape_errors_ours() {
        let missing = ServeError::Eval {
            field: "rows[2]".into(),
            error: EvalError::InRow {
                row: 2,
                error: Box::new(EvalError::MissingValue {
                    feature: "amount".into(),
                }),
            },
        };
        let status = Status::from(missing);
        assert_eq!(status.code(), Code::InvalidArgument);
        assert!(status.message().contains("amount"), "{}", status.message());

        let shape = ServeError::Eval {
            field: "row".into(),
            error: EvalError::RowLength {
                expected: 3,
                got: 2,
            },
        };
        let status = Status::from(shape);
        assert_eq!(status.code(), Code::Internal);
        assert!(
            !status.message().contains("3 features"),
            "internal detail leaked: {}",
            status.message()
        );
    }
}
