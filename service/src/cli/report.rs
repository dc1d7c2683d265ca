//! `probity report`: the exact report from a prediction store file, read directly (the server may be running: the
//! SQLite write-ahead journal lets a reader see every committed prediction without stopping the writer).

use std::path::PathBuf;

use anyhow::Context;
use probity::charts::pictures::ProbabilityAxis;
use probity::report::{self, svg, text};
use probity::store::{ReportFilter, SqliteStore, Store};
use probity_models::metrics::BinStrategy;

/// Arguments of `probity report`.
#[derive(Debug, clap::Args)]
pub struct ReportArgs {
    /// The prediction store: a data directory (holding predictions.db) or the database file itself.
    #[arg(long, value_name = "PATH")]
    pub store: PathBuf,
    /// Earliest prediction time included: an RFC 3339 time (2026-12-01T08:30:00Z), a date (2026-12-01, midnight
    /// UTC) or milliseconds since the Unix epoch.
    #[arg(long, value_name = "TIME", value_parser = super::when::instant)]
    pub from: Option<i64>,
    /// Only predictions made within this span before now (7d, 12h, 30m); instead of --from.
    #[arg(long, value_name = "SPAN", value_parser = super::when::span_ms, conflicts_with = "from")]
    pub since: Option<i64>,
    /// Prediction times before this are included (same forms as --from).
    #[arg(long, value_name = "TIME", value_parser = super::when::instant)]
    pub to: Option<i64>,
    /// Only this route.
    #[arg(long)]
    pub route: Option<String>,
    /// Only this model.
    #[arg(long)]
    pub model: Option<String>,
    /// Only this model version.
    #[arg(long)]
    pub version: Option<String>,
    /// Only for predictions logged by a build that did not keep what they were served under: a route's target
    /// base rate, as ROUTE=RATE (repeatable). The store keeps each prediction's own prior, and the report uses it;
    /// a row without one is taken to have served under this, else its model's base rate.
    #[arg(long = "base-rate", value_name = "ROUTE=RATE", value_parser = route_rate)]
    pub base_rates: Vec<(String, f64)>,
    /// Print JSON instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Write reliability, score-histogram and gains pictures (SVG) for each section here.
    #[arg(long, value_name = "DIR")]
    pub svg_dir: Option<PathBuf>,
    /// Number of calibration bins (also the Brier decomposition's).
    #[arg(long, default_value_t = probity::report::CALIBRATION_BINS as u64, value_name = "N",
          value_parser = clap::value_parser!(u64).range(2..=1000))]
    pub bins: u64,
    /// How calibration bins are cut: equal-count bins spread the cases that equal-width bins put in the first one
    /// at fraud base rates.
    #[arg(long, value_enum, default_value_t = super::evaluate::Binning::EqualWidth)]
    pub binning: super::evaluate::Binning,
    /// The label maturity period (7d, 30d): the horizon of the immature-window estimates. Predictions younger
    /// than it get estimated eventual figures, older ones are the delay reference. Without it each section uses
    /// the follow-up of its oldest tenth.
    #[arg(long, value_name = "SPAN", value_parser = super::when::span_ms)]
    pub horizon: Option<i64>,
    /// The reliability picture's probability axes: `auto` uses log-odds when nine in ten cases are below 0.1.
    #[arg(long, value_enum, default_value_t = Axis::Auto)]
    pub probability_axis: Axis,
}

/// The probability axis of the reliability pictures.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Axis {
    /// Log-odds when the scores crowd near 0, linear otherwise.
    Auto,
    /// Linear from 0 to 1.
    Linear,
    /// Log-odds, labelled as probabilities.
    LogOdds,
}

/// Parses `ROUTE=RATE` with the rate in (0, 1).
fn route_rate(text: &str) -> Result<(String, f64), String> {
    let (route, rate) = text
        .split_once('=')
        .ok_or_else(|| format!("expected ROUTE=RATE, got `{text}`"))?;
    let rate: f64 = rate
        .trim()
        .parse()
        .map_err(|e| format!("`{rate}` is not a number: {e}"))?;
    if !(rate > 0.0 && rate < 1.0) {
        return Err(format!("the rate must be in (0, 1), got {rate}"));
    }
    Ok((route.trim().to_string(), rate))
}

/// Opens the prediction store named by `--store`: a data directory holding the database, or the file itself.
pub(crate) fn open_store(log: &std::path::Path) -> anyhow::Result<SqliteStore> {
    let file = if log.is_dir() {
        log.join(probity::store::sqlite::FILE_NAME)
    } else {
        log.to_path_buf()
    };
    if !file.is_file() {
        anyhow::bail!("--store: no prediction store at {}", file.display());
    }
    SqliteStore::open_existing(&file)
        .with_context(|| format!("--store: opening {}", file.display()))
}

/// Runs `probity report`.
pub fn run(args: &ReportArgs) -> anyhow::Result<()> {
    let mut store = open_store(&args.store)?;
    let filter = ReportFilter {
        from_ms: super::when::range_start(args.from, args.since, super::when::now_ms()),
        to_ms: args.to,
        route: args.route.clone(),
        model: args.model.clone(),
        version: args.version.clone(),
    };
    let configured = args.base_rates.iter().cloned().collect();
    let bins = match args.binning {
        super::evaluate::Binning::EqualWidth => BinStrategy::Uniform(args.bins as usize),
        super::evaluate::Binning::EqualCount => BinStrategy::Quantile(args.bins as usize),
    };
    let axis = match args.probability_axis {
        Axis::Auto => ProbabilityAxis::Auto,
        Axis::Linear => ProbabilityAxis::Linear,
        Axis::LogOdds => ProbabilityAxis::LogOdds,
    };
    let horizons = report::Horizons {
        by_route: Default::default(),
        all: args.horizon,
    };
    let report = report::build_full(
        &mut store as &mut dyn Store,
        &filter,
        &configured,
        bins,
        &horizons,
    )
    .context("reading the store")?;
    if args.json {
        super::emit(&format!("{}\n", serde_json::to_string_pretty(&report)?))?;
    } else {
        super::emit(&format!("{}\n{}\n", text::render(&report), super::CAUTIONS))?;
    }
    if let Some(dir) = &args.svg_dir {
        std::fs::create_dir_all(dir).with_context(|| format!("--svg-dir {}", dir.display()))?;
        for s in &report.series {
            let stem = format!("{}-{}-{}-{}", s.route, s.model, s.version, s.role);
            for (kind, body) in [
                ("reliability", svg::reliability_on(s, axis)),
                ("histograms", svg::histograms(s)),
                ("gains", svg::gains(s)),
            ]
            .into_iter()
            .chain(svg::immature(s, axis).map(|body| ("immature", body)))
            {
                let path = dir.join(format!("{stem}-{kind}.svg"));
                std::fs::write(&path, body)
                    .with_context(|| format!("writing {}", path.display()))?;
                if !args.json {
                    super::emit(&format!("wrote {}\n", path.display()))?;
                }
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::route_rate;

    #[test]
    fn base_rate_flags_parse_and_refuse_bad_rates() {
        assert_eq!(
            route_rate("card-auth=0.002").unwrap(),
            ("card-auth".to_string(), 0.002)
        );
        assert!(route_rate("card-auth").unwrap_err().contains("ROUTE=RATE"));
        assert!(route_rate("card-auth=x")
            .unwrap_err()
            .contains("not a number"));
        assert!(route_rate("card-auth=1").unwrap_err().contains("(0, 1)"));
        assert!(route_rate("card-auth=NaN").unwrap_err().contains("(0, 1)"));
    }
}
