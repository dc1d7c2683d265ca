//! A record of every answer: the real `probity serve` binary, scored from several connections at once (unary
//! `Score`, `ScoreBatch` of 10 rows, and `ScoreStream`), is killed with SIGKILL in the middle of the load and
//! started again on the same store; then every prediction whose answer the client received is read back from the
//! store itself (a SQLite connection of the test's own, or a PostgreSQL client).
//!
//! - With `routes.NAME.record = "before-answer"` an answer is sent only after the transaction holding its
//!   prediction has committed, so not one answered prediction may be missing. One run per backend is part of the
//!   normal suite; `twenty_kills_per_backend_and_mode` (ignored: a few minutes; `.ci/run` runs it) repeats it
//!   20 times per backend.
//! - With the default `record = "after-answer"` predictions answered within the last flush interval before the
//!   kill may be lost; the ignored test runs that mode the same way and prints how many were (a measurement for
//!   the documentation, no bound is asserted on it).
//!
//! In both modes every stored prediction must have been sent, and stored once. A last test turns the PostgreSQL
//! database read-only under a running server (what a failover to a standby does): a `before-answer` call is then
//! refused with UNAVAILABLE, counted in `probity_store_record_refusals_total{reason="read_only"}`, and its
//! prediction is not stored; once the database is writable again, calls are answered and recorded. The PostgreSQL runs need
//! PostgreSQL at 127.0.0.1:5432 (`PROBITY_TEST_POSTGRES` names another administrative URL;
//! `PROBITY_SKIP_POSTGRES=1` skips them), as `store_postgres.rs` does.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::collections::{HashMap, HashSet};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use probity::serve::proto as pb;

#[path = "support/postgres.rs"]
mod pg;
use pg::{admin_url, TestDb};

#[path = "support/serve.rs"]
mod serve;

struct Server {
    /// Killed with SIGKILL when the handle drops.
    _process: serve::Spawned,
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
        _process: process,
    }
}

// ------------------------------------------------------------------------------------------------ the stores

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Backend {
    Sqlite,
    Postgres,
}

/// One run's store and configuration.
struct Setup {
    _dir: tempfile::TempDir,
    _models: tempfile::TempDir,
    config: std::path::PathBuf,
    db: Option<TestDb>,
    sqlite_file: std::path::PathBuf,
}

impl Setup {
    /// `None` when the PostgreSQL run is skipped.
    fn new(backend: Backend, record: &str) -> Option<Setup> {
        let models = tempfile::tempdir().unwrap();
        std::fs::write(
            models.path().join("linear.json"),
            r#"{"format": "probity.model", "format_version": 1, "name": "linear", "version": "1",
                "features": [{"name": "x", "type": "numeric"}], "margin_scale": "log_odds", "base_rate": 0.3,
                "linear": {"intercept": -0.5, "terms": [{"numeric": {"feature": 0, "coefficient": 1.2}}]}}"#,
        )
        .unwrap();
        let dir = tempfile::tempdir().unwrap();
        let store_dir = dir.path().join("store");
        let (db, section) = match backend {
            Backend::Sqlite => (
                None,
                format!(
                    "directory = {:?}\ndurability = \"normal\"\n",
                    store_dir.display().to_string()
                ),
            ),
            Backend::Postgres => {
                let db = TestDb::create("record")?;
                let url_file = dir.path().join("db-url");
                std::fs::write(&url_file, db.url()).unwrap();
                let section = format!(
                    "backend = \"postgres\"\npostgres_url_file = {:?}\n",
                    url_file.display().to_string()
                );
                (Some(db), section)
            }
        };
        let config = dir.path().join("probity.toml");
        // The default flush interval (200 ms): what the after-answer mode can lose.
        std::fs::write(
            &config,
            format!(
                "[server]\nplaintext = \"loopback\"\n\
                 [models]\ndirectory = {:?}\nwatch = false\n\
                 [store]\n{section}\
                 [routes.credit]\nmodel = \"linear\"\nrecord = \"{record}\"\n",
                models.path().display().to_string(),
            ),
        )
        .unwrap();
        Some(Setup {
            sqlite_file: store_dir.join("predictions.db"),
            _dir: dir,
            _models: models,
            config,
            db,
        })
    }

    /// Every stored prediction id with how often it is stored (blocking).
    fn stored(&self) -> HashMap<String, usize> {
        let mut out: HashMap<String, usize> = HashMap::new();
        match &self.db {
            None => {
                let conn = rusqlite::Connection::open_with_flags(
                    &self.sqlite_file,
                    rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
                )
                .unwrap();
                conn.busy_timeout(Duration::from_secs(10)).unwrap();
                let mut stmt = conn
                    .prepare("SELECT prediction_id FROM predictions")
                    .unwrap();
                for id in stmt.query_map([], |r| r.get::<_, String>(0)).unwrap() {
                    *out.entry(id.unwrap()).or_default() += 1;
                }
            }
            Some(db) => {
                let mut client = postgres::Client::connect(&db.url(), postgres::NoTls).unwrap();
                for row in client
                    .query("SELECT prediction_id FROM predictions", &[])
                    .unwrap()
                {
                    *out.entry(row.get::<_, String>(0)).or_default() += 1;
                }
            }
        }
        out
    }
}

