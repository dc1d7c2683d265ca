//! `probity-load soak`: a sustained mixed load against a `probity serve` it starts itself, with the prediction store
//! on: scoring from many connections at a fixed rate (open loop, unary calls and batches), outcome streams for the
//! answered predictions, a model reload every few seconds (the model file rewritten with another version, then the
//! Reload call) and a report every few seconds (the last minute). It samples the server's resident memory from
//! `/proc` every 2 s, prints a summary and one JSON line, and fails (exit status 1) on any failed request, on a p99
//! latency above `--p99-limit-ms` (a stall detector, not a speed target), or on resident memory growing by more
//! than `--rss-margin-mib` between the start of the measured time (after the warm-up) and its end. Growth is taken
//! between the lowest samples of the first and the last quarter of the measured time (each at most 60 s): a
//! report holds its rows while it runs, so one sample can catch a passing peak, but a leak raises the floor.
//!
//! ```sh
//! cargo build --release -p probity --bins && target/release/probity-load soak --minutes 10   # the long form
//! tools/soak.sh                                                                              # the same
//! ```

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::{bail, Context, Result};
use probity::serve::proto as pb;
use probity_models::Model;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, LogNormal};
use tonic::transport::{Channel, Endpoint};

use crate::{percentile, rss_kib};

/// How old a prediction is when its outcome is sent.
const OUTCOME_DELAY: Duration = Duration::from_secs(1);

/// The demo tree ensemble (100 trees of depth up to 5, eight features), the default model.
const DEFAULT_MODEL: &str = concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/../../service/demo/harbourline-fraud-trees.json"
);

#[derive(clap::Args)]
pub struct SoakArgs {
    /// Length of the run in minutes (the long form is 10).
    #[arg(long, conflicts_with = "seconds")]
    minutes: Option<f64>,
    /// Length of the run in seconds (instead of --minutes).
    #[arg(long)]
    seconds: Option<f64>,
    /// Seconds at the start whose latencies are not counted; resident memory is measured from its end.
    #[arg(long, default_value_t = 30.0)]
    warmup: f64,
    /// The `probity` binary to start (default: the one beside this program).
    #[arg(long)]
    probity: Option<PathBuf>,
    /// The model file served (and rewritten with alternating versions for the reloads).
    #[arg(long, default_value = DEFAULT_MODEL)]
    model: PathBuf,
    /// Scoring connections, each with its own HTTP/2 connection and schedule.
    #[arg(long, default_value_t = 16)]
    connections: usize,
    /// Scoring calls per second in total (open loop); every tenth call is a batch of 20 rows.
    #[arg(long, default_value_t = 400.0)]
    rate: f64,
    /// Outcome streams, each sending outcomes for a share of the answered predictions.
    #[arg(long, default_value_t = 2)]
    outcome_streams: usize,
    /// One answered prediction in this many gets an outcome.
    #[arg(long, default_value_t = 4)]
    outcome_every: u64,
    /// Seconds between model reloads.
    #[arg(long, default_value_t = 5.0)]
    reload_every: f64,
    /// Seconds between reports (each over the last minute).
    #[arg(long, default_value_t = 5.0)]
    report_every: f64,
    /// Fail when the p99 latency of any call kind exceeds this many milliseconds (a stall detector).
    #[arg(long, default_value_t = 2000.0)]
    p99_limit_ms: f64,
    /// Fail when the lowest resident memory sample of the last quarter of the measured time (at most 60 s) exceeds
    /// that of the first quarter by more than this many MiB.
    #[arg(long, default_value_t = 32.0)]
    rss_margin_mib: f64,
    /// Keep the server's files (configuration, model, prediction store) in this directory instead of a temporary one.
    #[arg(long)]
    dir: Option<PathBuf>,
    /// Print only the JSON line.
    #[arg(long)]
    json: bool,
}

/// Latencies (microseconds) and failures of one kind of call.
#[derive(Default)]
struct Calls {
    latencies_us: Mutex<Vec<u32>>,
    count: AtomicU64,
    failures: AtomicU64,
    first_failure: Mutex<Option<String>>,
}

