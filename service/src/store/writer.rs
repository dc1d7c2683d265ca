//! [`PredictionStore`]: the bounded queue between the request path and the store, the writer thread that commits
//! predictions in batches, the outcome and report calls, and the background sweeps.
//!
//! The request path only calls [`PredictionStore::log`], which never blocks: when the queue is full the prediction
//! is dropped and counted (`probity_store_predictions_dropped_total{reason="queue_full"}`), so a slow disk slows
//! nothing but the log. Outcome calls write synchronously (their answer says what was recorded), and reports read
//! the store; both share it with the writer thread behind one lock.
//!
//! A route with `record = "before-answer"` calls [`PredictionStore::record`] instead: its predictions go into the
//! same queue with a [`Receipt`] that the writer fulfils after the transaction holding them has committed (or
//! failed), and the call answers only then. The writer does not wait out the flush interval for a batch that holds
//! such calls: it takes what is queued at that moment and commits, and calls arriving during that commit form
//! the next batch (group commit: one transaction, and with `durability = "full"` one disk flush, per batch, not
//! per call). A call whose predictions cannot be queued (queue full, store closed) or committed gets the reason
//! ([`NotRecorded`]) and is refused, never answered without its record.
//!
//! A batch that cannot be written (full disk, read-only file system, any database error) is rolled back whole and
//! its predictions are counted as dropped with the reason (`disk_full`, `read_only`, `write_error`); the writer
//! goes on with the next batch, so the log resumes by itself when the disk has room again. The failures are
//! counted and logged once per kind ([`super::faults`]).

use std::collections::{BTreeMap, HashSet};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError, SyncSender, TryRecvError, TrySendError};
use std::sync::{Arc, Mutex, MutexGuard};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use super::faults::{Failures, Operation};
use super::running::{self, Windows};
use super::{
    Clock, ModelVersionInfo, OutcomeInput, OutcomeResult, PredictionRecord, Store, StoreConfig,
    StoreError, WriteFailure,
};

/// How often the PSI and base-rate gauges are recomputed at most.
const PUBLISH_EVERY: Duration = Duration::from_secs(1);
/// Most prediction ids settled by maturity in one transaction.
const MATURITY_CHUNK: usize = 10_000;

/// What the log needs to know about the model that scored a prediction. Read on the writer thread, the first time
/// a model version is seen.
pub trait ModelFacts: Send + Sync {
    /// The facts recorded in the log.
    fn version_info(&self) -> ModelVersionInfo;
}

/// A prediction waiting for the writer.
pub struct Queued {
    /// The record.
    pub record: PredictionRecord,
    /// The base rate its probability is calibrated to (the route's target, else the model's).
    pub prior: f64,
    /// The model that scored it.
    pub facts: Arc<dyn ModelFacts>,
    /// The slots of its monitored features' values, counted by hour with it ([`super::features`]); `None` when
    /// the model file has no training distribution or the row is a silent challenger's.
    pub features: Option<super::features::RowFeatures>,
}

/// A call run on the log's thread for calls.
type CallJob = Box<dyn FnOnce() + Send>;

/// Why predictions that a call waits for were not recorded.
#[derive(Debug, Clone, Copy, PartialEq, Eq, thiserror::Error)]
pub enum NotRecorded {
    /// The queue to the writer was full.
    #[error("its queue is full")]
    QueueFull,
    /// The store is closed (the server is stopping).
    #[error("it is closed")]
    Closed,
    /// The transaction holding them failed and was rolled back.
    #[error("the commit failed: {}", .0.as_str())]
    Write(WriteFailure),
}

impl NotRecorded {
    /// The metric label (`reason`), the same words as `probity_store_predictions_dropped_total`.
    pub fn as_str(self) -> &'static str {
        match self {
            NotRecorded::QueueFull => "queue_full",
            NotRecorded::Closed => "closed",
            NotRecorded::Write(failure) => failure.as_str(),
        }
    }
}

/// Resolves once the predictions of one [`PredictionStore::record`] call are committed, or with why not. A receipt
/// whose sender is gone (the writer stopped) means [`NotRecorded::Closed`].
pub type Receipt = tokio::sync::oneshot::Receiver<Result<(), NotRecorded>>;

enum Message {
    Record(Box<Queued>),
    /// Predictions of one call that waits for their commit.
    Recorded(
        Vec<Queued>,
        tokio::sync::oneshot::Sender<Result<(), NotRecorded>>,
    ),
    /// Write everything queued before this, then answer.
    Flush(mpsc::Sender<()>),
}

