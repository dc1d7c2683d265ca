//! Measures a report and a comparison over a large prediction store: resident memory before, the peak during each
//! (VmHWM, reset between them through /proc/self/clear_refs), and the time. The report and the comparison are the
//! functions the server's Report and Compare calls run (`report::build_binned`, `compare::build`), on a store
//! connection of this process, with the server's allocator.
//!
//! ```text
//! bounded_report fill sqlite DIR N          # N predictions (N/2 ids, champion and challenger), N/10 outcomes
//! bounded_report fill postgres URL N
//! bounded_report measure sqlite DIR [loaded]
//! bounded_report measure postgres URL [loaded]   # "loaded": the old computation from the loaded range, to compare
//! ```
//! Driven by `tools/bench/bounded_report.sh`, which also removes what it made.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::Path;
use std::time::Instant;

use probity::compare::CompareRequest;
use probity::store::postgres::{ConnectionUrl, PgStore};
use probity::store::sqlite::Durability;
use probity::store::{
    ModelVersionInfo, PredictionRecord, Reference, ReportFilter, Served, SqliteStore, Store,
};
use probity_models::metrics::BinStrategy;
use rand::{Rng, SeedableRng};

#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

/// Start of the made-up predictions: one day ago, at the time the store is opened.
fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// (VmRSS, VmHWM) in KiB.
fn memory() -> (u64, u64) {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let field = |name: &str| {
        status
            .lines()
            .find(|l| l.starts_with(name))
            .and_then(|l| l.split_whitespace().nth(1))
            .and_then(|v| v.parse().ok())
            .unwrap_or(0)
    };
    (field("VmRSS:"), field("VmHWM:"))
}

/// Resets the peak to the current resident size (Linux: "5" in clear_refs).
fn reset_peak() {
    let _ = std::fs::write("/proc/self/clear_refs", "5");
}

/// Row `i`: id, final log-odds (on a grid of 1/64, so that scores tie), and whether it has an outcome and which.
fn row(rng: &mut rand_chacha::ChaCha8Rng, i: u64) -> (String, f64, f64, Option<bool>) {
    let h = (rng.random_range(-448..64) as f64) / 64.0;
    let h2 = h + (rng.random_range(-16..16) as f64) / 64.0;
    let labelled = i.is_multiple_of(5);
    let p = 1.0 / (1.0 + (-h).exp());
    let label = labelled.then(|| rng.random_bool(p));
    (format!("p{i:010}"), h, h2, label)
}

/// The delay of row `i`'s outcome (ms): 1 minute to 12 hours in 43,200 distinct steps of a second, so that the
/// Kaplan-Meier curves of the eventual rate and the immature window have as many steps as a real delay would give.
fn delay(i: u64) -> i64 {
    60_000 + ((i * 7919) % 43_200) as i64 * 1000
}

fn info() -> ModelVersionInfo {
    ModelVersionInfo {
        model: "m".into(),
        version: "v1".into(),
        base_rate: 0.02,
        reference: Some(Reference {
            on: "probability".into(),
            edges: vec![0.005, 0.01, 0.02, 0.05, 0.1, 0.2],
            fractions: vec![0.2, 0.2, 0.2, 0.2, 0.1, 0.05, 0.05],
        }),
        features: Vec::new(),
    }
}

fn record(id: &str, model: &str, role: &str, time_ms: i64, h: f64) -> PredictionRecord {
    PredictionRecord {
        prediction_id: id.into(),
        route: "fraud".into(),
        model: model.into(),
        version: "v1".into(),
        role: role.into(),
        time_ms,
        margin: h,
        log_odds: h,
        adjusted_log_odds: h,
        probability: 1.0 / (1.0 + (-h).exp()),
        subject_key: String::new(),
        tags: BTreeMap::new(),
        served: Served {
            prior: Some(0.02),
            decision: "threshold 0.5".into(),
        },
    }
}

