//! The live demo's client: it sends every generated transaction to every route through real gRPC connections, as
//! a customer's system would, and keeps what came back.
//!
//! Rows go by name (numbers for numeric features, category names for categorical ones; an empty cell is left out,
//! so the server routes it as missing and says so in a warning). The work is a fixed list of calls: for each block
//! of `batch_rows` rows and each route, one `ScoreBatch` call, except every fifth block, which goes as one unary
//! `Score` call per row. Workers (`connections` x `calls_per_connection`) take calls from the list in order, so the
//! traffic interleaves routes and call kinds. Latency is measured around each call, request building excluded.

use std::collections::HashMap;
use std::io::IsTerminal;
use std::net::SocketAddr;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use csv::StringRecord;
use indicatif::{ProgressBar, ProgressStyle};
use probity::serve::proto as pb;
use probity_models::{Model, Scored};
use tonic::transport::{Channel, Endpoint};

use super::DemoData;

/// One block in this many goes by unary calls.
const UNARY_EVERY: usize = 5;
/// Distinct error messages kept for the summary.
const KEEP_ERRORS: usize = 3;

/// How the client drives the server.
#[derive(Debug, Clone, Copy)]
pub struct Plan {
    /// gRPC connections opened.
    pub connections: usize,
    /// Calls in flight on each connection.
    pub calls_per_connection: usize,
    /// Rows in each `ScoreBatch` call.
    pub batch_rows: usize,
}

/// A route to score on, and the model it is expected to answer with.
pub struct Target<'a> {
    /// The route name.
    pub route: &'a str,
    /// The model configured for it.
    pub model: &'a Model,
}

/// Count and client-side latencies of one kind of call.
#[derive(Debug, Default)]
pub struct Calls {
    /// Calls sent.
    pub calls: u64,
    /// Latency of each successful call.
    pub latencies: Vec<Duration>,
}

/// What a traffic run did.
pub struct Traffic {
    /// For each target, for each row, what the server answered (`None` when the call failed).
    pub results: Vec<Vec<Option<Scored>>>,
    /// Unary `Score` calls.
    pub unary: Calls,
    /// `ScoreBatch` calls.
    pub batch: Calls,
    /// Calls that failed.
    pub failed_calls: u64,
    /// The first few distinct failure messages.
    pub first_errors: Vec<String>,
    /// Rows answered.
    pub rows_scored: u64,
    /// Rows answered with at least one warning.
    pub rows_with_warnings: u64,
    /// Wall time from the first call to the last answer.
    pub seconds: f64,
    /// Rows in each `ScoreBatch` call.
    pub batch_rows: usize,
}

#[derive(Debug, Clone, Copy)]
enum Work {
    Unary {
        target: usize,
        row: usize,
    },
    Batch {
        target: usize,
        start: usize,
        end: usize,
    },
}

/// Where a route's model finds each feature in a demo CSV record.
struct Features {
    route: String,
    model: String,
    /// (feature name, column, categorical)
    columns: Vec<(String, usize, bool)>,
}

/// What one worker saw.
#[derive(Default)]
struct Tally {
    answers: Vec<(usize, usize, Scored)>,
    unary: Calls,
    batch: Calls,
    failed_calls: u64,
    errors: Vec<String>,
    rows_with_warnings: u64,
}

/// Everything the workers share.
struct Shared {
    records: Vec<StringRecord>,
    ids: Vec<String>,
    features: Vec<Features>,
    work: Vec<Work>,
    next: AtomicUsize,
    progress: ProgressBar,
}

