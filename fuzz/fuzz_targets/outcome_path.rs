//! Bytes -> the outcome path of a running server: prost decode of `RecordOutcomesRequest` and `ReportRequest`, the
//! `probity.v1.Outcomes` handlers (`OutcomesApi`), the outcome-matching rules and the embedded SQLite store, over
//! 16 logged ids (`p0` to `p15`; `p0` and `p1` logged on both routes) and a clock the input moves.
//!
//! The first input byte picks the call (outcomes, report, or a clock step followed by a sweep); the rest is the
//! protobuf message. Checked beyond "no panic": a refusal is never INTERNAL and its message is short enough for a
//! gRPC trailer; an answer has one result per outcome, in order, each with its own id; an outcome for a logged id
//! is matched, a duplicate or a correction, never held, and one for an id never logged is held or refused; a
//! refused outcome says why. The store starts afresh every 2,000 inputs, so held outcomes do not pile up.
#![no_main]

use std::cell::RefCell;
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Arc;
use std::time::Duration;

use libfuzzer_sys::fuzz_target;
use probity::serve::outcomes::OutcomesApi;
use probity::serve::proto as pb;
use probity::serve::proto::outcomes_server::Outcomes;
use probity::store::sqlite::Durability;
use probity::store::writer::{ModelFacts, Queued};
use probity::store::{
    Clock, ModelVersionInfo, PredictionRecord, PredictionStore, SqliteStore, StoreConfig,
};
use prost::Message;

/// The longest status message a caller may get back; gRPC carries it in a trailer.
const MAX_MESSAGE_CHARS: usize = 4096;
const LOGGED: usize = 16;
const T0: i64 = 1_700_000_000_000;
const DAY: i64 = 86_400_000;
const FRESH_EVERY: u32 = 2_000;

struct Facts;

impl ModelFacts for Facts {
    fn version_info(&self) -> ModelVersionInfo {
        ModelVersionInfo {
            model: "fuzz-model".into(),
            version: "1".into(),
            base_rate: 0.05,
            reference: None,
            features: Vec::new(),
        }
    }
}

struct Fixture {
    api: OutcomesApi,
    log: Arc<PredictionStore>,
    clock: Arc<AtomicI64>,
    runtime: tokio::runtime::Runtime,
    inputs: u32,
    _dir: tempfile::TempDir,
}

impl Fixture {
    fn new() -> Fixture {
        let dir = tempfile::tempdir().expect("temp dir");
        let clock = Arc::new(AtomicI64::new(T0));
        let store = SqliteStore::open(dir.path(), Durability::Normal).expect("store opens");
        let config = StoreConfig {
            directory: Some(dir.path().to_path_buf()),
            flush_interval: Duration::from_millis(1),
            outcome_hold: Duration::from_millis(u64::try_from(DAY).unwrap_or(0)),
            // Longer than any run of clock steps before the fixture is renewed (2,000 x 8 days), so the logged
            // predictions are never removed and an outcome for one is never held.
            retention: Duration::from_millis(u64::try_from(100 * 365 * DAY).unwrap_or(0)),
            maturity: [("fraud".to_string(), Duration::from_millis(7 * 86_400_000))].into(),
            ..StoreConfig::default()
        };
        let log =
            PredictionStore::start(Box::new(store), config, Clock::manual(Arc::clone(&clock)));
        for i in 0..LOGGED + 2 {
            // p0 and p1 are logged a second time on the other route (the same id on two routes): one outcome
            // settles both. (The same id on the same route, model and role is a retried call, stored once.)
            let id = format!("p{}", i % LOGGED);
            let first_route = (i % LOGGED) % 2 == 0;
            let h = i as f64 / 4.0 - 2.0;
            log.log(Queued {
                record: PredictionRecord {
                    prediction_id: id,
                    route: if first_route == (i < LOGGED) {
                        "fraud"
                    } else {
                        "credit"
                    }
                    .into(),
                    model: "fuzz-model".into(),
                    version: "1".into(),
                    role: "champion".into(),
                    time_ms: T0 + i as i64,
                    margin: h,
                    log_odds: h,
                    adjusted_log_odds: h,
                    probability: 1.0 / (1.0 + (-h).exp()),
                    subject_key: String::new(),
                    tags: BTreeMap::new(),
                    served: Default::default(),
                },
                prior: 0.05,
                facts: Arc::new(Facts),
                features: None,
            });
        }
        log.flush().expect("predictions written");
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .expect("runtime");
        Fixture {
            api: OutcomesApi::new(Some(Arc::clone(&log))),
            log,
            clock,
            runtime,
            inputs: 0,
            _dir: dir,
        }
    }
}