fn fill_sqlite(dir: &Path, n: u64) -> anyhow::Result<()> {
    let start = now_ms() - 86_400_000;
    {
        let mut store = SqliteStore::open(dir, Durability::Normal)?;
        store.register_model(&info())?;
    }
    let mut conn = rusqlite::Connection::open(dir.join("predictions.db"))?;
    conn.pragma_update(None, "synchronous", "OFF")?;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(20);
    let ids = n / 2;
    let step = (86_400_000 / ids.max(1)).max(1) as i64;
    let tx = conn.transaction()?;
    {
        let mut p = tx.prepare(
            "INSERT INTO predictions (prediction_id, route, model, version, role, time_ms, margin, log_odds,
             adjusted_log_odds, probability, subject_key, tags, served_prior, decision)
             VALUES (?1, 'fraud', ?2, 'v1', ?3, ?4, ?5, ?5, ?5, ?6, '', '{}', 0.02, 'threshold 0.5')",
        )?;
        let mut o = tx.prepare(
            "INSERT INTO outcomes (prediction_id, label, outcome_time_ms, received_ms, source, revision, state)
             VALUES (?1, ?2, ?3, ?4, 'reported', 0, 'matched')",
        )?;
        for i in 0..ids {
            let (id, h, h2, label) = row(&mut rng, i);
            let t = start + i as i64 * step;
            for (model, role, h) in [("m", "champion", h), ("c", "challenger", h2)] {
                p.execute(rusqlite::params![
                    id,
                    model,
                    role,
                    t,
                    h,
                    1.0 / (1.0 + (-h).exp())
                ])?;
            }
            if let Some(y) = label {
                o.execute(rusqlite::params![id, i64::from(y), t, t + delay(i)])?;
            }
        }
    }
    tx.commit()?;
    Ok(())
}

fn fill_postgres(url: &str, n: u64) -> anyhow::Result<()> {
    let start = now_ms() - 86_400_000;
    let mut store = PgStore::open(
        ConnectionUrl::new(url).map_err(anyhow::Error::msg)?,
        None,
        now_ms(),
    )?;
    store.register_model(&info())?;
    // Partitions of both days through the store itself.
    store.insert_predictions(&[record("first", "m", "champion", start, 0.0)])?;
    store.insert_predictions(&[record("last", "m", "champion", now_ms(), 0.0)])?;
    let mut client = postgres::Client::connect(url, postgres::NoTls)?;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(20);
    let ids = n / 2;
    let step = (86_400_000 / ids.max(1)).max(1) as i64;
    let mut outcomes = Vec::new();
    {
        let mut w = client.copy_in(
            "COPY predictions (prediction_id, route, model, version, role, time_ms, margin, log_odds,
             adjusted_log_odds, probability, subject_key, tags, served_prior, decision) FROM STDIN",
        )?;
        let mut buf = std::io::BufWriter::with_capacity(1 << 20, &mut w);
        for i in 0..ids {
            let (id, h, h2, label) = row(&mut rng, i);
            let t = start + i as i64 * step;
            for (model, role, h) in [("m", "champion", h), ("c", "challenger", h2)] {
                writeln!(
                    buf,
                    "{id}\tfraud\t{model}\tv1\t{role}\t{t}\t{h:?}\t{h:?}\t{h:?}\t{:?}\t\t{{}}\t0.02\tthreshold 0.5",
                    1.0 / (1.0 + (-h).exp())
                )?;
            }
            if let Some(y) = label {
                outcomes.push(format!(
                    "{id}\t{y}\t{t}\t{}\treported\t0\tmatched\n",
                    t + delay(i)
                ));
            }
        }
        buf.flush()?;
        drop(buf);
        w.finish()?;
    }
    let mut w = client.copy_in(
        "COPY outcomes (prediction_id, label, outcome_time_ms, received_ms, source, revision, state) FROM STDIN",
    )?;
    for line in &outcomes {
        w.write_all(line.as_bytes())?;
    }
    w.finish()?;
    client.batch_execute("ANALYZE")?;
    Ok(())
}

