//! Restart: the real `probity serve` binary is killed with SIGKILL after predictions (logged, as the Report call
//! confirms) and outcomes (acknowledged by RecordOutcomes, which answers after its commit), started again on the
//! same data directory, and the report is the same; sending the same outcomes again changes nothing, and a held
//! outcome still matches when its prediction finally arrives.
//!
//! Durability setting under test: `store.durability = "normal"` (WAL, no flush per commit), which keeps everything
//! committed across a killed process; only a power loss could cost the last commits (DEVELOPERS.md).
//!
//! The second test kills the server under mixed load: scoring (unary and batches) from several connections, two
//! outcome streams, a model reload every 200 ms and the test itself reading the log file. A prediction counts as
//! durably logged once the test has seen it committed in the log file (a read-only SQLite connection of the
//! test's own) or counted it in `probity_store_predictions_written_total`; an outcome once its stream answered it
//! (the answer comes after the commit). After the restart every one of them is in the log, nothing is there that
//! was not sent, and replaying every acknowledged outcome matches nothing a second time.

#![allow(clippy::unwrap_used)]

use std::collections::{HashMap, HashSet};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use probity::serve::proto as pb;
use serde_json::Value;
use tokio_stream::StreamExt;

#[path = "support/serve.rs"]
mod serve;

struct Server {
    process: serve::Spawned,
    url: String,
    metrics: std::net::SocketAddr,
}

async fn start(config: &std::path::Path) -> Server {
    let config = config.to_path_buf();
    let process = tokio::task::spawn_blocking(move || serve::Spawned::start(&config, &[]))
        .await
        .unwrap();
    Server {
        url: process.url(),
        metrics: process.metrics,
        process,
    }
}

impl Server {
    async fn clients(
        &self,
    ) -> (
        pb::scoring_client::ScoringClient<tonic::transport::Channel>,
        pb::outcomes_client::OutcomesClient<tonic::transport::Channel>,
    ) {
        let ch = tonic::transport::Channel::from_shared(self.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        (
            pb::scoring_client::ScoringClient::new(ch.clone()),
            pb::outcomes_client::OutcomesClient::new(ch),
        )
    }

    fn kill(self) {
        // SIGKILL: no drain, no flush.
        self.process.kill();
    }
}

fn rows(range: std::ops::Range<usize>) -> Vec<pb::Row> {
    range
        .map(|i| pb::Row {
            prediction_id: format!("p-{i}"),
            features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                values: vec![(i as f64 - 100.0) / 40.0],
            })),
            ..Default::default()
        })
        .collect()
}

/// The rule that makes the labels: deterministic, both classes, not a function of the score alone.
fn label(i: usize) -> bool {
    i.is_multiple_of(3) || i > 150
}

fn outcomes(range: std::ops::Range<usize>) -> Vec<pb::Outcome> {
    range
        .map(|i| pb::Outcome {
            prediction_id: format!("p-{i}"),
            label: label(i),
            outcome_time_unix_ms: 0,
        })
        .collect()
}

async fn report(o: &mut pb::outcomes_client::OutcomesClient<tonic::transport::Channel>) -> Value {
    let r = o
        .report(pb::ReportRequest::default())
        .await
        .unwrap()
        .into_inner();
    serde_json::from_str(&r.json).unwrap()
}

