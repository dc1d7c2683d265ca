//! `probity report`: the exact report from a prediction log file, read directly (the server may be running: the
//! log's write-ahead journal lets a reader see every committed prediction without stopping the writer).

use std::path::PathBuf;

use anyhow::Context;
use probity::report::{self, svg, text};
use probity::store::{ReportFilter, SqliteStore, Store};

/// Arguments of `probity report`.
#[derive(Debug, clap::Args)]
pub struct ReportArgs {
    /// The log: a data directory (holding predictions.db) or the database file itself.
    #[arg(long, value_name = "PATH")]
    pub log: PathBuf,
    /// Earliest prediction time included, in milliseconds since the Unix epoch.
    #[arg(long, value_name = "UNIX_MS")]
    pub from: Option<i64>,
    /// Prediction times before this are included (milliseconds since the Unix epoch).
    #[arg(long, value_name = "UNIX_MS")]
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
    /// Print JSON instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Write reliability, score-histogram and gains pictures (SVG) for each section here.
    #[arg(long, value_name = "DIR")]
    pub svg_dir: Option<PathBuf>,
}

/// Runs `probity report`.
pub fn run(args: &ReportArgs) -> anyhow::Result<()> {
    let file = if args.log.is_dir() {
        args.log.join(probity::store::sqlite::FILE_NAME)
    } else {
        args.log.clone()
    };
    if !file.is_file() {
        anyhow::bail!("--log: no prediction log at {}", file.display());
    }
    let mut store = SqliteStore::open_existing(&file)
        .with_context(|| format!("--log: opening {}", file.display()))?;
    let filter = ReportFilter {
        from_ms: args.from,
        to_ms: args.to,
        route: args.route.clone(),
        model: args.model.clone(),
        version: args.version.clone(),
    };
    let report = report::build(&mut store as &mut dyn Store, &filter).context("reading the log")?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        print!("{}", text::render(&report));
    }
    if let Some(dir) = &args.svg_dir {
        std::fs::create_dir_all(dir).with_context(|| format!("--svg-dir {}", dir.display()))?;
        for s in &report.series {
            let stem = format!("{}-{}-{}-{}", s.route, s.model, s.version, s.role);
            for (kind, body) in [
                ("reliability", svg::reliability(s)),
                ("histograms", svg::histograms(s)),
                ("gains", svg::gains(s)),
            ] {
                let path = dir.join(format!("{stem}-{kind}.svg"));
                std::fs::write(&path, body)
                    .with_context(|| format!("writing {}", path.display()))?;
                if !args.json {
                    println!("wrote {}", path.display());
                }
            }
        }
    }
    Ok(())
}
