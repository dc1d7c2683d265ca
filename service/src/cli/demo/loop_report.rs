//! The end of the live demo's loop: the report the server computes from its prediction store (`Outcomes.Report`),
//! the champion-against-challenger comparison (`Challengers.Compare`), and the SVG pictures, written from the same
//! log file the way `probity report --svg-dir` and `probity compare --svg` write them.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::Context;
use probity::serve::proto as pb;
use probity::store::{ReportFilter, SqliteStore, Store};
use tonic::transport::Channel;

use super::outcomes::{Sent, AS_OF_DAYS, CHARGEBACK_MEAN_DAYS};

/// What was sent, in two or three lines.
pub fn outcomes_section(sent: &Sent) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "\noutcomes  {} sent for {} transactions on every route (simulated outcome times, no real waiting): a \
         chargeback 2 days + about {CHARGEBACK_MEAN_DAYS} days on average after a fraud, a genuine transaction \
         confirmed 30-60 days after; report as of day {AS_OF_DAYS}",
        sent.outcomes, sent.transactions
    );
    let _ = writeln!(
        out,
        "          {} in {} RecordOutcomes calls, {} on one RecordOutcomeStream: {} matched at once, {} held \
         until their prediction reached the store, {} duplicate or corrected",
        sent.batch_outcomes,
        sent.batch_calls,
        sent.stream_outcomes,
        sent.matched,
        sent.pending,
        sent.other
    );
    let _ = writeln!(
        out,
        "          {} frauds have their chargeback after day {AS_OF_DAYS}: not sent, so their predictions are \
         still immature",
        sent.not_yet
    );
    out
}

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.6}"))
}

/// The route's series side by side, one figure per line.
pub fn report_section(report: &pb::ReportResponse, route: &str, complete: bool) -> String {
    let mut series: Vec<&pb::ReportSeries> =
        report.series.iter().filter(|s| s.route == route).collect();
    // The champion first.
    series.sort_by_key(|s| (s.role != "champion", s.role.clone(), s.model.clone()));
    let mut out = format!(
        "\nreport from the server (Outcomes.Report, exact from the prediction store), route {route}\n"
    );
    if !complete {
        out += "  (the store had not caught up with every prediction when asked; the figures cover what it had)\n";
    }
    let mut line = |label: &str, cell: &dyn Fn(&pb::ReportSeries) -> String| {
        let mut l = format!("  {label:<30}");
        for s in &series {
            let _ = write!(l, " {:>30}", cell(s));
        }
        let _ = writeln!(out, "{}", l.trim_end());
    };
    line("role", &|s| s.role.clone());
    line("model", &|s| format!("{} {}", s.model, s.version));
    line("predictions", &|s| s.predictions.to_string());
    line("with outcome", &|s| s.with_outcome.to_string());
    line("immature (no outcome yet)", &|s| s.immature.to_string());
    line("observed base rate", &|s| opt(s.observed_base_rate));
    line("predicted base rate", &|s| opt(s.predicted_base_rate));
    line("log-loss (lower is better)", &|s| opt(s.log_loss));
    line("Brier score (lower is better)", &|s| opt(s.brier));
    line("AUC (ranking)", &|s| opt(s.roc_auc));
    line("KS", &|s| opt(s.ks));
    line("ECE (calibration error)", &|s| opt(s.ece));
    let _ = writeln!(
        out,
        "  outcomes waiting for their prediction: {}; never matched: {}",
        report.pending_outcomes, report.unmatched_outcomes
    );
    out
}

/// The comparison's table, indented, under a heading.
pub async fn compare_section(channel: Channel, route: &str) -> anyhow::Result<String> {
    let response = pb::challengers_client::ChallengersClient::new(channel)
        .compare(pb::CompareRequest {
            route: route.to_string(),
            ..pb::CompareRequest::default()
        })
        .await
        .context("Compare call failed")?
        .into_inner();
    let mut out = String::from(
        "\nchampion against challenger on the same transactions (Challengers.Compare)\n",
    );
    for l in response.table.lines() {
        let _ = writeln!(out, "{}", format!("  {l}").trim_end());
    }
    Ok(out)
}

/// Writes the route's pictures into `dir` from the store file: reliability, histograms and gains per model, and the
/// comparison when the route has a challenger. Returns the files written.
pub fn write_svgs(
    log_dir: &Path,
    dir: &Path,
    route: &str,
    compare: bool,
) -> anyhow::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir).with_context(|| format!("--svg-dir {}", dir.display()))?;
    let file = log_dir.join(probity::store::sqlite::FILE_NAME);
    let mut store = SqliteStore::open_existing(&file)
        .with_context(|| format!("opening the demo's store {}", file.display()))?;
    let filter = ReportFilter {
        route: Some(route.to_string()),
        ..ReportFilter::default()
    };
    let report = probity::report::build(&mut store as &mut dyn Store, &filter)
        .context("reading the demo's store")?;
    let mut written = Vec::new();
    let mut write = |name: String, body: String| -> anyhow::Result<()> {
        let path = dir.join(name);
        std::fs::write(&path, body).with_context(|| format!("writing {}", path.display()))?;
        written.push(path);
        Ok(())
    };
    for s in &report.series {
        let stem = format!("{}-{}-{}-{}", s.route, s.model, s.version, s.role);
        write(
            format!("{stem}-reliability.svg"),
            probity::report::svg::reliability(s),
        )?;
        write(
            format!("{stem}-histograms.svg"),
            probity::report::svg::histograms(s),
        )?;
        write(format!("{stem}-gains.svg"), probity::report::svg::gains(s))?;
    }
    if compare {
        let request = probity::compare::CompareRequest {
            filter,
            ..probity::compare::CompareRequest::default()
        };
        let c = probity::compare::build(&mut store as &mut dyn Store, &request)
            .context("comparing from the demo's store")?;
        write(
            format!("{route}-compare.svg"),
            probity::compare::svg::render(&c),
        )?;
    }
    Ok(written)
}
