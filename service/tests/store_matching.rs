//! The prediction store's matching rules on the embedded store, driven through `PredictionStore` with a hand-moved
//! clock: idempotent outcomes, corrections, outcomes before their prediction (held, then unmatched), label maturity
//! at the exact instant, retention, and a reopen (what a restart sees) that keeps matching exactly-once.

#![allow(clippy::unwrap_used)]

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;
use std::time::Duration;

use probity::report;
use probity::store::sqlite::Durability;
use probity::store::writer::{ModelFacts, Queued};
use probity::store::{
    Clock, ModelVersionInfo, OutcomeInput, OutcomeStatus, PredictionRecord, PredictionStore,
    ReportFilter, SqliteStore, Store, StoreConfig,
};

struct Facts;

impl ModelFacts for Facts {
    fn version_info(&self) -> ModelVersionInfo {
        ModelVersionInfo {
            model: "m".into(),
            version: "v1".into(),
            base_rate: 0.1,
            reference: None,
            features: Vec::new(),
        }
    }
}

const T0: i64 = 1_700_000_000_000;
const DAY: i64 = 86_400_000;

fn record(id: &str, route: &str, time_ms: i64, h: f64) -> PredictionRecord {
    PredictionRecord {
        prediction_id: id.into(),
        route: route.into(),
        model: "m".into(),
        version: "v1".into(),
        role: "champion".into(),
        time_ms,
        margin: h,
        log_odds: h,
        adjusted_log_odds: h,
        probability: 1.0 / (1.0 + (-h).exp()),
        subject_key: String::new(),
        tags: BTreeMap::new(),
        served: Default::default(),
    }
}

fn queued(r: PredictionRecord) -> Queued {
    Queued {
        record: r,
        prior: 0.1,
        facts: Arc::new(Facts),
        features: None,
    }
}

fn outcome(id: &str, label: bool) -> OutcomeInput {
    OutcomeInput {
        prediction_id: id.into(),
        label,
        time_ms: None,
    }
}

fn config(dir: &std::path::Path) -> StoreConfig {
    StoreConfig {
        directory: Some(dir.to_path_buf()),
        flush_interval: Duration::from_millis(5),
        outcome_hold: Duration::from_millis(1000),
        retention: Duration::from_millis(u64::try_from(30 * DAY).unwrap()),
        maturity: [(
            "fraud".to_string(),
            Duration::from_millis(u64::try_from(10 * DAY).unwrap()),
        )]
        .into(),
        ..StoreConfig::default()
    }
}

fn start(dir: &std::path::Path, clock: &Arc<AtomicI64>) -> Arc<PredictionStore> {
    let store = SqliteStore::open(dir, Durability::Full).unwrap();
    PredictionStore::start(
        Box::new(store),
        config(dir),
        Clock::manual(Arc::clone(clock)),
    )
}

fn statuses(log: &PredictionStore, outcomes: &[OutcomeInput]) -> Vec<OutcomeStatus> {
    log.record_outcomes(outcomes)
        .unwrap()
        .into_iter()
        .map(|r| r.status)
        .collect()
}

fn series(log: &PredictionStore, route: &str) -> report::SeriesReport {
    let filter = ReportFilter {
        route: Some(route.into()),
        ..ReportFilter::default()
    };
    let r = log.with_store(|s| report::build(s, &filter)).unwrap();
    assert_eq!(r.series.len(), 1);
    r.series.into_iter().next().unwrap()
}