impl Drop for Fixture {
    fn drop(&mut self) {
        self.log.close();
    }
}

thread_local! {
    static FIXTURE: RefCell<Option<Fixture>> = const { RefCell::new(None) };
}

fn check_status(status: &tonic::Status) {
    assert_ne!(status.code(), tonic::Code::Internal, "internal: {status:?}");
    assert_ne!(status.code(), tonic::Code::Unknown, "unknown: {status:?}");
    assert!(!status.message().is_empty());
    assert!(
        status.message().chars().count() <= MAX_MESSAGE_CHARS,
        "status message of {} characters",
        status.message().chars().count()
    );
}

fn logged(id: &str) -> bool {
    id.strip_prefix('p')
        .and_then(|n| n.parse::<usize>().ok())
        .is_some_and(|n| n < LOGGED && id == format!("p{n}"))
}

fn check_outcomes(request: &pb::RecordOutcomesRequest, response: &pb::RecordOutcomesResponse) {
    assert_eq!(response.results.len(), request.outcomes.len());
    for (i, (o, r)) in request.outcomes.iter().zip(&response.results).enumerate() {
        assert_eq!(r.index, i as u64);
        assert_eq!(r.prediction_id, o.prediction_id);
        assert!(r.message.chars().count() <= MAX_MESSAGE_CHARS);
        let status = pb::OutcomeStatus::try_from(r.status).expect("a known status");
        match status {
            pb::OutcomeStatus::Invalid => assert!(!r.message.is_empty(), "a refusal says why"),
            pb::OutcomeStatus::Pending => {
                assert!(
                    !logged(&o.prediction_id),
                    "{} is logged but held",
                    o.prediction_id
                );
                assert_eq!(r.predictions_matched, 0);
            }
            pb::OutcomeStatus::Matched | pb::OutcomeStatus::Corrected => {
                assert!(
                    logged(&o.prediction_id),
                    "{} matched but never logged",
                    o.prediction_id
                );
                let copies = if o.prediction_id == "p0" || o.prediction_id == "p1" {
                    2
                } else {
                    1
                };
                assert_eq!(r.predictions_matched, copies, "{}", o.prediction_id);
            }
            pb::OutcomeStatus::Duplicate => {
                assert!(
                    logged(&o.prediction_id),
                    "{} duplicate but never logged",
                    o.prediction_id
                );
                assert_eq!(r.predictions_matched, 0);
            }
            pb::OutcomeStatus::Unspecified => panic!("no status"),
        }
    }
}

fuzz_target!(|data: &[u8]| {
    let Some((&selector, message)) = data.split_first() else {
        return;
    };
    FIXTURE.with(|cell| {
        let mut cell = cell.borrow_mut();
        if cell.as_ref().is_none_or(|f| f.inputs >= FRESH_EVERY) {
            *cell = None;
            *cell = Some(Fixture::new());
        }
        let Some(f) = cell.as_mut() else { return };
        f.inputs += 1;
        match selector % 4 {
            0 | 1 => {
                let Ok(request) = pb::RecordOutcomesRequest::decode(message) else {
                    return;
                };
                let call = f
                    .runtime
                    .block_on(f.api.record_outcomes(tonic::Request::new(request.clone())));
                match call {
                    Ok(response) => check_outcomes(&request, response.get_ref()),
                    Err(status) => check_status(&status),
                }
            }
            2 => {
                let Ok(request) = pb::ReportRequest::decode(message) else {
                    return;
                };
                match f
                    .runtime
                    .block_on(f.api.report(tonic::Request::new(request)))
                {
                    Ok(response) => {
                        for s in &response.get_ref().series {
                            assert!(s.with_outcome <= s.predictions, "{s:?}");
                        }
                    }
                    Err(status) => check_status(&status),
                }
            }
            _ => {
                // Up to 8 days ahead: past the fraud route's 7-day maturity and the 1-day hold.
                let step = i64::from(u16::from_le_bytes([
                    message.first().copied().unwrap_or(0),
                    message.get(1).copied().unwrap_or(0),
                ])) * (8 * DAY / 65_535);
                f.clock.fetch_add(step, Ordering::Relaxed);
                f.log.sweep().expect("sweep");
            }
        }
    });
});