#[tokio::test]
async fn sigkill_loses_nothing_acknowledged_and_matching_stays_exactly_once() {
    let models = tempfile::tempdir().unwrap();
    std::fs::write(
        models.path().join("linear.json"),
        r#"{"format": "probity.model", "format_version": 1, "name": "linear", "version": "1",
            "features": [{"name": "x", "type": "numeric"}], "margin_scale": "log_odds", "base_rate": 0.5,
            "linear": {"intercept": 0.25, "terms": [{"numeric": {"feature": 0, "coefficient": 1.5}}]}}"#,
    )
    .unwrap();
    let data = tempfile::tempdir().unwrap();
    let config = data.path().join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nplaintext = \"loopback\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n[store]\ndirectory = {:?}\nflush_interval = \"10ms\"\n\
             [routes.r]\nmodel = \"linear\"\n",
            models.path().display().to_string(),
            data.path().join("log").display().to_string()
        ),
    )
    .unwrap();

    let server = start(&config).await;
    let (mut scoring, mut out) = server.clients().await;
    // An outcome for a prediction that comes only after the restart.
    let held = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(199..200),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(held.results[0].status, pb::OutcomeStatus::Pending as i32);
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "r".into(),
            rows: rows(0..199),
        })
        .await
        .unwrap();
    // Predictions are acknowledged by the log once the writer has committed them (within store.flush_interval).
    let mut before = report(&mut out).await;
    for _ in 0..200 {
        if before["series"][0]["predictions"] == 199 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
        before = report(&mut out).await;
    }
    assert_eq!(before["series"][0]["predictions"], 199);
    let first = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(0..150),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(first
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Matched as i32));
    let before = report(&mut out).await;
    server.kill();

    let server = start(&config).await;
    let (mut scoring, mut out) = server.clients().await;
    let after = report(&mut out).await;
    assert_eq!(
        after["series"], before["series"],
        "the same report after SIGKILL"
    );
    assert_eq!(after["series"][0]["with_outcome"], 150);
    assert_eq!(after["outcomes"]["pending"], 1);
    let again = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(0..150),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(again
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Duplicate as i32));
    assert_eq!(
        report(&mut out).await["series"],
        before["series"],
        "nothing counted twice"
    );

    // The held outcome matches its prediction, scored now.
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "r".into(),
            rows: rows(199..200),
        })
        .await
        .unwrap();
    let mut last = report(&mut out).await;
    for _ in 0..200 {
        if last["series"][0]["with_outcome"] == 151 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
        last = report(&mut out).await;
    }
    assert_eq!(last["series"][0]["with_outcome"], 151);
    assert_eq!(last["outcomes"]["pending"], 0);
    server.kill();
}

// ------------------------------------------------------------------------------------------ mixed load, SIGKILL

/// The deterministic label of an id (both classes).
fn label_of(id: &str) -> bool {
    id.bytes().map(u32::from).sum::<u32>() % 3 == 0
}

fn model_file(version: &str) -> String {
    format!(
        r#"{{"format": "probity.model", "format_version": 1, "name": "linear", "version": "{version}",
            "features": [{{"name": "x", "type": "numeric"}}], "margin_scale": "log_odds", "base_rate": 0.5,
            "linear": {{"intercept": 0.25, "terms": [{{"numeric": {{"feature": 0, "coefficient": 1.5}}}}]}}}}"#
    )
}

/// Prediction ids and their routes in the log file, read through a read-only connection of the test's own.
fn committed(db: &std::path::Path) -> HashMap<String, Vec<String>> {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    conn.busy_timeout(Duration::from_secs(10)).unwrap();
    let mut stmt = conn
        .prepare("SELECT prediction_id, route FROM predictions")
        .unwrap();
    let mut out: HashMap<String, Vec<String>> = HashMap::new();
    for row in stmt
        .query_map([], |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?)))
        .unwrap()
    {
        let (id, route) = row.unwrap();
        out.entry(id).or_default().push(route);
    }
    out
}

/// Outcomes in the log file: id -> (label, state).
fn outcome_rows(db: &std::path::Path) -> HashMap<String, (bool, String)> {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    conn.busy_timeout(Duration::from_secs(10)).unwrap();
    let mut stmt = conn
        .prepare("SELECT prediction_id, label, state FROM outcomes")
        .unwrap();
    let rows = stmt
        .query_map([], |r| {
            Ok((
                r.get::<_, String>(0)?,
                (r.get::<_, i64>(1)? != 0, r.get::<_, String>(2)?),
            ))
        })
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    rows
}

