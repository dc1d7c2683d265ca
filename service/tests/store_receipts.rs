//! Calls that wait for their record (`routes.NAME.record = "before-answer"`), at the store writer: a receipt
//! resolves only once its predictions are committed (they are readable from the store by then), without waiting
//! out the flush interval; calls queued while the writer is busy share one transaction (group commit); a failed
//! commit, a full queue and a closed store each resolve the receipt with the reason, and nothing of such a call
//! is in the store.

#![allow(clippy::unwrap_used)]

use std::collections::{BTreeMap, HashSet};
use std::sync::atomic::{AtomicBool, AtomicI64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::Duration;

use probity::store::sqlite::Durability;
use probity::store::writer::{ModelFacts, NotRecorded, Queued, Receipt};
use probity::store::{
    Clock, LabelledPairs, LoggedPrediction, ModelVersionInfo, OutcomeCounts, OutcomeInput,
    OutcomeResult, PredictionRecord, PredictionStore, ReportFilter, Settled, SqliteStore, Store,
    StoreConfig, StoreError, WriteFailure,
};
use probity::store::{
    FollowUpGroup, PairRanks, PairRow, PairScan, ScanOrder, ScanRow, SeriesName, SeriesScan,
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

fn queued(id: &str) -> Queued {
    Queued {
        record: PredictionRecord {
            prediction_id: id.into(),
            route: "credit".into(),
            model: "m".into(),
            version: "v1".into(),
            role: "champion".into(),
            time_ms: T0,
            margin: 0.5,
            log_odds: 0.5,
            adjusted_log_odds: 0.5,
            probability: 1.0 / (1.0 + (-0.5f64).exp()),
            subject_key: String::new(),
            tags: BTreeMap::new(),
            served: Default::default(),
        },
        prior: 0.1,
        facts: Arc::new(Facts),
        features: None,
    }
}

/// The real SQLite store, counting its prediction transactions and failing them on demand (as a full disk does:
/// SQLSTATE 53100 is how the shared store reports it).
struct Watched {
    inner: SqliteStore,
    inserts: Arc<AtomicUsize>,
    fail: Arc<AtomicBool>,
}

impl Store for Watched {
    fn insert_predictions(
        &mut self,
        records: &[PredictionRecord],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError> {
        self.inserts.fetch_add(1, Ordering::SeqCst);
        if self.fail.load(Ordering::SeqCst) {
            return Err(StoreError::Postgres {
                what: "insert predictions",
                message: "could not extend file: No space left on device".into(),
                code: Some("53100".into()),
                lost: false,
            });
        }
        self.inner.insert_predictions(records)
    }
    fn register_model(&mut self, info: &ModelVersionInfo) -> Result<(), StoreError> {
        self.inner.register_model(info)
    }
    fn record_outcomes(
        &mut self,
        outcomes: &[OutcomeInput],
        now_ms: i64,
    ) -> Result<(Vec<OutcomeResult>, Vec<Settled>), StoreError> {
        self.inner.record_outcomes(outcomes, now_ms)
    }
    fn settle_matured(
        &mut self,
        maturity_ms: &BTreeMap<String, i64>,
        now_ms: i64,
        limit: usize,
    ) -> Result<Vec<Settled>, StoreError> {
        self.inner.settle_matured(maturity_ms, now_ms, limit)
    }
    fn expire_pending(&mut self, hold_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        self.inner.expire_pending(hold_ms, now_ms)
    }
    fn remove_expired(&mut self, retention_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        self.inner.remove_expired(retention_ms, now_ms)
    }
    fn load(&mut self, filter: &ReportFilter) -> Result<Vec<LoggedPrediction>, StoreError> {
        self.inner.load(filter)
    }
    fn model_version(
        &mut self,
        model: &str,
        version: &str,
    ) -> Result<Option<ModelVersionInfo>, StoreError> {
        self.inner.model_version(model, version)
    }
    fn outcome_counts(&mut self) -> Result<OutcomeCounts, StoreError> {
        self.inner.outcome_counts()
    }
    fn series(&mut self, filter: &ReportFilter) -> Result<Vec<SeriesName>, StoreError> {
        self.inner.series(filter)
    }
    fn scan(
        &mut self,
        series: &SeriesScan<'_>,
        order: ScanOrder,
        labelled_only: bool,
        each: &mut dyn FnMut(&ScanRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.inner.scan(series, order, labelled_only, each)
    }
    fn nth_oldest(&mut self, series: &SeriesScan<'_>, k: u64) -> Result<Option<i64>, StoreError> {
        self.inner.nth_oldest(series, k)
    }
    fn follow_up(
        &mut self,
        series: &SeriesScan<'_>,
        now_ms: i64,
        horizon_ms: i64,
        each: &mut dyn FnMut(&FollowUpGroup) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.inner.follow_up(series, now_ms, horizon_ms, each)
    }
    fn role_models(
        &mut self,
        filter: &ReportFilter,
        role: &str,
    ) -> Result<Vec<(String, String, u64)>, StoreError> {
        self.inner.role_models(filter, role)
    }
    fn scan_pairs(
        &mut self,
        pairs: &PairScan<'_>,
        ranks: PairRanks,
        each: &mut dyn FnMut(&PairRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.inner.scan_pairs(pairs, ranks, each)
    }
    fn labelled_pairs(&mut self, route: &str) -> Result<LabelledPairs, StoreError> {
        self.inner.labelled_pairs(route)
    }
}

struct Harness {
    _dir: tempfile::TempDir,
    log: Arc<PredictionStore>,
    inserts: Arc<AtomicUsize>,
    fail: Arc<AtomicBool>,
}

/// A log whose flush interval is an hour: a receipt that resolved only when a partial batch is flushed by time
/// would not resolve within the test's bound.
fn harness(queue_size: usize) -> Harness {
    let dir = tempfile::tempdir().unwrap();
    let inserts = Arc::new(AtomicUsize::new(0));
    let fail = Arc::new(AtomicBool::new(false));
    let store = Watched {
        inner: SqliteStore::open(dir.path(), Durability::Full).unwrap(),
        inserts: Arc::clone(&inserts),
        fail: Arc::clone(&fail),
    };
    let config = StoreConfig {
        directory: Some(dir.path().to_path_buf()),
        flush_interval: Duration::from_secs(3600),
        queue_size,
        ..StoreConfig::default()
    };
    let clock = Clock::manual(Arc::new(AtomicI64::new(T0)));
    Harness {
        log: PredictionStore::start(Box::new(store), config, clock),
        _dir: dir,
        inserts,
        fail,
    }
}

/// The receipt's answer; a bound far above any commit keeps a writer that waits out its flush interval from
/// hanging the test (it fails it instead).
fn wait(mut receipt: Receipt) -> Result<(), NotRecorded> {
    for _ in 0..60_000 {
        match receipt.try_recv() {
            Ok(answer) => return answer,
            Err(tokio::sync::oneshot::error::TryRecvError::Empty) => {
                std::thread::sleep(Duration::from_millis(1))
            }
            Err(tokio::sync::oneshot::error::TryRecvError::Closed) => {
                return Err(NotRecorded::Closed)
            }
        }
    }
    panic!("no answer within 60 s: the writer waited for its flush interval (1 h) instead of committing");
}

fn stored(log: &PredictionStore) -> HashSet<String> {
    log.with_store(|s| s.load(&ReportFilter::default()))
        .unwrap()
        .into_iter()
        .map(|p| p.prediction_id)
        .collect()
}

#[test]
fn a_receipt_resolves_after_the_commit_without_waiting_out_the_flush_interval() {
    let h = harness(1000);
    // A prediction of a route that does not wait, queued first, goes into the same transaction.
    h.log.log(queued("after-answer-1"));
    let receipt = h
        .log
        .record(vec![queued("before-answer-1"), queued("before-answer-2")]);
    assert_eq!(wait(receipt), Ok(()));
    // Committed by the time the receipt resolved: readable through the store at once.
    let now = stored(&h.log);
    for id in ["after-answer-1", "before-answer-1", "before-answer-2"] {
        assert!(now.contains(id), "{id} not in the store: {now:?}");
    }
    // An empty call has nothing to wait for.
    assert_eq!(wait(h.log.record(Vec::new())), Ok(()));
    h.log.close();
}

#[test]
fn calls_queued_during_a_commit_share_the_next_transaction() {
    let h = harness(10_000);
    // Holding the store's lock stands for a commit in progress: the writer takes the first call and waits for the
    // lock; the 49 calls after it queue meanwhile and must be committed together, not one transaction each.
    let receipts = h
        .log
        .with_store(|_| {
            Ok((0..50)
                .map(|i| h.log.record(vec![queued(&format!("g{i}"))]))
                .collect::<Vec<_>>())
        })
        .unwrap();
    for r in receipts {
        assert_eq!(wait(r), Ok(()));
    }
    let transactions = h.inserts.load(Ordering::SeqCst);
    assert!(
        (1..=2).contains(&transactions),
        "50 waiting calls took {transactions} transactions"
    );
    assert_eq!(stored(&h.log).len(), 50);
    h.log.close();
}

#[test]
fn a_failed_commit_a_full_queue_and_a_closed_store_refuse_with_the_reason() {
    let h = harness(4);
    h.fail.store(true, Ordering::SeqCst);
    let failed = wait(h.log.record(vec![queued("f1"), queued("f2")]));
    assert_eq!(failed, Err(NotRecorded::Write(WriteFailure::DiskFull)));
    h.fail.store(false, Ordering::SeqCst);

    // With the writer held at the lock, calls of 3 predictions overflow a queue of 4: the ones refused say so,
    // and exactly the ones accepted are stored.
    let receipts = h
        .log
        .with_store(|_| {
            Ok((0..10)
                .map(|i| {
                    let ids: Vec<String> = (0..3).map(|k| format!("q{i}-{k}")).collect();
                    let receipt = h.log.record(ids.iter().map(|id| queued(id)).collect());
                    (ids, receipt)
                })
                .collect::<Vec<_>>())
        })
        .unwrap();
    let mut refused = 0;
    let mut accepted = Vec::new();
    for (ids, receipt) in receipts {
        match wait(receipt) {
            Ok(()) => accepted.extend(ids),
            Err(NotRecorded::QueueFull) => refused += 1,
            Err(other) => panic!("unexpected refusal {other:?}"),
        }
    }
    assert!(refused >= 1, "a queue of 4 took ten calls of 3");
    let now = stored(&h.log);
    let expected: HashSet<String> = accepted.into_iter().collect();
    assert_eq!(now, expected, "stored = accepted (f1, f2 were rolled back)");

    h.log.close();
    assert_eq!(
        wait(h.log.record(vec![queued("late")])),
        Err(NotRecorded::Closed)
    );
}