#[test]
fn matching_rules_maturity_hold_and_restart() {
    let dir = tempfile::tempdir().unwrap();
    let clock = Arc::new(AtomicI64::new(T0));
    let log = start(dir.path(), &clock);

    // An outcome before its prediction is held.
    assert_eq!(
        statuses(&log, &[outcome("early", true)]),
        [OutcomeStatus::Pending]
    );
    for (i, id) in ["a", "b", "c", "early"].iter().enumerate() {
        log.log(queued(record(id, "fraud", T0 + i as i64, 0.5 - i as f64)));
    }
    // The fraud route's second id, logged a day later, matures a day later.
    log.log(queued(record("late", "fraud", T0 + DAY, -1.0)));
    // A route without maturity.
    log.log(queued(record("x", "credit", T0, 0.0)));
    log.flush().unwrap();

    assert_eq!(
        statuses(
            &log,
            &[outcome("a", true), outcome("a", true), outcome("b", false)]
        ),
        [
            OutcomeStatus::Matched,
            OutcomeStatus::Duplicate,
            OutcomeStatus::Matched
        ]
    );
    // A changed label is a correction; the same changed label again is a duplicate.
    assert_eq!(
        statuses(
            &log,
            &[outcome("b", true), outcome("b", true), outcome("", true)]
        ),
        [
            OutcomeStatus::Corrected,
            OutcomeStatus::Duplicate,
            OutcomeStatus::Invalid
        ]
    );
    // An id that never comes is held until the hold period ends, then counted unmatched.
    assert_eq!(
        statuses(&log, &[outcome("ghost", false)]),
        [OutcomeStatus::Pending]
    );

    let s = series(&log, "fraud");
    assert_eq!(
        (s.predictions, s.with_outcome, s.immature, s.corrected),
        (5, 3, 2, 1)
    );

    clock.store(T0 + 999, Ordering::SeqCst);
    assert_eq!(log.sweep().unwrap(), (0, 0, 0), "hold not over yet");
    clock.store(T0 + 1000, Ordering::SeqCst);
    assert_eq!(
        log.sweep().unwrap(),
        (0, 1, 0),
        "ghost held 1000 ms, then unmatched"
    );

    // Maturity: "c" was logged at T0 + 2 and has no outcome; it settles exactly at T0 + 2 + 10 days.
    clock.store(T0 + 2 + 10 * DAY - 1, Ordering::SeqCst);
    assert_eq!(log.sweep().unwrap().0, 0, "one millisecond before maturity");
    clock.store(T0 + 2 + 10 * DAY, Ordering::SeqCst);
    assert_eq!(log.sweep().unwrap().0, 1, "exactly at maturity");
    let s = series(&log, "fraud");
    assert_eq!(
        (s.with_outcome, s.immature, s.settled_by_maturity),
        (4, 1, 1)
    );
    assert_eq!(series(&log, "credit").immature, 1, "no maturity on credit");

    // A real outcome after maturity replaces the settled negative.
    assert_eq!(
        statuses(&log, &[outcome("c", true)]),
        [OutcomeStatus::Corrected]
    );
    let before = series(&log, "fraud");
    log.close();
    drop(log);

    // Reopen: nothing lost, the same outcomes again change nothing.
    let log = start(dir.path(), &clock);
    let after = series(&log, "fraud");
    assert_eq!(
        (
            after.predictions,
            after.with_outcome,
            after.corrected,
            after.settled_by_maturity
        ),
        (
            before.predictions,
            before.with_outcome,
            before.corrected,
            before.settled_by_maturity
        )
    );
    assert_eq!(after.log_loss, before.log_loss);
    assert_eq!(
        statuses(
            &log,
            &[outcome("a", true), outcome("b", true), outcome("c", true)]
        ),
        [OutcomeStatus::Duplicate; 3]
    );
    assert_eq!(series(&log, "fraud").log_loss, before.log_loss);
    // "late" (T0 + 1 day) matures at T0 + 11 days, after the reopen: the sweep works from the log.
    clock.store(T0 + 11 * DAY, Ordering::SeqCst);
    assert_eq!(log.sweep().unwrap().0, 1);
    assert_eq!(series(&log, "fraud").immature, 0);

    // Retention: 30 days after the first predictions, all six are removed (T0 + 30 days + 1 day covers "late").
    clock.store(T0 + 31 * DAY + 1, Ordering::SeqCst);
    assert_eq!(log.sweep().unwrap().2, 6);
    let counts = log.with_store(|s| s.outcome_counts()).unwrap();
    assert_eq!(
        counts.unmatched, 0,
        "old unmatched outcomes go with retention"
    );
    log.close();
}

#[test]
fn a_full_queue_drops_and_counts_instead_of_blocking() {
    let dir = tempfile::tempdir().unwrap();
    let clock = Arc::new(AtomicI64::new(T0));
    let store = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    let cfg = StoreConfig {
        queue_size: 4,
        batch_size: 2,
        ..config(dir.path())
    };
    // Hold the store lock so the writer cannot drain: the queue fills, and `log` must still return at once.
    let log = PredictionStore::start(Box::new(store), cfg, Clock::manual(clock));
    let accepted = log.with_store(|_| {
        for i in 0..100 {
            log.log(queued(record(&format!("q{i}"), "fraud", T0, 0.0)));
        }
        Ok(())
    });
    accepted.unwrap();
    log.flush().unwrap();
    let n = series(&log, "fraud").predictions;
    // The writer holds at most one batch (2) while it waits for the lock, and the queue 4 more; the rest were
    // dropped (and counted in probity_store_predictions_dropped_total{reason="queue_full"}).
    assert!((1..=2 + 4).contains(&n), "{n} of 100 written");
    log.close();
}