/// The prediction store as the server uses it.
pub struct PredictionStore {
    sender: Mutex<Option<SyncSender<Message>>>,
    store: Arc<Mutex<Box<dyn Store>>>,
    config: StoreConfig,
    clock: Clock,
    depth: Arc<AtomicUsize>,
    writer: Mutex<Option<JoinHandle<()>>>,
    estimates: running::LatestEstimates,
    failures: Arc<Failures>,
    calls: Mutex<Option<mpsc::Sender<CallJob>>>,
}

fn lock(store: &Mutex<Box<dyn Store>>) -> MutexGuard<'_, Box<dyn Store>> {
    // A panic while holding the lock leaves the store as its last committed transaction left it.
    store.lock().unwrap_or_else(|e| e.into_inner())
}

impl PredictionStore {
    /// Starts the writer thread over `store`.
    pub fn start(store: Box<dyn Store>, config: StoreConfig, clock: Clock) -> Arc<PredictionStore> {
        let (sender, receiver) = mpsc::sync_channel(config.queue_size);
        let store = Arc::new(Mutex::new(store));
        let depth = Arc::new(AtomicUsize::new(0));
        let windows = Windows::new(config.psi_window, config.prior_window);
        let estimates = windows.latest();
        let failures = Arc::new(Failures::default());
        let writer = Writer {
            failures: Arc::clone(&failures),
            store: Arc::clone(&store),
            receiver,
            depth: Arc::clone(&depth),
            batch_size: config.batch_size,
            flush_interval: config.flush_interval,
            windows,
            registered: HashSet::new(),
            last_publish: Instant::now(),
        };
        let handle = std::thread::Builder::new()
            .name("probity-log-writer".into())
            .spawn(move || writer.run())
            .ok();
        running::describe();
        Failures::describe();
        let (calls, jobs) = mpsc::channel::<CallJob>();
        let _ = std::thread::Builder::new()
            .name("probity-log-calls".into())
            .spawn(move || {
                while let Ok(job) = jobs.recv() {
                    job();
                }
            });
        Arc::new(PredictionStore {
            failures,
            calls: Mutex::new(Some(calls)),
            sender: Mutex::new(Some(sender)),
            store,
            config,
            clock,
            depth,
            writer: Mutex::new(handle),
            estimates,
        })
    }

    /// The latest base-rate estimate per (route, model): (estimate, predictions in its window).
    pub fn base_rate_estimates(
        &self,
    ) -> std::collections::BTreeMap<(String, String, String), (f64, usize)> {
        self.estimates
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
            .clone()
    }

    /// The configuration it runs with.
    pub fn config(&self) -> &StoreConfig {
        &self.config
    }

    /// The clock it runs on.
    pub fn now_ms(&self) -> i64 {
        self.clock.now_ms()
    }

    /// Queues a prediction; never blocks. A prediction that cannot be queued is counted as dropped.
    pub fn log(&self, queued: Queued) {
        let guard = self.sender.lock().unwrap_or_else(|e| e.into_inner());
        let Some(sender) = guard.as_ref() else {
            running::dropped(&queued.record.route, "closed", 1);
            return;
        };
        let route = queued.record.route.clone();
        self.depth.fetch_add(1, Ordering::Relaxed);
        match sender.try_send(Message::Record(Box::new(queued))) {
            Ok(()) => {}
            Err(TrySendError::Full(_)) => {
                self.depth.fetch_sub(1, Ordering::Relaxed);
                running::dropped(&route, "queue_full", 1);
            }
            Err(TrySendError::Disconnected(_)) => {
                self.depth.fetch_sub(1, Ordering::Relaxed);
                running::dropped(&route, "closed", 1);
            }
        }
    }