async fn written_counter(addr: std::net::SocketAddr) -> Option<f64> {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(addr).await.ok()?;
    stream
        .write_all(b"GET /metrics HTTP/1.0\r\nHost: test\r\n\r\n")
        .await
        .ok()?;
    let mut text = String::new();
    stream.read_to_string(&mut text).await.ok()?;
    Some(
        text.lines()
            .filter(|l| l.starts_with("probity_store_predictions_written_total"))
            .filter_map(|l| l.rsplit_once(' ')?.1.parse::<f64>().ok())
            .sum(),
    )
}

/// What the test knows happened, kept while the load runs.
#[derive(Default)]
struct Truth {
    /// Ids sent in a scoring call (answered or not).
    sent: Mutex<HashSet<String>>,
    /// Ids answered, with their route.
    answered: Mutex<HashMap<String, String>>,
    /// Outcomes whose stream answered (id -> label sent).
    acknowledged: Mutex<HashMap<String, bool>>,
    /// Ids seen committed in the log file while the server ran.
    seen_committed: Mutex<HashSet<String>>,
    /// The largest `probity_store_predictions_written_total` seen.
    written: AtomicU64,
    reloads: AtomicU64,
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn sigkill_under_mixed_load_keeps_every_committed_record_and_matching_exactly_once() {
    let models = tempfile::tempdir().unwrap();
    let model_path = models.path().join("linear.json");
    std::fs::write(&model_path, model_file("1")).unwrap();
    let data = tempfile::tempdir().unwrap();
    let log_dir = data.path().join("log");
    let db = log_dir.join("predictions.db");
    let config = data.path().join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nplaintext = \"loopback\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n[store]\ndirectory = {:?}\nflush_interval = \"10ms\"\n\
             durability = \"normal\"\n[routes.r]\nmodel = \"linear\"\n[routes.s]\nmodel = \"linear\"\n",
            models.path().display().to_string(),
            log_dir.display().to_string()
        ),
    )
    .unwrap();

    let server = start(&config).await;
    let truth = Arc::new(Truth::default());
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    let mut feeds = Vec::new();

    // Two outcome streams, each fed the ids answered on two scoring connections.
    for _ in 0..2 {
        let (feed, ids) = tokio::sync::mpsc::unbounded_channel::<String>();
        feeds.push(feed);
        let channel = tonic::transport::Channel::from_shared(server.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        let truth = Arc::clone(&truth);
        tasks.push(tokio::spawn(async move {
            let mut client = pb::outcomes_client::OutcomesClient::new(channel);
            let outgoing =
                tokio_stream::wrappers::UnboundedReceiverStream::new(ids).map(|id| pb::Outcome {
                    label: label_of(&id),
                    prediction_id: id,
                    outcome_time_unix_ms: 0,
                });
            let Ok(response) = client.record_outcome_stream(outgoing).await else {
                return;
            };
            let mut results = response.into_inner();
            while let Ok(Some(r)) = results.message().await {
                assert!(
                    r.status == pb::OutcomeStatus::Matched as i32
                        || r.status == pb::OutcomeStatus::Pending as i32,
                    "{r:?}"
                );
                let label = label_of(&r.prediction_id);
                truth
                    .acknowledged
                    .lock()
                    .unwrap()
                    .insert(r.prediction_id, label);
            }
        }));
    }

    // Four scoring connections: unary calls and batches of 10, on two routes; every other id gets an outcome.
    for t in 0..4usize {
        let channel = tonic::transport::Channel::from_shared(server.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        let truth = Arc::clone(&truth);
        let stop = Arc::clone(&stop);
        let feed = feeds[t % 2].clone();
        tasks.push(tokio::spawn(async move {
            let mut client = pb::scoring_client::ScoringClient::new(channel);
            let route = if t % 2 == 0 { "r" } else { "s" };
            let mut n = 0usize;
            while !stop.load(Ordering::Relaxed) {
                let size = if n.is_multiple_of(3) { 10 } else { 1 };
                let batch: Vec<pb::Row> = (0..size)
                    .map(|k| pb::Row {
                        prediction_id: format!("t{t}-{}", n + k),
                        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                            values: vec![((n + k) % 200) as f64 / 40.0 - 2.5],
                        })),
                        ..Default::default()
                    })
                    .collect();
                n += batch.len();
                truth
                    .sent
                    .lock()
                    .unwrap()
                    .extend(batch.iter().map(|r| r.prediction_id.clone()));
                let answered: Vec<String> = if batch.len() == 1 {
                    match client
                        .score(pb::ScoreRequest {
                            explain: 0,
                            route: route.into(),
                            row: batch.into_iter().next(),
                        })
                        .await
                    {
                        Ok(a) => vec![a.into_inner().prediction_id],
                        Err(_) => break,
                    }
                } else {
                    match client
                        .score_batch(pb::ScoreBatchRequest {
                            explain: 0,
                            route: route.into(),
                            rows: batch,
                        })
                        .await
                    {
                        Ok(a) => a
                            .into_inner()
                            .results
                            .into_iter()
                            .map(|r| r.prediction_id)
                            .collect(),
                        Err(_) => break,
                    }
                };
                for id in answered {
                    truth
                        .answered
                        .lock()
                        .unwrap()
                        .insert(id.clone(), route.to_string());
                    if id.bytes().last().is_some_and(|b| b % 2 == 0) {
                        let _ = feed.send(id);
                    }
                }
            }
        }));
    }
    drop(feeds);

    // A model reload every 200 ms, alternating two versions.
    {
        let channel = tonic::transport::Channel::from_shared(server.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        let truth = Arc::clone(&truth);
        let stop = Arc::clone(&stop);
        let model_path = model_path.clone();
        tasks.push(tokio::spawn(async move {
            let mut client = pb::models_client::ModelsClient::new(channel);
            let mut k = 0u64;
            while !stop.load(Ordering::Relaxed) {
                k += 1;
                let next = model_path.with_extension("tmp");
                std::fs::write(&next, model_file(&(1 + k % 2).to_string())).unwrap();
                std::fs::rename(&next, &model_path).unwrap();
                if client.reload(pb::ReloadRequest {}).await.is_err() {
                    break;
                }
                truth.reloads.fetch_add(1, Ordering::Relaxed);
                tokio::time::sleep(Duration::from_millis(200)).await;
            }
        }));
    }

    // Let it run, looking at what is committed as it goes; the last look is just before the kill.
    let metrics = server.metrics;
    for round in 0..12 {
        tokio::time::sleep(Duration::from_millis(250)).await;
        if let Some(w) = written_counter(metrics).await {
            truth.written.fetch_max(w as u64, Ordering::Relaxed);
        }
        if round % 3 == 2 {
            let db = db.clone();
            let seen = tokio::task::spawn_blocking(move || committed(&db))
                .await
                .unwrap();
            truth
                .seen_committed
                .lock()
                .unwrap()
                .extend(seen.into_keys());
        }
    }
    server.kill();
    stop.store(true, Ordering::Relaxed);
    for t in tasks {
        t.await.unwrap();
    }

    let sent = truth.sent.lock().unwrap().clone();
    let answered = truth.answered.lock().unwrap().clone();
    let acknowledged = truth.acknowledged.lock().unwrap().clone();
    let seen = truth.seen_committed.lock().unwrap().clone();
    let written = truth.written.load(Ordering::Relaxed);
    assert!(answered.len() >= 500, "too little load: {}", answered.len());
    assert!(
        acknowledged.len() >= 100,
        "too few outcomes: {}",
        acknowledged.len()
    );
    assert!(truth.reloads.load(Ordering::Relaxed) >= 3);
    assert!(!seen.is_empty());

    // Restart on the same data directory.
    let server = start(&config).await;
    let (_, mut out) = server.clients().await;
    let logged = committed(&db);
    eprintln!(
        "mixed load: {} predictions answered, {} in the log after SIGKILL and restart ({} seen committed before, \
         written counter {written}), {} outcomes acknowledged, {} reloads",
        answered.len(),
        logged.len(),
        seen.len(),
        acknowledged.len(),
        truth.reloads.load(Ordering::Relaxed)
    );
    let missing: Vec<&String> = seen.iter().filter(|id| !logged.contains_key(*id)).collect();
    assert!(
        missing.is_empty(),
        "committed before the kill, gone after: {missing:?}"
    );
    assert!(
        logged.len() as u64 >= written,
        "the written counter said {written}"
    );
    for (id, routes) in &logged {
        assert!(sent.contains(id), "{id} in the log was never sent");
        assert_eq!(routes.len(), 1, "{id} logged {routes:?}");
        if let Some(route) = answered.get(id) {
            assert_eq!(&routes[0], route, "{id}");
        }
    }
    let outcomes_now = outcome_rows(&db);
    for (id, label) in &acknowledged {
        let (stored, _) = outcomes_now
            .get(id)
            .unwrap_or_else(|| panic!("acknowledged outcome {id} is not in the log"));
        assert_eq!(stored, label, "{id}");
    }
    // Outcomes committed whose answer the kill cut off are there too, as sent: only for answered ids. Every stored
    // outcome, acknowledged or not, is matched exactly when its prediction is in the log.
    for (id, (label, state)) in &outcomes_now {
        assert!(answered.contains_key(id), "outcome for {id} was never sent");
        assert_eq!(*label, label_of(id), "{id}");
        let expected = if logged.contains_key(id) {
            "matched"
        } else {
            "pending"
        };
        assert_eq!(state, expected, "{id}");
    }

    // The report agrees with what the log holds after the restart: every stored outcome on a logged prediction
    // (the acknowledged ones and those committed just before the kill cut off their answer), positives among them.
    let truth_pairs: Vec<bool> = outcomes_now
        .iter()
        .filter(|(id, _)| logged.contains_key(*id))
        .map(|(_, (l, _))| *l)
        .collect();
    let sums = |r: &Value| -> (u64, u64, f64) {
        let mut n = (0, 0, 0.0);
        for s in r["series"].as_array().unwrap() {
            n.0 += s["predictions"].as_u64().unwrap();
            n.1 += s["with_outcome"].as_u64().unwrap();
            if let Some(rate) = s["observed_base_rate"].as_f64() {
                n.2 += rate * s["with_outcome"].as_f64().unwrap();
            }
        }
        n
    };
    let before = report(&mut out).await;
    let (predictions, with_outcome, positives) = sums(&before);
    assert_eq!(predictions, logged.len() as u64);
    assert_eq!(with_outcome, truth_pairs.len() as u64);
    assert_eq!(
        positives.round() as usize,
        truth_pairs.iter().filter(|l| **l).count()
    );

    // Replaying every acknowledged outcome matches nothing twice.
    let replay: Vec<pb::Outcome> = acknowledged
        .iter()
        .map(|(id, label)| pb::Outcome {
            prediction_id: id.clone(),
            label: *label,
            outcome_time_unix_ms: 0,
        })
        .collect();
    for chunk in replay.chunks(5_000) {
        let results = out
            .record_outcomes(pb::RecordOutcomesRequest {
                outcomes: chunk.to_vec(),
            })
            .await
            .unwrap()
            .into_inner()
            .results;
        for r in results {
            assert_eq!(r.predictions_matched, 0, "{r:?}");
            let expected = if logged.contains_key(&r.prediction_id) {
                pb::OutcomeStatus::Duplicate
            } else {
                pb::OutcomeStatus::Pending
            };
            assert_eq!(r.status, expected as i32, "{r:?}");
        }
    }
    let after = report(&mut out).await;
    assert_eq!(after["series"], before["series"], "nothing counted twice");
    let text = metrics_text(server.metrics).await;
    assert!(
        !text
            .lines()
            .any(|l| l.starts_with("probity_outcomes_matched_total") && !l.ends_with(" 0")),
        "the replay settled pairs again:\n{text}"
    );
    server.kill();
}

async fn metrics_text(addr: std::net::SocketAddr) -> String {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(b"GET /metrics HTTP/1.0\r\nHost: test\r\n\r\n")
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text
}