fn measure(store: &mut dyn Store, loaded: bool) -> anyhow::Result<()> {
    let configured = BTreeMap::new();
    let filter = ReportFilter::default();
    let (base, _) = memory();
    reset_peak();
    let t = Instant::now();
    let report = if loaded {
        probity::report::build_loaded(
            store,
            &filter,
            &configured,
            BinStrategy::Uniform(10),
            &probity::report::Horizons::default(),
        )?
    } else {
        probity::report::build_binned(store, &filter, &configured, BinStrategy::Uniform(10))?
    };
    let report_s = t.elapsed().as_secs_f64();
    let (_, report_peak) = memory();
    let predictions: usize = report.series.iter().map(|s| s.predictions).sum();
    let with_outcome: usize = report.series.iter().map(|s| s.with_outcome).sum();
    let champion = report
        .series
        .iter()
        .find(|s| s.role == "champion" && s.predictions > 10)
        .ok_or_else(|| anyhow::anyhow!("no champion series"))?;
    println!(
        "report: {predictions} predictions ({with_outcome} with an outcome) in {} series, {report_s:.1} s, \
         resident {base} KiB before, peak rise {} KiB; champion AUC {:?} log-loss {:?} base-rate estimate {:?}",
        report.series.len(),
        report_peak.saturating_sub(base),
        champion.roc_auc,
        champion.log_loss,
        champion.base_rate_estimate
    );
    drop(report);
    let (base, _) = memory();
    reset_peak();
    let request = CompareRequest {
        filter: ReportFilter {
            route: Some("fraud".into()),
            ..ReportFilter::default()
        },
        champion: Some("m".into()),
        challenger: Some("c".into()),
        threshold: Some(0.5),
        newey_west_lag: None,
    };
    let t = Instant::now();
    let comparison = if loaded {
        probity::compare::build_loaded(store, &request)?
    } else {
        probity::compare::build(store, &request)?
    };
    let compare_s = t.elapsed().as_secs_f64();
    let (_, compare_peak) = memory();
    println!(
        "comparison: {} pairs ({} with an outcome), {compare_s:.1} s, resident {base} KiB before, peak rise {} KiB; \
         DeLong z {}",
        comparison.paired,
        comparison.paired_with_outcome,
        compare_peak.saturating_sub(base),
        comparison.outcomes["delong"]["z"]
    );
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let arg = |i: usize| {
        args.get(i).cloned().ok_or_else(|| {
            anyhow::anyhow!("usage: bounded_report fill|measure sqlite DIR|postgres URL [N|loaded]")
        })
    };
    let (what, backend, place) = (arg(0)?, arg(1)?, arg(2)?);
    let t = Instant::now();
    match (what.as_str(), backend.as_str()) {
        ("fill", "sqlite") => fill_sqlite(Path::new(&place), arg(3)?.parse()?)?,
        ("fill", "postgres") => fill_postgres(&place, arg(3)?.parse()?)?,
        ("measure", "sqlite") => {
            let mut store = SqliteStore::open(Path::new(&place), Durability::Normal)?;
            measure(&mut store, args.get(3).is_some_and(|a| a == "loaded"))?;
        }
        ("measure", "postgres") => {
            let mut store = PgStore::open(
                ConnectionUrl::new(&place).map_err(anyhow::Error::msg)?,
                None,
                now_ms(),
            )?;
            measure(&mut store, args.get(3).is_some_and(|a| a == "loaded"))?;
        }
        _ => anyhow::bail!("usage: bounded_report fill|measure sqlite DIR|postgres URL [N|loaded]"),
    }
    if what == "fill" {
        println!("filled in {:.1} s", t.elapsed().as_secs_f64());
    }
    Ok(())
}
