//! Write failures of the prediction store (a full disk, a read-only file system, any other I/O or database error):
//! each one counted, and logged once per kind instead of once per batch or call.
//!
//! Every failed write adds one to `probity_store_write_failures_total{operation, reason}` and sets
//! `probity_store_write_failing{operation}` to 1. The first failure of each reason in a run of failures of one
//! operation is logged at error level with the error text; the rest of the run is only counted. The first success
//! after a run sets the gauge back to 0 and logs one line saying how many writes failed. So a disk that stays full
//! for an hour gives one error line and one recovery line per operation, not one line per batch. What the failed
//! writes carried is counted where it is lost: predictions in `probity_store_predictions_dropped_total{reason}`
//! (the same reason), outcomes as the call's error status.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::Mutex;
use std::time::Instant;

use super::{StoreError, WriteFailure};

/// Failed writes, by operation and reason.
pub const WRITE_FAILURES: &str = "probity_store_write_failures_total";
/// 1 while an operation's last write failed, 0 after a success.
pub const FAILING: &str = "probity_store_write_failing";

/// What the failed write was doing (the `operation` label).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Operation {
    /// A batch of predictions from the queue.
    Predictions,
    /// Recording a model version's facts.
    ModelVersion,
    /// An outcome call.
    Outcomes,
    /// Maturity, hold and retention sweeps.
    Sweep,
}

impl Operation {
    /// Every operation.
    pub const ALL: [Operation; 4] = [
        Operation::Predictions,
        Operation::ModelVersion,
        Operation::Outcomes,
        Operation::Sweep,
    ];

    /// The metric label.
    pub fn as_str(self) -> &'static str {
        match self {
            Operation::Predictions => "predictions",
            Operation::ModelVersion => "model_version",
            Operation::Outcomes => "outcomes",
            Operation::Sweep => "sweep",
        }
    }
}

/// A run of failures of one operation.
struct Run {
    failures: u64,
    logged: BTreeSet<WriteFailure>,
    since: Instant,
}

/// The failure runs in progress.
#[derive(Default)]
pub struct Failures {
    runs: Mutex<BTreeMap<Operation, Run>>,
}

impl Failures {
    /// Describes the metric families.
    pub fn describe() {
        metrics::describe_counter!(
            WRITE_FAILURES,
            "Failed writes to the prediction store, by operation and reason (disk_full, read_only, write_error)."
        );
        metrics::describe_gauge!(
            FAILING,
            "1 while the last write of an operation to the prediction store failed."
        );
        // Every operation's gauge exists from the start at 0, so an alert on it (deploy/prometheus) sees the series
        // before the first failure, and a missing series means a missing log rather than a healthy one.
        for operation in Operation::ALL {
            metrics::gauge!(FAILING, "operation" => operation.as_str()).set(0.0);
        }
    }

    /// Counts a failed write (and logs it if it is the first of its reason in this run); returns its reason.
    pub fn failed(&self, operation: Operation, error: &StoreError) -> WriteFailure {
        let reason = error.write_failure();
        metrics::counter!(WRITE_FAILURES, "operation" => operation.as_str(), "reason" => reason.as_str())
            .increment(1);
        metrics::gauge!(FAILING, "operation" => operation.as_str()).set(1.0);
        let mut runs = self.runs.lock().unwrap_or_else(|e| e.into_inner());
        let run = runs.entry(operation).or_insert_with(|| Run {
            failures: 0,
            logged: BTreeSet::new(),
            since: Instant::now(),
        });
        run.failures += 1;
        if run.logged.insert(reason) {
            tracing::error!(
                operation = operation.as_str(),
                reason = reason.as_str(),
                %error,
                "prediction store write failed; further failures are counted in {WRITE_FAILURES} and logged again \
                 only after writes succeed"
            );
        }
        reason
    }

