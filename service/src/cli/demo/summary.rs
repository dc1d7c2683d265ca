//! What the demo prints: the data, the traffic (live only), each model's probability distribution and quality
//! figures, the reasons for a few declined transactions, and the generating model as the yardstick.

use std::fmt::Write as _;
use std::time::Duration;

use probity_models::metrics::{brier_score, log_loss_from_log_odds, roc_auc, MetricsError};
use probity_models::{BodyKind, Model};

use super::traffic::Traffic;
use super::{DemoData, DemoRun};

/// Upper edges of the probability histogram's bins; the last bin is open above.
const HISTOGRAM_EDGES: [f64; 7] = [0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5];
const HISTOGRAM_LABELS: [&str; 8] = [
    "< 0.5%", "0.5-1%", "1-2%", "2-5%", "5-10%", "10-20%", "20-50%", ">= 50%",
];
const HISTOGRAM_WIDTH: usize = 40;

/// The title line.
pub const TITLE: &str = "Harbourline Card Services: card fraud scoring demo (invented data)";

/// The offline demo's report: the data, then each model, then the generating model as the yardstick.
pub fn report(data: &DemoData, models: &[&Model], runs: &[DemoRun]) -> String {
    let mut out = format!("{TITLE}\n");
    out += &data_section(data);
    for (model, run) in models.iter().zip(runs) {
        out += &model_section(model, run, data);
        out += &reasons_section(model, run, data);
    }
    out += &yardstick(data);
    out
}

/// Declined transactions shown with their reasons.
const DECLINES_SHOWN: usize = 3;

/// The reasons for the most likely frauds among the transactions the model would decline at the cost rule of
/// `deploy/probity.toml` (a missed fraud costs 40 times a false alarm: decline above 1/41, Elkan 2001), as the
/// server gives them with `explain` (the same computation, in process).
pub fn reasons_section(model: &Model, run: &DemoRun, data: &DemoData) -> String {
    let mut out = String::new();
    if let Err(e) = model.explainable() {
        let _ = writeln!(out, "  no reasons: {e}");
        return out;
    }
    let threshold = 1.0 / 41.0;
    let declined = run.probabilities.iter().filter(|&&p| p > threshold).count();
    let mut order: Vec<usize> = (0..run.probabilities.len())
        .filter(|&i| run.probabilities[i] > threshold)
        .collect();
    order.sort_by(|&a, &b| {
        run.probabilities[b]
            .total_cmp(&run.probabilities[a])
            .then(a.cmp(&b))
    });
    order.truncate(DECLINES_SHOWN);
    let _ = writeln!(
        out,
        "  {declined} transactions declined at probability > 1/41; reasons for the {} highest (they inform a \
         review; the reasons a notice must give follow local law):",
        order.len()
    );
    let rows = match dense_rows(model, data, &order) {
        Ok(rows) => rows,
        Err(e) => {
            let _ = writeln!(out, "  no reasons: {e}");
            return out;
        }
    };
    let request = probity_models::ReasonRequest::default();
    for (&i, row) in order.iter().zip(&rows) {
        let Ok(c) = model.contributions(row) else {
            continue;
        };
        let t = &data.transactions[i];
        let _ = writeln!(
            out,
            "    {} (probability {:.1}%, {}):",
            t.id(),
            100.0 * run.probabilities[i],
            if t.fraud { "fraud" } else { "legitimate" }
        );
        for r in model.reasons(&c, &request) {
            let _ = writeln!(
                out,
                "      {} {:<36} +{:.2} log-odds",
                r.code, r.text, r.weight
            );
        }
    }
    out
}

/// The dense rows of transactions `wanted` (file order indices), encoded from the demo CSV as scoring encodes them.
fn dense_rows(model: &Model, data: &DemoData, wanted: &[usize]) -> anyhow::Result<Vec<Vec<f64>>> {
    let mut reader = crate::cli::pipeline::csv_reader(data.csv.as_slice());
    let header = reader.headers()?.clone();
    let schema = model.schema();
    let columns: Vec<Option<usize>> = schema
        .features()
        .iter()
        .map(|f| header.iter().position(|h| h == f.name))
        .collect();
    let mut out = vec![Vec::new(); wanted.len()];
    for (i, record) in reader.records().enumerate() {
        let record = record?;
        for (k, _) in wanted.iter().enumerate().filter(|(_, &w)| w == i) {
            out[k] = columns
                .iter()
                .enumerate()
                .map(|(f, c)| match c {
                    Some(c) => schema.encode_text(f, record.get(*c).unwrap_or("")),
                    None => Ok(f64::NAN),
                })
                .collect::<Result<Vec<f64>, _>>()?;
        }
    }
    Ok(out)
}

/// How many rows, how many frauds, and the live base rate the models are corrected to.
pub fn data_section(data: &DemoData) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "{} transactions generated (seed {}), {} labelled fraud ({:.2}%)",
        data.labels.len(),
        data.seed,
        data.labels.iter().filter(|&&y| y).count(),
        100.0 * data.observed_rate()
    );
    let _ = writeln!(
        out,
        "live base rate {:.3}% (the generator's mean fraud probability); each model's training base rate is \
         corrected to it",
        100.0 * data.live_base_rate
    );
    out
}

