//! `probity compare`: champion against challenger on one route, from a prediction store file (table, JSON, SVG).

use std::path::PathBuf;

use anyhow::Context;
use probity::compare::{self, svg, text, CompareRequest};
use probity::store::{ReportFilter, Store};

use super::report::open_store;

/// Arguments of `probity compare`.
#[derive(Debug, clap::Args)]
pub struct CompareArgs {
    /// The prediction store: a data directory (holding predictions.db) or the database file itself.
    #[arg(long, value_name = "PATH")]
    pub store: PathBuf,
    /// The route whose champion and challenger are compared.
    #[arg(long)]
    pub route: String,
    /// The champion model, NAME or NAME@VERSION (default: the model of the route's champion predictions).
    #[arg(long, value_parser = model_ref)]
    pub champion: Option<probity::serve::model_ref::ModelRef>,
    /// The challenger model, NAME or NAME@VERSION (default: the route's only challenger).
    #[arg(long, value_parser = model_ref)]
    pub challenger: Option<probity::serve::model_ref::ModelRef>,
    /// Decision threshold on the probability, for the share of flipped decisions.
    #[arg(long, value_name = "P")]
    pub threshold: Option<f64>,
    /// Use a Newey-West variance with this many lags in the paired tests (neighbouring cases correlated).
    #[arg(long, value_name = "LAG")]
    pub newey_west_lag: Option<usize>,
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
    /// Print JSON instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Write both reliability curves and the paired-difference distribution to this SVG file.
    #[arg(long, value_name = "FILE")]
    pub svg: Option<PathBuf>,
}

/// Runs `probity compare`.
pub fn run(args: &CompareArgs) -> anyhow::Result<()> {
    if let Some(t) = args.threshold {
        if !(0.0..=1.0).contains(&t) {
            anyhow::bail!("--threshold: must be a probability in [0, 1], got {t}");
        }
    }
    let mut store = open_store(&args.store)?;
    let request = CompareRequest {
        filter: ReportFilter {
            from_ms: super::when::range_start(args.from, args.since, super::when::now_ms()),
            to_ms: args.to,
            route: Some(args.route.clone()),
            model: None,
            version: None,
        },
        champion: args.champion.clone(),
        challenger: args.challenger.clone(),
        threshold: args.threshold,
        newey_west_lag: args.newey_west_lag,
    };
    let report = compare::build(&mut store as &mut dyn Store, &request)?;
    if args.json {
        super::emit(&format!("{}\n", serde_json::to_string_pretty(&report)?))?;
    } else {
        super::emit(&format!("{}\n{}\n", text::render(&report), super::CAUTIONS))?;
    }
    if let Some(path) = &args.svg {
        std::fs::write(path, svg::render(&report))
            .with_context(|| format!("--svg: writing {}", path.display()))?;
        if !args.json {
            super::emit(&format!("wrote {}\n", path.display()))?;
        }
    }
    Ok(())
}

/// Reads `NAME` or `NAME@VERSION` for `--champion` and `--challenger`.
fn model_ref(text: &str) -> Result<probity::serve::model_ref::ModelRef, String> {
    probity::serve::model_ref::ModelRef::parse(text).map_err(|e| e.to_string())
}