    /// Records a successful write: ends the operation's run of failures, if any, with one line.
    pub fn succeeded(&self, operation: Operation) {
        let mut runs = self.runs.lock().unwrap_or_else(|e| e.into_inner());
        if let Some(run) = runs.remove(&operation) {
            drop(runs);
            metrics::gauge!(FAILING, "operation" => operation.as_str()).set(0.0);
            tracing::warn!(
                operation = operation.as_str(),
                failed_writes = run.failures,
                seconds = run.since.elapsed().as_secs(),
                "prediction store writes succeed again"
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::sqlite::{Durability, FILE_NAME};
    use crate::store::{PredictionRecord, SqliteStore, Store};

    fn record(i: usize) -> PredictionRecord {
        PredictionRecord {
            prediction_id: format!("p-{i}-{}", "x".repeat(100)),
            route: "r".into(),
            model: "m".into(),
            version: "1".into(),
            role: "champion".into(),
            time_ms: 0,
            margin: 0.0,
            log_odds: 0.0,
            adjusted_log_odds: 0.0,
            probability: 0.5,
            subject_key: String::new(),
            tags: Default::default(),
            served: Default::default(),
        }
    }

    #[test]
    fn sqlite_errors_are_told_apart_by_kind() {
        let dir = tempfile::tempdir().unwrap();
        let mut store = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
        store.insert_predictions(&[record(0)]).unwrap();
        drop(store);

        // A database that may not grow any more answers SQLITE_FULL, as a full disk does.
        let conn = rusqlite::Connection::open(dir.path().join(FILE_NAME)).unwrap();
        let pages: i64 = conn
            .pragma_query_value(None, "page_count", |r| r.get(0))
            .unwrap();
        conn.pragma_update(None, "max_page_count", pages).unwrap();
        let source = conn
            .execute_batch(&format!(
                "CREATE TABLE filler (x TEXT); INSERT INTO filler VALUES ('{}');",
                "y".repeat(100_000)
            ))
            .unwrap_err();
        let full = StoreError::Database {
            what: "test",
            source,
        };
        assert_eq!(full.write_failure(), WriteFailure::DiskFull, "{full}");
        drop(conn);

        // A connection that may only read answers SQLITE_READONLY.
        let conn = rusqlite::Connection::open_with_flags(
            dir.path().join(FILE_NAME),
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
        )
        .unwrap();
        let source = conn.execute("DELETE FROM predictions", []).unwrap_err();
        let read_only = StoreError::Database {
            what: "test",
            source,
        };
        assert_eq!(
            read_only.write_failure(),
            WriteFailure::ReadOnly,
            "{read_only}"
        );

        // Anything else is a plain write error.
        let conn = rusqlite::Connection::open(dir.path().join(FILE_NAME)).unwrap();
        let source = conn
            .execute("INSERT INTO nowhere VALUES (1)", [])
            .unwrap_err();
        let other = StoreError::Database {
            what: "test",
            source,
        };
        assert_eq!(other.write_failure(), WriteFailure::Other);
        let io = StoreError::Directory {
            dir: "d".into(),
            source: std::io::Error::from(std::io::ErrorKind::StorageFull),
        };
        assert_eq!(io.write_failure(), WriteFailure::DiskFull);
    }

    #[test]
    fn a_run_of_failures_is_counted_whole_and_ended_by_a_success() {
        let failures = Failures::default();
        let full = StoreError::Directory {
            dir: "d".into(),
            source: std::io::Error::from(std::io::ErrorKind::StorageFull),
        };
        for _ in 0..5 {
            assert_eq!(
                failures.failed(Operation::Predictions, &full),
                WriteFailure::DiskFull
            );
        }
        failures.failed(Operation::Outcomes, &full);
        {
            let runs = failures.runs.lock().unwrap();
            assert_eq!(runs[&Operation::Predictions].failures, 5);
            assert_eq!(
                runs[&Operation::Predictions].logged,
                BTreeSet::from([WriteFailure::DiskFull])
            );
        }
        failures.succeeded(Operation::Predictions);
        let runs = failures.runs.lock().unwrap();
        assert!(!runs.contains_key(&Operation::Predictions));
        assert_eq!(runs[&Operation::Outcomes].failures, 1);
    }
}