// --------------------------------------------------------------------------------------------------- the load

/// What the clients saw.
#[derive(Default)]
struct Truth {
    sent: Mutex<HashSet<String>>,
    answered: Mutex<HashSet<String>>,
    /// Calls refused (any status), for the report.
    refused: AtomicU64,
}

fn row(id: String, i: usize) -> pb::Row {
    pb::Row {
        prediction_id: id,
        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
            values: vec![(i % 97) as f64 / 20.0 - 2.4],
        })),
        ..Default::default()
    }
}

/// Six connections (two unary, two batches of 10, two streams) score until the server dies, which happens after
/// `run_for`.
async fn load(server: Server, run_for: Duration, run: usize) -> Arc<Truth> {
    let truth = Arc::new(Truth::default());
    let stop = Arc::new(AtomicBool::new(false));
    let mut tasks = Vec::new();
    for t in 0..6usize {
        let channel = tonic::transport::Channel::from_shared(server.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        let truth = Arc::clone(&truth);
        let stop = Arc::clone(&stop);
        tasks.push(tokio::spawn(async move {
            let mut client = pb::scoring_client::ScoringClient::new(channel);
            let id = move |n: usize| format!("r{run}-t{t}-{n}");
            let mut n = 0usize;
            match t % 3 {
                0 => {
                    while !stop.load(Ordering::Relaxed) {
                        truth.sent.lock().unwrap().insert(id(n));
                        let call = client
                            .score(pb::ScoreRequest {
                                explain: 0,
                                route: "credit".into(),
                                row: Some(row(id(n), n)),
                            })
                            .await;
                        match call {
                            Ok(a) => {
                                truth
                                    .answered
                                    .lock()
                                    .unwrap()
                                    .insert(a.into_inner().prediction_id);
                            }
                            // Refused for want of a record: counted, and the load goes on.
                            Err(s) if s.message().contains("prediction store") => {
                                truth.refused.fetch_add(1, Ordering::Relaxed);
                            }
                            // The server is gone.
                            Err(_) => break,
                        }
                        n += 1;
                    }
                }
                1 => {
                    while !stop.load(Ordering::Relaxed) {
                        let rows: Vec<pb::Row> = (n..n + 10).map(|i| row(id(i), i)).collect();
                        truth
                            .sent
                            .lock()
                            .unwrap()
                            .extend(rows.iter().map(|r| r.prediction_id.clone()));
                        n += 10;
                        let call = client
                            .score_batch(pb::ScoreBatchRequest {
                                explain: 0,
                                route: "credit".into(),
                                rows,
                            })
                            .await;
                        match call {
                            Ok(a) => truth.answered.lock().unwrap().extend(
                                a.into_inner().results.into_iter().map(|r| r.prediction_id),
                            ),
                            Err(s) if s.message().contains("prediction store") => {
                                truth.refused.fetch_add(1, Ordering::Relaxed);
                            }
                            Err(_) => break,
                        }
                    }
                }
                _ => {
                    // A stream fed as fast as it is answered, with up to 16 rows in flight.
                    let (feed, rows) = tokio::sync::mpsc::channel::<pb::ScoreRequest>(16);
                    let Ok(response) = client
                        .score_stream(tokio_stream::wrappers::ReceiverStream::new(rows))
                        .await
                    else {
                        return;
                    };
                    let mut answers = response.into_inner();
                    let feeder = {
                        let truth = Arc::clone(&truth);
                        let stop = Arc::clone(&stop);
                        tokio::spawn(async move {
                            let mut n = 0usize;
                            while !stop.load(Ordering::Relaxed) {
                                truth.sent.lock().unwrap().insert(id(n));
                                let request = pb::ScoreRequest {
                                    explain: 0,
                                    route: "credit".into(),
                                    row: Some(row(id(n), n)),
                                };
                                if feed.send(request).await.is_err() {
                                    break;
                                }
                                n += 1;
                            }
                        })
                    };
                    while let Ok(Some(a)) = answers.message().await {
                        match a.outcome {
                            Some(pb::score_stream_response::Outcome::Result(r)) => {
                                truth.answered.lock().unwrap().insert(r.prediction_id);
                            }
                            _ => {
                                truth.refused.fetch_add(1, Ordering::Relaxed);
                            }
                        }
                    }
                    feeder.abort();
                }
            }
        }));
    }
    tokio::time::sleep(run_for).await;
    drop(server); // SIGKILL in the middle of the load
    stop.store(true, Ordering::Relaxed);
    for t in tasks {
        t.await.unwrap();
    }
    truth
}

/// What one run found.
#[derive(Debug, Default)]
struct Figures {
    answered: usize,
    stored: usize,
    missing: usize,
    refused: u64,
}

/// One run: load, SIGKILL, restart on the same store, read it back.
fn run_once(backend: Backend, record: &str, run: usize) -> Option<Figures> {
    let setup = Setup::new(backend, record)?;
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let truth = rt.block_on(async {
        let server = start(&setup.config).await;
        // Varies the moment of the kill within the flush interval from run to run.
        load(
            server,
            Duration::from_millis(1_000 + 37 * (run as u64 % 10)),
            run,
        )
        .await
    });
    // Restarted on the same store: recovery (SQLite's WAL) has run, and the server serves again.
    let restarted = rt.block_on(start(&setup.config));
    let stored = setup.stored();
    drop(restarted);
    let sent = truth.sent.lock().unwrap();
    let answered = truth.answered.lock().unwrap();
    assert!(
        answered.len() >= 200,
        "too little load to mean anything: {} answered",
        answered.len()
    );
    for (id, times) in &stored {
        assert!(sent.contains(id), "{id} is stored but was never sent");
        assert_eq!(*times, 1, "{id} is stored {times} times");
    }
    let missing = answered
        .iter()
        .filter(|id| !stored.contains_key(*id))
        .count();
    Some(Figures {
        answered: answered.len(),
        stored: stored.len(),
        missing,
        refused: truth.refused.load(Ordering::Relaxed),
    })
}

fn check_before_answer(backend: Backend, runs: usize) {
    let mut total = Figures::default();
    for run in 0..runs {
        let Some(f) = run_once(backend, "before-answer", run) else {
            return;
        };
        eprintln!("{backend:?} before-answer run {run}: {f:?}");
        assert_eq!(
            f.missing, 0,
            "{backend:?} run {run}: {} answered predictions are not in the store after SIGKILL ({f:?})",
            f.missing
        );
        total.answered += f.answered;
        total.stored += f.stored;
        total.refused += f.refused;
    }
    eprintln!(
        "{backend:?} record = \"before-answer\", {runs} SIGKILL runs: {} predictions answered, 0 missing, {} stored, \
         {} calls refused",
        total.answered, total.stored, total.refused
    );
}

#[test]
fn sigkill_under_load_loses_no_answered_prediction_sqlite() {
    check_before_answer(Backend::Sqlite, 1);
}

#[test]
fn sigkill_under_load_loses_no_answered_prediction_postgres() {
    check_before_answer(Backend::Postgres, 1);
}

#[test]
#[ignore = "20 SIGKILL runs per backend and mode, a few minutes; .ci/run runs it explicitly"]
fn twenty_kills_per_backend_and_mode() {
    for backend in [Backend::Sqlite, Backend::Postgres] {
        check_before_answer(backend, 20);
        // The default mode, measured the same way: what it loses is reported, not bounded.
        let (mut answered, mut missing, mut worst, mut runs) = (0, 0, 0, 0);
        for run in 0..20 {
            let Some(f) = run_once(backend, "after-answer", run) else {
                break;
            };
            eprintln!("{backend:?} after-answer run {run}: {f:?}");
            answered += f.answered;
            missing += f.missing;
            worst = worst.max(f.missing);
            runs += 1;
        }
        eprintln!(
            "{backend:?} record = \"after-answer\", {runs} SIGKILL runs: {answered} predictions answered, {missing} \
             missing after restart (at most {worst} in one run)"
        );
    }
}

/// The sum of a family's series on the server's `/metrics` that carry every one of `labels` (0 when absent).
async fn counter(addr: std::net::SocketAddr, family: &str, labels: &[&str]) -> f64 {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(b"GET /metrics HTTP/1.0\r\nHost: test\r\n\r\n")
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text.lines()
        .filter(|l| l.starts_with(&format!("{family}{{")) && labels.iter().all(|x| l.contains(x)))
        .filter_map(|l| l.rsplit_once(' ')?.1.parse::<f64>().ok())
        .sum()
}

/// Turns the test database read-only (or back) for new sessions and cuts the server's session, so that its
/// store connects again under the new setting.
fn read_only(db: &TestDb, on: bool) {
    let mut admin = postgres::Client::connect(&admin_url(), postgres::NoTls).unwrap();
    admin
        .batch_execute(&format!(
            "ALTER DATABASE {} SET default_transaction_read_only = {}",
            db.name,
            if on { "on" } else { "off" }
        ))
        .unwrap();
    admin
        .query(
            "SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = $1 AND pid <> pg_backend_pid()",
            &[&db.name],
        )
        .unwrap();
}

#[test]
fn a_store_that_cannot_commit_refuses_the_call_with_unavailable_and_counts_it() {
    let Some(setup) = Setup::new(Backend::Postgres, "before-answer") else {
        return;
    };
    let db = setup.db.as_ref().unwrap();
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let score = |server: &Server, id: &str| {
        let url = server.url.clone();
        let id = id.to_string();
        async move {
            let channel = tonic::transport::Channel::from_shared(url)
                .unwrap()
                .connect()
                .await
                .unwrap();
            pb::scoring_client::ScoringClient::new(channel)
                .score(pb::ScoreRequest {
                    explain: 0,
                    route: "credit".into(),
                    row: Some(row(id, 7)),
                })
                .await
        }
    };
    let server = rt.block_on(start(&setup.config));
    rt.block_on(score(&server, "before")).unwrap();

    read_only(db, true);
    let refused = rt.block_on(score(&server, "while-read-only")).unwrap_err();
    assert_eq!(refused.code(), tonic::Code::Unavailable, "{refused:?}");
    assert!(
        refused.message().contains("read_only") && refused.message().contains("not answered"),
        "{}",
        refused.message()
    );
    let counted = rt.block_on(counter(
        server.metrics,
        "probity_store_record_refusals_total",
        &["reason=\"read_only\"", "route=\"credit\""],
    ));
    assert_eq!(counted, 1.0, "refusals counted");

    read_only(db, false);
    // The first batch after the cut may meet the dead session; the store connects again and retries it.
    rt.block_on(score(&server, "after")).unwrap();
    let stored = setup.stored();
    assert!(
        stored.contains_key("before") && stored.contains_key("after"),
        "{stored:?}"
    );
    assert!(
        !stored.contains_key("while-read-only"),
        "a refused call's prediction was stored"
    );
    drop(server);
}