    /// Queues the predictions of one call that answers only once they are committed; never blocks. The receipt
    /// resolves after the commit of the batch they are in (all of them in the same transaction), or at once with
    /// [`NotRecorded::QueueFull`] or [`NotRecorded::Closed`]; predictions not recorded are counted as dropped with
    /// that reason (the caller counts the refused call, [`running::record_refused`]).
    pub fn record(&self, queued: Vec<Queued>) -> Receipt {
        let (done, receipt) = tokio::sync::oneshot::channel();
        if queued.is_empty() {
            let _ = done.send(Ok(()));
            return receipt;
        }
        let route = queued[0].record.route.clone();
        let n = queued.len();
        let refuse = |done: tokio::sync::oneshot::Sender<_>, why: NotRecorded| {
            running::dropped(&route, why.as_str(), n as u64);
            let _ = done.send(Err(why));
        };
        let guard = self.sender.lock().unwrap_or_else(|e| e.into_inner());
        let Some(sender) = guard.as_ref() else {
            refuse(done, NotRecorded::Closed);
            return receipt;
        };
        // The queue holds messages; its size is counted in predictions, so a call of many rows takes its share.
        let before = self.depth.fetch_add(n, Ordering::Relaxed);
        if before > 0 && before + n > self.config.queue_size {
            self.depth.fetch_sub(n, Ordering::Relaxed);
            refuse(done, NotRecorded::QueueFull);
            return receipt;
        }
        match sender.try_send(Message::Recorded(queued, done)) {
            Ok(()) => {}
            Err(TrySendError::Full(Message::Recorded(_, done))) => {
                self.depth.fetch_sub(n, Ordering::Relaxed);
                refuse(done, NotRecorded::QueueFull);
            }
            Err(TrySendError::Disconnected(Message::Recorded(_, done))) => {
                self.depth.fetch_sub(n, Ordering::Relaxed);
                refuse(done, NotRecorded::Closed);
            }
            // Only a Recorded message was sent.
            Err(TrySendError::Full(_) | TrySendError::Disconnected(_)) => {
                self.depth.fetch_sub(n, Ordering::Relaxed);
            }
        }
        receipt
    }

    /// Waits until every prediction queued before the call is committed (blocking; call off the async runtime).
    pub fn flush(&self) -> Result<(), StoreError> {
        let sender = self
            .sender
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .clone()
            .ok_or(StoreError::Closed)?;
        let (tx, rx) = mpsc::channel();
        sender
            .send(Message::Flush(tx))
            .map_err(|_| StoreError::Closed)?;
        rx.recv().map_err(|_| StoreError::Closed)
    }

    /// Records outcomes (blocking; call off the async runtime). The results are committed when this returns.
    pub fn record_outcomes(
        &self,
        outcomes: &[OutcomeInput],
    ) -> Result<Vec<OutcomeResult>, StoreError> {
        let now = self.clock.now_ms();
        let written = lock(&self.store).record_outcomes(outcomes, now);
        let (results, pairs) = match written {
            Ok(done) => {
                self.failures.succeeded(Operation::Outcomes);
                done
            }
            Err(error) => {
                self.failures.failed(Operation::Outcomes, &error);
                return Err(error);
            }
        };
        for r in &results {
            running::received(r.status);
        }
        running::settled(&pairs);
        Ok(results)
    }

    /// Runs the store function `f` under the lock (reports, counts).
    pub fn with_store<T>(
        &self,
        f: impl FnOnce(&mut dyn Store) -> Result<T, StoreError>,
    ) -> Result<T, StoreError> {
        let mut guard = lock(&self.store);
        f(guard.as_mut())
    }