/// One model: what it is, its probability histogram, mean predicted against observed, and the quality figures.
pub fn model_section(model: &Model, run: &DemoRun, data: &DemoData) -> String {
    let n = data.labels.len();
    let mut out = String::new();
    let s = model.summary();
    let body = match s.kind {
        BodyKind::Ensemble => format!("tree ensemble, {} trees", s.trees),
        BodyKind::Linear => format!("linear, {} terms", s.terms),
    };
    let _ = writeln!(
        out,
        "\n{} {} ({body}), trained at base rate {:.4}",
        model.name(),
        model.version(),
        model.base_rate()
    );
    if let Some(seconds) = run.seconds {
        let _ = writeln!(
            out,
            "  scored {n} rows in {seconds:.3} s ({:.0} rows/s, CSV parsing included)",
            n as f64 / seconds.max(1e-9)
        );
    }
    out += &histogram(&run.probabilities);
    let mean = run.probabilities.iter().sum::<f64>() / n as f64;
    let _ = writeln!(
        out,
        "  mean predicted {:.3}%, observed {:.3}%",
        100.0 * mean,
        100.0 * data.observed_rate()
    );
    out += &metrics_line(&run.log_odds, &run.probabilities, &data.labels);
    out
}

/// The generating model's own figures: the best any model can expect on this data.
pub fn yardstick(data: &DemoData) -> String {
    let true_log_odds: Vec<f64> = data
        .transactions
        .iter()
        .map(crate::cli::demo_data::true_log_odds)
        .collect();
    let true_p: Vec<f64> = data.transactions.iter().map(|t| t.probability).collect();
    let mut out = String::from(
        "\nthe generating model itself (the best any model can expect on this data):\n",
    );
    out += &metrics_line(&true_log_odds, &true_p, &data.labels);
    out
}

/// Requests, failures, throughput and client-side latency of a live run.
pub fn traffic_section(t: &Traffic) -> String {
    let mut out = String::new();
    let calls = t.unary.calls + t.batch.calls;
    let _ = writeln!(
        out,
        "requests  {calls} sent ({} Score, {} ScoreBatch), {} failed",
        t.unary.calls, t.batch.calls, t.failed_calls
    );
    let _ = writeln!(
        out,
        "rows      {} scored, {} with warnings{}",
        t.rows_scored,
        t.rows_with_warnings,
        if t.rows_with_warnings > 0 {
            " (features missing from the row, routed as missing)"
        } else {
            ""
        }
    );
    let seconds = t.seconds.max(1e-9);
    let _ = writeln!(
        out,
        "time      {:.2} s: {:.0} requests/s, {:.0} rows/s",
        t.seconds,
        calls as f64 / seconds,
        t.rows_scored as f64 / seconds
    );
    let _ = writeln!(
        out,
        "latency, client side (ms)          p50      p90      p99      max"
    );
    for (label, calls) in [
        ("Score (1 row)".to_string(), &t.unary),
        (format!("ScoreBatch ({} rows)", t.batch_rows), &t.batch),
    ] {
        if calls.latencies.is_empty() {
            continue;
        }
        let mut sorted = calls.latencies.clone();
        sorted.sort_unstable();
        let ms = |q: f64| nearest_rank(&sorted, q).as_secs_f64() * 1e3;
        let _ = writeln!(
            out,
            "  {label:<28} {:>8.3} {:>8.3} {:>8.3} {:>8.3}",
            ms(0.50),
            ms(0.90),
            ms(0.99),
            ms(1.0)
        );
    }
    for error in &t.first_errors {
        let _ = writeln!(out, "  failed: {error}");
    }
    out
}

/// The `q` quantile of sorted values by the nearest-rank method (the smallest value with at least `q` of the
/// values at or below it; common practice for latency percentiles, no single source).
fn nearest_rank(sorted: &[Duration], q: f64) -> Duration {
    let n = sorted.len();
    let rank = ((q * n as f64).ceil() as usize).clamp(1, n.max(1));
    sorted.get(rank - 1).copied().unwrap_or_default()
}

/// `log-loss ... Brier ... AUC ...`, or the reason a figure cannot be computed.
fn metrics_line(log_odds: &[f64], probabilities: &[f64], labels: &[bool]) -> String {
    let show = |r: Result<f64, MetricsError>| match r {
        Ok(v) => format!("{v:.5}"),
        Err(e) => format!("n/a ({e})"),
    };
    format!(
        "  log-loss {}, Brier score {}, AUC {}\n",
        show(log_loss_from_log_odds(log_odds, labels)),
        show(brier_score(probabilities, labels)),
        show(roc_auc(probabilities, labels)),
    )
}

/// A text histogram of probabilities over [`HISTOGRAM_EDGES`].
fn histogram(probabilities: &[f64]) -> String {
    let mut counts = [0usize; HISTOGRAM_LABELS.len()];
    for &p in probabilities {
        let bin = HISTOGRAM_EDGES.partition_point(|&e| e <= p);
        counts[bin] += 1;
    }
    let max = counts.iter().copied().max().unwrap_or(0).max(1);
    let mut out = String::from("  probability        rows\n");
    for (label, count) in HISTOGRAM_LABELS.iter().zip(counts) {
        // Round up so that a non-empty bin always shows at least one mark.
        let bar = "#".repeat((count * HISTOGRAM_WIDTH).div_ceil(max));
        let line = format!("  {label:<12} {count:>10}  {bar}");
        let _ = writeln!(out, "{}", line.trim_end());
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Nearest-rank percentiles of 1..=10 ms: p50 is the 5th value, p90 the 9th, p99 and max the 10th (the
    /// definition as stated on `nearest_rank`).
    #[test]
    fn nearest_rank_picks_the_ranked_value() {
        let v: Vec<Duration> = (1..=10).map(Duration::from_millis).collect();
        assert_eq!(nearest_rank(&v, 0.5), Duration::from_millis(5));
        assert_eq!(nearest_rank(&v, 0.9), Duration::from_millis(9));
        assert_eq!(nearest_rank(&v, 0.99), Duration::from_millis(10));
        assert_eq!(nearest_rank(&v, 1.0), Duration::from_millis(10));
        assert_eq!(nearest_rank(&v, 0.0), Duration::from_millis(1));
    }
}