#[test]
fn store_rejects_nothing_silently_on_duplicate_prediction_ids() {
    let dir = tempfile::tempdir().unwrap();
    let mut store = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    let (written, _) = store
        .insert_predictions(&[
            record("d", "fraud", T0, 0.0),
            record("d", "fraud", T0 + 1, 1.0),
        ])
        .unwrap();
    assert_eq!(
        written,
        [true, false],
        "the second record with the same id, route, model and role is skipped"
    );
}

/// A measurement, not a check (run with `cargo test --release -p probity --test store_matching -- --ignored
/// --nocapture`): predictions per second through the queue and writer, and the file size per million.
#[test]
#[ignore = "a measurement, not a check: run with --release -- --ignored --nocapture"]
fn measure_log_throughput_and_size() {
    let dir = tempfile::tempdir().unwrap();
    let clock = Arc::new(AtomicI64::new(T0));
    let store = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    let cfg = StoreConfig {
        queue_size: 1 << 20,
        ..config(dir.path())
    };
    let log = PredictionStore::start(Box::new(store), cfg, Clock::manual(clock));
    let n = 500_000;
    let started = std::time::Instant::now();
    for i in 0..n {
        let mut r = record(
            &format!("0190b3c2-7d4e-7000-8000-{i:012}"),
            "fraud",
            T0 + i as i64,
            0.1,
        );
        r.subject_key = format!("card-{}", i % 10_000);
        log.log(queued(r));
    }
    log.flush().unwrap();
    let seconds = started.elapsed().as_secs_f64();
    log.close();
    let bytes: u64 = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().metadata().unwrap().len())
        .sum();
    println!(
        "{n} predictions in {seconds:.2} s: {:.0} per second; {:.0} MB per million",
        n as f64 / seconds,
        bytes as f64 / n as f64 * 1e6 / 1e6
    );
}

/// A log written by a build at schema version 1 (no served-under columns) opens, gains the columns, keeps its rows
/// (without a prior) and logs new rows with theirs; the report takes each row's own prior.
#[test]
fn a_version_1_log_is_migrated_and_keeps_its_rows() {
    let dir = tempfile::tempdir().unwrap();
    {
        let conn = rusqlite::Connection::open(dir.path().join("predictions.db")).unwrap();
        conn.execute_batch(
            "CREATE TABLE predictions (seq INTEGER PRIMARY KEY, prediction_id TEXT NOT NULL, route TEXT NOT NULL,
               model TEXT NOT NULL, version TEXT NOT NULL, role TEXT NOT NULL, time_ms INTEGER NOT NULL,
               margin REAL NOT NULL, log_odds REAL NOT NULL, adjusted_log_odds REAL NOT NULL,
               probability REAL NOT NULL, entity_key TEXT NOT NULL, tags TEXT NOT NULL,
               UNIQUE (prediction_id, route, model, role));
             INSERT INTO predictions VALUES (1, 'old', 'fraud', 'm', 'v1', 'champion', 1, 0.5, 0.5, 0.5, 0.6225, '', '{}');
             PRAGMA user_version = 1;",
        )
        .unwrap();
    }
    let mut store = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    let mut new = record("new", "fraud", T0, 0.1);
    new.served.prior = Some(0.25);
    new.served.decision = "threshold 0.4".into();
    store.insert_predictions(&[new]).unwrap();
    let rows = store.load(&ReportFilter::default()).unwrap();
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[0].prediction_id, "old");
    assert_eq!(rows[0].served_prior, None);
    assert_eq!(rows[1].served_prior, Some(0.25));
    drop(store);
    let conn = rusqlite::Connection::open(dir.path().join("predictions.db")).unwrap();
    let version: i64 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .unwrap();
    assert_eq!(version, 4);
    // Version 4 added the per-feature counts by hour, empty in a migrated log.
    let windows: i64 = conn
        .query_row("SELECT COUNT(*) FROM feature_counts", [], |r| r.get(0))
        .unwrap();
    assert_eq!(windows, 0);
    let decision: String = conn
        .query_row(
            "SELECT decision FROM predictions WHERE prediction_id = 'new'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(decision, "threshold 0.4");
    // Version 3 renamed the key column; the old row keeps its (empty) key under the new name.
    let key: String = conn
        .query_row(
            "SELECT subject_key FROM predictions WHERE prediction_id = 'old'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(key, "");
}