impl Calls {
    fn ok(&self, measured: bool, took: Duration) {
        self.count.fetch_add(1, Ordering::Relaxed);
        if measured {
            let us = took.as_micros().min(u128::from(u32::MAX)) as u32;
            self.latencies_us
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .push(us);
        }
    }

    fn failed(&self, what: String) {
        self.count.fetch_add(1, Ordering::Relaxed);
        self.failures.fetch_add(1, Ordering::Relaxed);
        let mut first = self.first_failure.lock().unwrap_or_else(|e| e.into_inner());
        if first.is_none() {
            *first = Some(what);
        }
    }

    fn summary(&self) -> serde_json::Value {
        let mut l = self
            .latencies_us
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .clone();
        l.sort_unstable();
        serde_json::json!({
            "calls": self.count.load(Ordering::Relaxed),
            "failures": self.failures.load(Ordering::Relaxed),
            "first_failure": *self.first_failure.lock().unwrap_or_else(|e| e.into_inner()),
            "p50_ms": percentile(&l, 0.50) / 1000.0,
            "p99_ms": percentile(&l, 0.99) / 1000.0,
            "max_ms": l.last().map(|&m| f64::from(m) / 1000.0),
        })
    }
}

#[derive(Default)]
struct Tally {
    score: Calls,
    batch: Calls,
    outcomes: Calls,
    reload: Calls,
    report: Calls,
    matched: AtomicU64,
    pending: AtomicU64,
}

/// The server process, its stderr drained by a thread that counts warnings and errors.
struct ServerProcess {
    child: Child,
    warnings: Arc<AtomicU64>,
    errors: Arc<Mutex<Vec<String>>>,
}

impl ServerProcess {
    fn pid(&self) -> u32 {
        self.child.id()
    }

    /// SIGTERM (through `kill(1)`), then the exit status.
    fn stop(mut self) -> Result<std::process::ExitStatus> {
        Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status()
            .context("running kill")?;
        Ok(self.child.wait()?)
    }
}

impl Drop for ServerProcess {
    fn drop(&mut self) {
        if let Ok(None) = self.child.try_wait() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

fn start_server(probity: &Path, config: &Path) -> Result<(ServerProcess, String, String)> {
    let mut child = Command::new(probity)
        .args(["serve", "--config"])
        .arg(config)
        .args([
            "--grpc-listen",
            "127.0.0.1:0",
            "--metrics-listen",
            "127.0.0.1:0",
        ])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .with_context(|| format!("starting {}", probity.display()))?;
    let stderr = child.stderr.take().context("no stderr")?;
    let warnings = Arc::new(AtomicU64::new(0));
    let errors = Arc::new(Mutex::new(Vec::new()));
    let (ready, wait) = std::sync::mpsc::channel();
    {
        let warnings = Arc::clone(&warnings);
        let errors = Arc::clone(&errors);
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines() {
                let Ok(line) = line else { break };
                let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) else {
                    errors.lock().unwrap_or_else(|e| e.into_inner()).push(line);
                    continue;
                };
                match v["level"].as_str() {
                    Some("WARN") => {
                        warnings.fetch_add(1, Ordering::Relaxed);
                    }
                    Some("ERROR") => errors
                        .lock()
                        .unwrap_or_else(|e| e.into_inner())
                        .push(line.clone()),
                    _ => {}
                }
                if v["message"] == "probity serving" {
                    let _ = ready.send((
                        v["grpc_addr"].as_str().unwrap_or_default().to_string(),
                        v["metrics_addr"].as_str().unwrap_or_default().to_string(),
                    ));
                }
            }
        });
    }
    let server = ServerProcess {
        child,
        warnings,
        errors,
    };
    match wait.recv_timeout(Duration::from_secs(120)) {
        Ok((grpc, metrics)) => Ok((server, grpc, metrics)),
        Err(_) => bail!(
            "the server did not start: {}",
            server
                .errors
                .lock()
                .unwrap_or_else(|e| e.into_inner())
                .join("\n")
        ),
    }
}