    /// Runs `f` on the log's own thread for calls (one at a time) and returns its answer through the receiver.
    /// Outcome writes, reports and comparisons run there: they share one store behind one lock anyway, and
    /// glibc's allocator keeps what a thread frees for that thread's arena, so such calls spread over a pool of
    /// threads each leave their working set behind in another arena (the soak measured a server's resident memory
    /// climbing from 30 to over 180 MiB with a report every 5 s, and flat at 43 MiB on one arena). On one thread
    /// they reuse the same memory.
    pub fn on_thread<T: Send + 'static>(
        &self,
        f: impl FnOnce() -> T + Send + 'static,
    ) -> tokio::sync::oneshot::Receiver<T> {
        let (answer, receiver) = tokio::sync::oneshot::channel();
        let job: CallJob = Box::new(move || {
            let _ = answer.send(f());
        });
        let calls = self.calls.lock().unwrap_or_else(|e| e.into_inner());
        // A closed thread drops the job, and with it the sender: the receiver then reports the log closed.
        if let Some(calls) = calls.as_ref() {
            let _ = calls.send(job);
        }
        receiver
    }

    /// Runs `f` on the store on the log's thread for calls ([`PredictionStore::on_thread`]).
    pub fn read<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut dyn Store) -> Result<T, StoreError> + Send + 'static,
    ) -> tokio::sync::oneshot::Receiver<Result<T, StoreError>> {
        let store = Arc::clone(&self.store);
        self.on_thread(move || {
            let mut guard = lock(&store);
            f(guard.as_mut())
        })
    }

    /// [`PredictionStore::read`], waiting for the answer (blocking; call off the async runtime).
    pub fn read_blocking<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut dyn Store) -> Result<T, StoreError> + Send + 'static,
    ) -> Result<T, StoreError> {
        self.read(f)
            .blocking_recv()
            .map_err(|_| StoreError::Closed)?
    }

    /// Applies maturity, the outcome hold and retention now, at the clock's time. Returns (settled by maturity,
    /// outcomes marked unmatched, predictions removed).
    pub fn sweep(&self) -> Result<(usize, u64, u64), StoreError> {
        match self.sweep_once() {
            Ok(done) => {
                self.failures.succeeded(Operation::Sweep);
                Ok(done)
            }
            Err(error) => {
                self.failures.failed(Operation::Sweep, &error);
                Err(error)
            }
        }
    }

    fn sweep_once(&self) -> Result<(usize, u64, u64), StoreError> {
        if !lock(&self.store).lead_sweeps()? {
            // Another replica of a shared store runs them.
            return Ok((0, 0, 0));
        }
        let now = self.clock.now_ms();
        let ms = |d: Duration| i64::try_from(d.as_millis()).unwrap_or(i64::MAX);
        let maturity: BTreeMap<String, i64> = self
            .config
            .maturity
            .iter()
            .map(|(r, d)| (r.clone(), ms(*d)))
            .collect();
        let mut matured = 0;
        if !maturity.is_empty() {
            loop {
                let pairs = lock(&self.store).settle_matured(&maturity, now, MATURITY_CHUNK)?;
                running::swept(&pairs, 0, 0);
                running::settled(&pairs);
                matured += pairs.len();
                if pairs.is_empty() {
                    break;
                }
            }
        }
        let unmatched = lock(&self.store).expire_pending(ms(self.config.outcome_hold), now)?;
        let removed = lock(&self.store).remove_expired(ms(self.config.retention), now)?;
        running::swept(&[], unmatched, removed);
        Ok((matured, unmatched, removed))
    }

    /// Stops taking predictions, writes what is queued and stops the writer thread (blocking).
    pub fn close(&self) {
        let sender = self.sender.lock().unwrap_or_else(|e| e.into_inner()).take();
        drop(sender);
        // The thread for calls ends after the calls already asked for.
        drop(self.calls.lock().unwrap_or_else(|e| e.into_inner()).take());
        if let Some(handle) = self.writer.lock().unwrap_or_else(|e| e.into_inner()).take() {
            let _ = handle.join();
        }
    }
}

/// The answer channel of one waiting call.
type Done = tokio::sync::oneshot::Sender<Result<(), NotRecorded>>;

/// The writer thread's state.
struct Writer {
    failures: Arc<Failures>,
    store: Arc<Mutex<Box<dyn Store>>>,
    receiver: Receiver<Message>,
    depth: Arc<AtomicUsize>,
    batch_size: usize,
    flush_interval: Duration,
    windows: Windows,
    registered: HashSet<(String, String)>,
    last_publish: Instant,
}