/// Sends the demo data to every target through the server at `addr` and collects the answers.
pub async fn drive(
    addr: SocketAddr,
    data: &DemoData,
    targets: &[Target<'_>],
    plan: Plan,
) -> anyhow::Result<Traffic> {
    let mut reader = crate::cli::pipeline::csv_reader(data.csv.as_slice());
    let header = reader.headers()?.clone();
    let records = reader
        .records()
        .collect::<Result<Vec<_>, _>>()
        .context("reading the generated CSV")?;
    let ids = data.transactions.iter().map(|t| t.id()).collect();
    let features = targets
        .iter()
        .map(|t| features(t, &header))
        .collect::<anyhow::Result<Vec<_>>>()?;
    let work = work_list(records.len(), targets.len(), plan.batch_rows.max(1));
    let total_rows = (records.len() * targets.len()) as u64;
    let shared = Arc::new(Shared {
        records,
        ids,
        features,
        work,
        next: AtomicUsize::new(0),
        progress: progress_bar(total_rows),
    });

    let endpoint = Endpoint::from_shared(format!("http://{addr}"))
        .context("demo server address")?
        .tcp_nodelay(true);
    let mut channels = Vec::with_capacity(plan.connections);
    for _ in 0..plan.connections.max(1) {
        // One `connect` is one HTTP/2 connection; clones of a channel share it.
        let channel = endpoint
            .connect()
            .await
            .with_context(|| format!("cannot connect to the demo server at {addr}"))?;
        channels.push(channel);
    }
    let start = Instant::now();
    let mut workers = Vec::new();
    for channel in &channels {
        for _ in 0..plan.calls_per_connection.max(1) {
            workers.push(tokio::spawn(worker(
                Arc::clone(&shared),
                pb::scoring_client::ScoringClient::new(channel.clone()),
            )));
        }
    }
    let mut tallies = Vec::with_capacity(workers.len());
    for w in workers {
        tallies.push(w.await.context("a demo client task failed")??);
    }
    let seconds = start.elapsed().as_secs_f64();
    shared.progress.finish_and_clear();

    let rows = shared.records.len();
    let mut traffic = Traffic {
        results: vec![vec![None; rows]; targets.len()],
        unary: Calls::default(),
        batch: Calls::default(),
        failed_calls: 0,
        first_errors: Vec::new(),
        rows_scored: 0,
        rows_with_warnings: 0,
        seconds,
        batch_rows: plan.batch_rows,
    };
    for tally in tallies {
        for (target, row, scored) in tally.answers {
            if let Some(slot) = traffic.results.get_mut(target).and_then(|r| r.get_mut(row)) {
                *slot = Some(scored);
                traffic.rows_scored += 1;
            }
        }
        traffic.unary.calls += tally.unary.calls;
        traffic.unary.latencies.extend(tally.unary.latencies);
        traffic.batch.calls += tally.batch.calls;
        traffic.batch.latencies.extend(tally.batch.latencies);
        traffic.failed_calls += tally.failed_calls;
        traffic.rows_with_warnings += tally.rows_with_warnings;
        for e in tally.errors {
            if traffic.first_errors.len() < KEEP_ERRORS && !traffic.first_errors.contains(&e) {
                traffic.first_errors.push(e);
            }
        }
    }
    Ok(traffic)
}

/// Takes calls from the shared list until it is empty.
async fn worker(
    shared: Arc<Shared>,
    mut client: pb::scoring_client::ScoringClient<Channel>,
) -> anyhow::Result<Tally> {
    let mut tally = Tally::default();
    while let Some(&work) = shared.work.get(shared.next.fetch_add(1, Ordering::Relaxed)) {
        let (target, start, end) = match work {
            Work::Unary { target, row } => (target, row, row + 1),
            Work::Batch { target, start, end } => (target, start, end),
        };
        let f = shared
            .features
            .get(target)
            .context("demo work list names no route")?;
        let rows = (start..end)
            .map(|i| row(f, &shared, i))
            .collect::<anyhow::Result<Vec<_>>>()?;
        let sent_ids: Vec<String> = rows.iter().map(|r| r.prediction_id.clone()).collect();
        let began = Instant::now();
        let (answer, calls) = match work {
            Work::Unary { .. } => {
                let request = pb::ScoreRequest {
                    explain: 0,
                    route: f.route.clone(),
                    row: rows.into_iter().next(),
                };
                let answer = client.score(request).await.map(|r| vec![r.into_inner()]);
                (answer, &mut tally.unary)
            }
            Work::Batch { .. } => {
                let request = pb::ScoreBatchRequest {
                    explain: 0,
                    route: f.route.clone(),
                    rows,
                };
                let answer = client
                    .score_batch(request)
                    .await
                    .map(|r| r.into_inner().results);
                (answer, &mut tally.batch)
            }
        };
        let elapsed = began.elapsed();
        calls.calls += 1;
        match answer.map_err(|s| format!("{:?}: {}", s.code(), s.message())) {
            Ok(results) if results.len() == sent_ids.len() => {
                calls.latencies.push(elapsed);
                for ((i, sent), response) in (start..end).zip(&sent_ids).zip(results) {
                    if &response.prediction_id != sent || response.model != f.model {
                        bail!(
                            "route {}: asked for prediction {sent}, got {} from model {}",
                            f.route,
                            response.prediction_id,
                            response.model
                        );
                    }
                    if !response.warnings.is_empty() {
                        tally.rows_with_warnings += 1;
                    }
                    tally.answers.push((target, i, scored(response)));
                }
            }
            Ok(results) => bail!(
                "route {}: sent {} rows, got {} results",
                f.route,
                sent_ids.len(),
                results.len()
            ),
            Err(message) => {
                tally.failed_calls += 1;
                if tally.errors.len() < KEEP_ERRORS {
                    tally.errors.push(format!("route {}: {message}", f.route));
                }
            }
        }
        shared.progress.inc((end - start) as u64);
    }
    Ok(tally)
}

/// The list of calls, blocks in order, routes interleaved within each block.
fn work_list(rows: usize, targets: usize, batch_rows: usize) -> Vec<Work> {
    let mut work = Vec::new();
    for (block, start) in (0..rows).step_by(batch_rows).enumerate() {
        let end = (start + batch_rows).min(rows);
        for target in 0..targets {
            if block % UNARY_EVERY == UNARY_EVERY - 1 {
                work.extend((start..end).map(|row| Work::Unary { target, row }));
            } else {
                work.push(Work::Batch { target, start, end });
            }
        }
    }
    work
}

/// Maps a target's model features to the demo CSV's columns.
fn features(target: &Target<'_>, header: &StringRecord) -> anyhow::Result<Features> {
    let columns = target
        .model
        .schema()
        .features()
        .iter()
        .map(|f| {
            let column = header.iter().position(|h| h == f.name).with_context(|| {
                format!(
                    "model {} needs feature `{}`, which the demo data does not have",
                    target.model.name(),
                    f.name
                )
            })?;
            Ok((f.name.clone(), column, f.is_categorical()))
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    Ok(Features {
        route: target.route.to_string(),
        model: target.model.name().to_string(),
        columns,
    })
}

/// Row `i` as a request row with named features; an empty cell is left out (missing).
fn row(f: &Features, shared: &Shared, i: usize) -> anyhow::Result<pb::Row> {
    let record = shared
        .records
        .get(i)
        .with_context(|| format!("no demo row {i}"))?;
    let mut values = HashMap::with_capacity(f.columns.len());
    for (name, column, categorical) in &f.columns {
        let cell = record.get(*column).unwrap_or("").trim();
        if cell.is_empty() {
            continue;
        }
        let kind = if *categorical {
            pb::feature_value::Kind::Category(cell.to_string())
        } else {
            pb::feature_value::Kind::Number(cell.parse().with_context(|| {
                format!("demo row {i}, column `{name}`: `{cell}` is not a number")
            })?)
        };
        values.insert(name.clone(), pb::FeatureValue { kind: Some(kind) });
    }
    let id = shared.ids.get(i).map(String::as_str).unwrap_or_default();
    Ok(pb::Row {
        prediction_id: format!("{}/{id}", f.route),
        subject_key: String::new(),
        tags: HashMap::new(),
        features: Some(pb::row::Features::Named(pb::NamedFeatures { values })),
    })
}

/// The server's answer in the library's form, so the offline output code can print it.
fn scored(r: pb::ScoreResponse) -> Scored {
    Scored {
        margin: r.margin,
        log_odds: r.log_odds,
        calibrated_log_odds: r.calibrated_log_odds,
        adjusted_log_odds: r.adjusted_log_odds,
        probability: r.probability,
        score: r.score,
        // The demo routes have no decision rule.
        decision: None,
    }
}

/// A row-count progress bar on stderr, drawn only on a terminal.
fn progress_bar(total: u64) -> ProgressBar {
    if !std::io::stderr().is_terminal() {
        return ProgressBar::hidden();
    }
    let style = ProgressStyle::with_template(
        "{bar:40} {human_pos}/{human_len} rows scored over gRPC, {elapsed} elapsed, eta {eta}",
    )
    .unwrap_or_else(|_| ProgressStyle::default_bar());
    ProgressBar::new(total).with_style(style)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_row_is_sent_once_to_every_route() {
        let (rows, targets, batch) = (1234, 2, 100);
        let work = work_list(rows, targets, batch);
        let mut seen = vec![vec![0u32; rows]; targets];
        let (mut unary, mut batches) = (0, 0);
        for w in &work {
            let (t, s, e) = match *w {
                Work::Unary { target, row } => {
                    unary += 1;
                    (target, row, row + 1)
                }
                Work::Batch { target, start, end } => {
                    batches += 1;
                    assert!(end - start <= batch);
                    (target, start, end)
                }
            };
            for count in &mut seen[t][s..e] {
                *count += 1;
            }
        }
        assert!(seen.iter().flatten().all(|&c| c == 1));
        // 13 blocks: blocks 4 and 9 (0-based) go unary, 100 rows each, on both routes.
        assert_eq!(unary, 2 * 2 * 100);
        assert_eq!(batches, 11 * 2);
    }
}