/// One row of the model's features, by name: plausible values for the demo model's features, standard normal
/// for any other numeric feature, a uniformly drawn category for a categorical one.
fn row(model: &Model, rng: &mut ChaCha8Rng, id: String) -> pb::Row {
    let mut values = std::collections::HashMap::new();
    for f in model.schema().features() {
        let kind = if f.is_categorical() {
            let cats = f.categories();
            pb::feature_value::Kind::Category(
                cats.get(rng.random_range(0..cats.len().max(1)))
                    .cloned()
                    .unwrap_or_default(),
            )
        } else {
            let x = match f.name.as_str() {
                "amount" => LogNormal::new(3.5, 1.2).map_or(30.0, |d| d.sample(rng)),
                "hour" => f64::from(rng.random_range(0..24u8)),
                "card_age_days" => f64::from(rng.random_range(0..3000u16)),
                "txn_count_24h" => f64::from(rng.random_range(0..20u8)),
                "distance_km" => LogNormal::new(2.0, 1.5).map_or(10.0, |d| d.sample(rng)),
                "foreign" => f64::from(u8::from(rng.random::<f64>() < 0.1)),
                _ => rng.random::<f64>() * 4.0 - 2.0,
            };
            pb::feature_value::Kind::Number(x)
        };
        values.insert(f.name.clone(), pb::FeatureValue { kind: Some(kind) });
    }
    pb::Row {
        prediction_id: id,
        features: Some(pb::row::Features::Named(pb::NamedFeatures { values })),
        ..Default::default()
    }
}

fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
}

async fn connect(url: &str) -> Result<Channel> {
    Ok(Endpoint::from_shared(url.to_string())?
        .tcp_nodelay(true)
        .connect()
        .await?)
}