impl Writer {
    fn run(mut self) {
        let mut batch: Vec<Queued> = Vec::with_capacity(self.batch_size);
        let mut waiters: Vec<mpsc::Sender<()>> = Vec::new();
        let mut receipts: Vec<Done> = Vec::new();
        loop {
            // Block for the first message, then gather until the batch is full or the flush interval ends; once a
            // call waits for its record, gather only what is queued already and commit.
            let first = match self.receiver.recv_timeout(PUBLISH_EVERY) {
                Ok(m) => m,
                Err(RecvTimeoutError::Timeout) => {
                    self.publish();
                    continue;
                }
                Err(RecvTimeoutError::Disconnected) => break,
            };
            let deadline = Instant::now() + self.flush_interval;
            let mut open = true;
            let mut next = Some(first);
            while let Some(message) = next.take() {
                match message {
                    Message::Record(q) => batch.push(*q),
                    Message::Recorded(qs, done) => {
                        batch.extend(qs);
                        receipts.push(done);
                    }
                    Message::Flush(w) => {
                        waiters.push(w);
                        break;
                    }
                }
                if batch.len() >= self.batch_size {
                    break;
                }
                if receipts.is_empty() {
                    let left = deadline.saturating_duration_since(Instant::now());
                    match self.receiver.recv_timeout(left) {
                        Ok(m) => next = Some(m),
                        Err(RecvTimeoutError::Timeout) => {}
                        Err(RecvTimeoutError::Disconnected) => open = false,
                    }
                } else {
                    match self.receiver.try_recv() {
                        Ok(m) => next = Some(m),
                        Err(TryRecvError::Empty) => {}
                        Err(TryRecvError::Disconnected) => open = false,
                    }
                }
            }
            let result = self.write(&mut batch);
            for done in receipts.drain(..) {
                let _ = done.send(result);
            }
            if !waiters.is_empty() {
                // A flush brings the gauges up to date too.
                self.publish();
            }
            for w in waiters.drain(..) {
                let _ = w.send(());
            }
            if !open {
                break;
            }
        }
        // The senders are gone: write what is left.
        while let Ok(message) = self.receiver.try_recv() {
            match message {
                Message::Record(q) => batch.push(*q),
                Message::Recorded(qs, done) => {
                    batch.extend(qs);
                    receipts.push(done);
                }
                Message::Flush(w) => waiters.push(w),
            }
        }
        let result = self.write(&mut batch);
        for done in receipts.drain(..) {
            let _ = done.send(result);
        }
        for w in waiters.drain(..) {
            let _ = w.send(());
        }
        self.publish();
    }

    /// Commits the batch in one transaction; the error is what the calls waiting for it are told.
    fn write(&mut self, batch: &mut Vec<Queued>) -> Result<(), NotRecorded> {
        if batch.is_empty() {
            return Ok(());
        }
        self.depth.fetch_sub(batch.len(), Ordering::Relaxed);
        running::queue_depth(self.depth.load(Ordering::Relaxed));
        let mut store = lock(&self.store);
        for q in batch.iter() {
            let key = (q.record.model.clone(), q.record.version.clone());
            if !self.registered.contains(&key) {
                match store.register_model(&q.facts.version_info()) {
                    Ok(()) => {
                        self.failures.succeeded(Operation::ModelVersion);
                        self.registered.insert(key);
                    }
                    Err(error) => {
                        // Tried again with the next batch of this version.
                        self.failures.failed(Operation::ModelVersion, &error);
                    }
                }
            }
        }
        let records: Vec<PredictionRecord> = batch.iter().map(|q| q.record.clone()).collect();
        let features: Vec<Option<&super::features::RowFeatures>> =
            batch.iter().map(|q| q.features.as_ref()).collect();
        let inserted = if features.iter().any(Option::is_some) {
            store.insert_predictions_counted(&records, &features)
        } else {
            store.insert_predictions(&records)
        };
        drop(features);
        let result = match inserted {
            Ok((written, pairs)) => {
                drop(store);
                self.failures.succeeded(Operation::Predictions);
                let mut by_route: BTreeMap<(&str, bool), u64> = BTreeMap::new();
                for (r, w) in records.iter().zip(&written) {
                    *by_route.entry((r.route.as_str(), *w)).or_default() += 1;
                }
                for ((route, w), n) in by_route {
                    if w {
                        running::written(route, n);
                    } else {
                        running::dropped(route, "duplicate_id", n);
                    }
                }
                running::settled(&pairs);
                Ok(())
            }
            Err(error) => {
                // The transaction was rolled back: none of the batch is in the log.
                drop(store);
                let reason = self.failures.failed(Operation::Predictions, &error);
                let mut by_route: BTreeMap<&str, u64> = BTreeMap::new();
                for r in &records {
                    *by_route.entry(r.route.as_str()).or_default() += 1;
                }
                for (route, n) in by_route {
                    running::dropped(route, reason.as_str(), n);
                }
                Err(NotRecorded::Write(reason))
            }
        };
        for q in batch.drain(..) {
            let facts = &q.facts;
            let r = &q.record;
            self.windows.add(
                (&r.route, &r.model, &r.version),
                r.probability,
                r.adjusted_log_odds,
                || facts.version_info().reference,
                q.prior,
            );
        }
        if self.last_publish.elapsed() >= PUBLISH_EVERY {
            self.publish();
        }
        result
    }

    fn publish(&mut self) {
        self.last_publish = Instant::now();
        self.windows.publish();
    }
}