/// Runs the soak; returns whether it passed.
pub async fn soak(args: SoakArgs) -> Result<bool> {
    let seconds = match (args.minutes, args.seconds) {
        (Some(m), _) => m * 60.0,
        (None, Some(s)) => s,
        (None, None) => 600.0,
    };
    if !(seconds > args.warmup && args.warmup >= 0.0) {
        bail!(
            "the run ({seconds} s) must be longer than the warm-up ({} s)",
            args.warmup
        );
    }
    let probity = match &args.probity {
        Some(p) => p.clone(),
        None => std::env::current_exe()?
            .parent()
            .context("no folder")?
            .join("probity"),
    };
    let text = std::fs::read_to_string(&args.model)
        .with_context(|| format!("reading {}", args.model.display()))?;
    let model =
        Arc::new(Model::from_json_str(&text).with_context(|| args.model.display().to_string())?);
    let mut json: serde_json::Value = serde_json::from_str(&text)?;

    // The server's files.
    let (dir, temporary) = match &args.dir {
        Some(d) => (d.clone(), false),
        None => (
            std::env::temp_dir().join(format!("probity-soak-{}-{}", std::process::id(), now_ms())),
            true,
        ),
    };
    let models = dir.join("models");
    std::fs::create_dir_all(&models)?;
    let model_file = models.join("model.json");
    let write_version = |json: &mut serde_json::Value, version: &str| -> Result<()> {
        json["version"] = serde_json::Value::String(version.to_string());
        let next = model_file.with_extension("tmp");
        std::fs::write(&next, serde_json::to_vec(json)?)?;
        std::fs::rename(&next, &model_file)?;
        Ok(())
    };
    write_version(&mut json, "soak-1")?;
    let config = dir.join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nplaintext = \"loopback\"\nreflection = false\n[logging]\nformat = \"json\"\nlevel = \"info\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [limits]\nmax_concurrent_requests = 4096\ndefault_deadline_ms = 5000\n\
             [store]\ndirectory = {:?}\n[routes.soak]\nmodel = {:?}\n",
            models.display().to_string(),
            dir.join("store").display().to_string(),
            model.name()
        ),
    )?;
    let (server, grpc, metrics_addr) = start_server(&probity, &config)?;
    let url = format!("http://{grpc}");
    let pid = server.pid();

    let tally = Arc::new(Tally::default());
    let start = Instant::now();
    let measure_from = start + Duration::from_secs_f64(args.warmup);
    let stop_at = start + Duration::from_secs_f64(seconds);
    let mut tasks = Vec::new();

    // Outcome streams, fed (id, probability, when answered) by the scoring tasks; each outcome is sent once its
    // prediction is `OUTCOME_DELAY` old, so most find their prediction storeged (matched) and some do not yet
    // (held, then matched when it is written).
    let mut feeds = Vec::new();
    for s in 0..args.outcome_streams {
        let (feed, mut ids) = tokio::sync::mpsc::channel::<(String, f64, Instant)>(10_000);
        feeds.push(feed);
        let (delayed, outgoing) = tokio::sync::mpsc::channel::<pb::Outcome>(1_000);
        tasks.push(tokio::spawn(async move {
            let mut rng = ChaCha8Rng::seed_from_u64(1_000 + s as u64);
            while let Some((id, p, answered)) = ids.recv().await {
                tokio::time::sleep_until((answered + OUTCOME_DELAY).into()).await;
                // The label is drawn with the served probability, as a calibrated model's outcomes would be.
                let outcome = pb::Outcome {
                    prediction_id: id,
                    label: rng.random::<f64>() < p,
                    outcome_time_unix_ms: 0,
                };
                if delayed.send(outcome).await.is_err() {
                    break;
                }
            }
        }));
        let channel = connect(&url).await?;
        let tally = Arc::clone(&tally);
        tasks.push(tokio::spawn(async move {
            let mut client = pb::outcomes_client::OutcomesClient::new(channel);
            let outgoing = tokio_stream::wrappers::ReceiverStream::new(outgoing);
            let mut results = match client.record_outcome_stream(outgoing).await {
                Ok(r) => r.into_inner(),
                Err(status) => {
                    tally.outcomes.failed(status.to_string());
                    return;
                }
            };
            loop {
                match results.message().await {
                    Ok(Some(r)) => {
                        if r.status == pb::OutcomeStatus::Matched as i32 {
                            tally.matched.fetch_add(1, Ordering::Relaxed);
                        } else if r.status == pb::OutcomeStatus::Pending as i32 {
                            tally.pending.fetch_add(1, Ordering::Relaxed);
                        }
                        if r.status == pb::OutcomeStatus::Invalid as i32 {
                            tally.outcomes.failed(format!("{r:?}"));
                        } else {
                            tally.outcomes.ok(false, Duration::ZERO);
                        }
                    }
                    Ok(None) => break,
                    Err(status) => {
                        tally.outcomes.failed(status.to_string());
                        break;
                    }
                }
            }
        }));
    }

    // Scoring: each connection on its own schedule; latency from the scheduled send time.
    let interval = Duration::from_secs_f64(args.connections.max(1) as f64 / args.rate.max(1e-3));
    for c in 0..args.connections.max(1) {
        let channel = connect(&url).await?;
        let tally = Arc::clone(&tally);
        let model = Arc::clone(&model);
        let feed = feeds.get(c % feeds.len().max(1)).cloned();
        let outcome_every = args.outcome_every.max(1);
        tasks.push(tokio::spawn(async move {
            let mut client = pb::scoring_client::ScoringClient::new(channel);
            let mut rng = ChaCha8Rng::seed_from_u64(c as u64);
            // Spread the connections' first calls over one interval.
            let mut next = Instant::now() + interval.mul_f64(c as f64 / 16.0).min(interval);
            let mut n: u64 = 0;
            loop {
                tokio::time::sleep_until(next.into()).await;
                let sent = next;
                if sent >= stop_at {
                    break;
                }
                next += interval;
                n += 1;
                let measured = sent >= measure_from;
                let answers: Vec<(String, f64, Instant)> = if n.is_multiple_of(10) {
                    let rows = (0..20)
                        .map(|k| row(&model, &mut rng, format!("c{c}-{n}-{k}")))
                        .collect();
                    match client
                        .score_batch(pb::ScoreBatchRequest {
                            explain: 0,
                            route: "soak".into(),
                            rows,
                        })
                        .await
                    {
                        Ok(a) => {
                            tally.batch.ok(measured, sent.elapsed());
                            let now = Instant::now();
                            a.into_inner()
                                .results
                                .into_iter()
                                .map(|r| (r.prediction_id, r.probability, now))
                                .collect()
                        }
                        Err(status) => {
                            tally.batch.failed(status.to_string());
                            Vec::new()
                        }
                    }
                } else {
                    let request = pb::ScoreRequest {
                        explain: 0,
                        route: "soak".into(),
                        row: Some(row(&model, &mut rng, format!("c{c}-{n}"))),
                    };
                    match client.score(request).await {
                        Ok(a) => {
                            tally.score.ok(measured, sent.elapsed());
                            let a = a.into_inner();
                            vec![(a.prediction_id, a.probability, Instant::now())]
                        }
                        Err(status) => {
                            tally.score.failed(status.to_string());
                            Vec::new()
                        }
                    }
                };
                if let Some(feed) = &feed {
                    for (k, answer) in answers.into_iter().enumerate() {
                        if (n + k as u64).is_multiple_of(outcome_every) {
                            // A full feed means the stream is behind; the outcome is simply not sent.
                            let _ = feed.try_send(answer);
                        }
                    }
                }
            }
        }));
    }
    drop(feeds);

    // Reloads: the model file rewritten with the other version, then the Reload call.
    {
        let channel = connect(&url).await?;
        let tally = Arc::clone(&tally);
        let every = Duration::from_secs_f64(args.reload_every.max(0.1));
        let mut json = json.clone();
        let model_file = model_file.clone();
        tasks.push(tokio::spawn(async move {
            let mut client = pb::models_client::ModelsClient::new(channel);
            let mut k = 0u64;
            let mut next = Instant::now() + every;
            while next < stop_at {
                tokio::time::sleep_until(next.into()).await;
                next += every;
                k += 1;
                // soak-1 is serving at the start: soak-2, soak-1, soak-2, ...
                json["version"] = serde_json::Value::String(format!("soak-{}", 1 + k % 2));
                let write = serde_json::to_vec(&json)
                    .map_err(anyhow::Error::from)
                    .and_then(|b| {
                        let tmp = model_file.with_extension("tmp");
                        std::fs::write(&tmp, b)?;
                        std::fs::rename(&tmp, &model_file)?;
                        Ok(())
                    });
                if let Err(e) = write {
                    tally.reload.failed(format!("writing the model file: {e}"));
                    continue;
                }
                let sent = Instant::now();
                match client.reload(pb::ReloadRequest {}).await {
                    Ok(r) => {
                        let r = r.into_inner();
                        let loaded = r
                            .files
                            .iter()
                            .any(|f| f.outcome == pb::ReloadOutcome::Loaded as i32);
                        if loaded {
                            tally.reload.ok(sent >= measure_from, sent.elapsed());
                        } else {
                            tally
                                .reload
                                .failed(format!("the new version did not load: {r:?}"));
                        }
                    }
                    Err(status) => tally.reload.failed(status.to_string()),
                }
            }
        }));
    }

    // Reports over the last minute.
    {
        let channel = connect(&url).await?;
        let tally = Arc::clone(&tally);
        let every = Duration::from_secs_f64(args.report_every.max(0.1));
        tasks.push(tokio::spawn(async move {
            let mut client = pb::outcomes_client::OutcomesClient::new(channel);
            let mut next = Instant::now() + every;
            while next < stop_at {
                tokio::time::sleep_until(next.into()).await;
                next += every;
                let sent = Instant::now();
                let request = pb::ReportRequest {
                    from_unix_ms: now_ms() - 60_000,
                    ..Default::default()
                };
                match client.report(request).await {
                    Ok(_) => tally.report.ok(sent >= measure_from, sent.elapsed()),
                    Err(status) => tally.report.failed(status.to_string()),
                }
            }
        }));
    }

    // Resident memory every 2 s from the end of the warm-up; progress every minute.
    tokio::time::sleep_until(measure_from.into()).await;
    let mut samples: Vec<(f64, u64)> = Vec::new();
    let mut last_progress = Instant::now();
    loop {
        let kib = rss_kib(pid).context("reading the server's resident memory")?;
        samples.push((measure_from.elapsed().as_secs_f64(), kib));
        if !args.json && last_progress.elapsed() >= Duration::from_secs(60) {
            last_progress = Instant::now();
            eprintln!(
                "soak: {:.0} s, {} scoring calls, {} failed, RSS {} KiB",
                start.elapsed().as_secs_f64(),
                tally.score.count.load(Ordering::Relaxed)
                    + tally.batch.count.load(Ordering::Relaxed),
                tally.score.failures.load(Ordering::Relaxed)
                    + tally.batch.failures.load(Ordering::Relaxed),
                kib
            );
        }
        if Instant::now() >= stop_at {
            break;
        }
        tokio::time::sleep(Duration::from_secs(2).min(stop_at - Instant::now())).await;
    }
    for t in tasks {
        t.await?;
    }
    let rss_end = rss_kib(pid).context("reading the server's resident memory")?;
    let measured = measure_from.elapsed().as_secs_f64();
    samples.push((measured, rss_end));
    let rss_start = samples[0].1;
    let rss_max = samples.iter().map(|s| s.1).max().unwrap_or(rss_end);
    // A report holds its rows while it runs (about a kilobyte each), so a single sample may catch one; the floor
    // of a window (its lowest sample) does not, and a leak raises the floor.
    let window = (measured / 4.0).clamp(2.0, 60.0);
    let floor = |from: f64, to: f64| {
        samples
            .iter()
            .filter(|s| s.0 >= from && s.0 <= to)
            .map(|s| s.1)
            .min()
            .unwrap_or(rss_end)
    };
    let floor_start = floor(0.0, window);
    let floor_end = floor(measured - window, measured);

    // The server's own count of the prediction store, then a clean stop.
    let metrics_text = http_get(&metrics_addr, "/metrics")
        .await
        .unwrap_or_default();
    let metric = |name: &str| -> f64 {
        metrics_text
            .lines()
            .filter(|l| l.starts_with(name) && l[name.len()..].starts_with(['{', ' ']))
            .filter_map(|l| l.rsplit_once(' ')?.1.parse::<f64>().ok())
            .sum::<f64>()
            + 0.0 // an empty sum is -0.0
    };
    let written = metric("probity_store_predictions_written_total");
    let dropped = metric("probity_store_predictions_dropped_total");
    let warnings = server.warnings.load(Ordering::Relaxed);
    let errors = server
        .errors
        .lock()
        .unwrap_or_else(|e| e.into_inner())
        .clone();
    let exit = server.stop()?;

    let kinds = [
        ("score", &tally.score),
        ("score_batch", &tally.batch),
        ("outcomes", &tally.outcomes),
        ("reload", &tally.reload),
        ("report", &tally.report),
    ];
    let failures: u64 = kinds
        .iter()
        .map(|(_, c)| c.failures.load(Ordering::Relaxed))
        .sum();
    let summaries: serde_json::Map<String, serde_json::Value> = kinds
        .iter()
        .map(|(k, c)| (k.to_string(), c.summary()))
        .collect();
    let worst_p99 = kinds
        .iter()
        .filter(|(k, _)| *k != "outcomes")
        .filter_map(|(_, c)| c.summary()["p99_ms"].as_f64())
        .filter(|p| p.is_finite())
        .fold(0.0, f64::max);
    let growth_kib = floor_end as f64 - floor_start as f64;
    let margin_kib = args.rss_margin_mib * 1024.0;
    let mut problems = Vec::new();
    if failures > 0 {
        problems.push(format!("{failures} failed requests"));
    }
    if worst_p99 > args.p99_limit_ms {
        problems.push(format!(
            "p99 {worst_p99:.1} ms above the stall limit of {} ms",
            args.p99_limit_ms
        ));
    }
    if growth_kib > margin_kib {
        problems.push(format!(
            "resident memory grew by {:.1} MiB (limit {} MiB)",
            growth_kib / 1024.0,
            args.rss_margin_mib
        ));
    }
    if !exit.success() {
        problems.push(format!("the server stopped with {exit}"));
    }
    if !errors.is_empty() {
        problems.push(format!("the server logged {} errors", errors.len()));
    }
    let scoring_calls =
        tally.score.count.load(Ordering::Relaxed) + tally.batch.count.load(Ordering::Relaxed);
    let out = serde_json::json!({
        "seconds": seconds,
        "warmup_s": args.warmup,
        "connections": args.connections,
        "rate": args.rate,
        "scoring_calls": scoring_calls,
        "failures": failures,
        "calls": summaries,
        "outcomes_matched": tally.matched.load(Ordering::Relaxed),
        "outcomes_pending": tally.pending.load(Ordering::Relaxed),
        "p99_ms_worst": worst_p99,
        "p99_limit_ms": args.p99_limit_ms,
        "rss_kib_start": rss_start,
        "rss_kib_end": rss_end,
        "rss_kib_max": rss_max,
        "rss_floor_window_s": window,
        "rss_kib_floor_start": floor_start,
        "rss_kib_floor_end": floor_end,
        "rss_margin_mib": args.rss_margin_mib,
        "rss_kib_samples": samples.iter().map(|s| s.1).collect::<Vec<_>>(),
        "log_written": written,
        "log_dropped": dropped,
        "server_warnings": warnings,
        "server_errors": errors,
        "server_exit_ok": exit.success(),
        "problems": problems,
    });
    if !args.json {
        let line = |k: &str| {
            let s = &out["calls"][k];
            eprintln!(
                "  {k:<12} {:>9} calls, {} failed, p50 {:.2} ms, p99 {:.2} ms, max {:.2} ms{}",
                s["calls"],
                s["failures"],
                s["p50_ms"].as_f64().unwrap_or(f64::NAN),
                s["p99_ms"].as_f64().unwrap_or(f64::NAN),
                s["max_ms"].as_f64().unwrap_or(f64::NAN),
                s["first_failure"]
                    .as_str()
                    .map(|f| format!("; first failure: {f}"))
                    .unwrap_or_default()
            );
        };
        eprintln!(
            "soak: {seconds:.0} s ({} s warm-up), {} connections at {} calls/s, {} outcome streams, a reload every \
             {} s, a report every {} s",
            args.warmup, args.connections, args.rate, args.outcome_streams, args.reload_every, args.report_every
        );
        for k in ["score", "score_batch", "outcomes", "reload", "report"] {
            line(k);
        }
        eprintln!(
            "  outcomes matched {} and pending {} when answered; store: {written} predictions written, {dropped} dropped",
            out["outcomes_matched"], out["outcomes_pending"]
        );
        eprintln!(
            "  server RSS: {:.1} MiB after the warm-up, {:.1} MiB at the end, max {:.1} MiB; lowest in the first and \
             last {window:.0} s: {:.1} and {:.1} MiB (growth {:+.1} MiB, limit {} MiB)",
            rss_start as f64 / 1024.0,
            rss_end as f64 / 1024.0,
            rss_max as f64 / 1024.0,
            floor_start as f64 / 1024.0,
            floor_end as f64 / 1024.0,
            growth_kib / 1024.0,
            args.rss_margin_mib
        );
        eprintln!(
            "  {}",
            if problems.is_empty() {
                "PASSED".to_string()
            } else {
                format!("FAILED: {}", problems.join("; "))
            }
        );
    }
    println!("{out}");
    if temporary {
        let _ = std::fs::remove_dir_all(&dir);
    }
    Ok(problems.is_empty())
}

async fn http_get(addr: &str, path: &str) -> Result<String> {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(addr).await?;
    stream
        .write_all(format!("GET {path} HTTP/1.0\r\nHost: soak\r\n\r\n").as_bytes())
        .await?;
    let mut text = String::new();
    stream.read_to_string(&mut text).await?;
    Ok(text
        .split_once("\r\n\r\n")
        .map(|(_, b)| b.to_string())
        .unwrap_or_default())
}
