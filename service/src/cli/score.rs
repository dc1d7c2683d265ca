//! `probity score`: score every row of a CSV file and write one output row per input row.

use std::fmt::Write as _;
use std::fs::File;
use std::io::{BufWriter, IsTerminal, Read, Write};
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context};
use csv::StringRecord;
use indicatif::{ProgressBar, ProgressStyle};
use probity_models::{DecisionRule, Model, OutputSpec, Scored};

use super::pipeline::{csv_reader, score_records, ColumnMap};

/// Files smaller than this finish before a progress bar is worth drawing.
pub(crate) const PROGRESS_MIN_BYTES: u64 = 1 << 20;

/// Arguments of `probity score`.
#[derive(Debug, clap::Args)]
pub struct ScoreArgs {
    /// The model file.
    #[arg(long)]
    pub model: PathBuf,
    /// The CSV file to score; its header names the columns, and a column per model feature is expected.
    #[arg(long)]
    pub input: PathBuf,
    /// Where to write the scored CSV file.
    #[arg(long)]
    pub output: PathBuf,
    /// The column copied to the output to identify each row [default: `id`, when the input has it].
    #[arg(long)]
    pub id_column: Option<String>,
    /// Base rate of the population being scored; shifts the log-odds by logit(P) - logit(model base rate).
    #[arg(long, value_name = "P")]
    pub target_base_rate: Option<f64>,
    /// Decide `positive` when the probability is above T.
    #[arg(long, value_name = "T", conflicts_with_all = ["cost_false_positive", "cost_false_negative"])]
    pub threshold: Option<f64>,
    /// Cost of a false positive; with --cost-false-negative, decide at the threshold A / (A + B).
    #[arg(long, value_name = "A", requires = "cost_false_negative")]
    pub cost_false_positive: Option<f64>,
    /// Cost of a false negative.
    #[arg(long, value_name = "B", requires = "cost_false_positive")]
    pub cost_false_negative: Option<f64>,
    /// Copy every input column to the output, before the scores.
    #[arg(long)]
    pub keep_columns: bool,
    /// Read a feature the input has no column for as missing on every row, instead of stopping.
    #[arg(long)]
    pub allow_missing_columns: bool,
    /// No progress bar and no summary line.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Runs `probity score`.
pub fn run(args: &ScoreArgs) -> anyhow::Result<()> {
    let model = load_model(&args.model)?;
    let spec = output_spec(
        args.target_base_rate,
        args.threshold,
        args.cost_false_positive,
        args.cost_false_negative,
    )?;
    let input =
        File::open(&args.input).with_context(|| format!("cannot open {}", args.input.display()))?;
    let size = input.metadata().map(|m| m.len()).unwrap_or(0);
    let show = !args.quiet && size >= PROGRESS_MIN_BYTES && std::io::stderr().is_terminal();
    let progress = if show {
        bar(size)
    } else {
        ProgressBar::hidden()
    };
    let mut reader = csv_reader(progress.wrap_read(input));
    let output = File::create(&args.output)
        .with_context(|| format!("cannot create {}", args.output.display()))?;

    let start = Instant::now();
    let result = score_file(&model, &spec, args, &mut reader, BufWriter::new(output));
    progress.finish_and_clear();
    let rows = match result {
        Ok(rows) => rows,
        Err(e) => {
            // A half-written output must not pass for a result.
            let _ = std::fs::remove_file(&args.output);
            return Err(e.context(format!("cannot score {}", args.input.display())));
        }
    };
    if !args.quiet {
        let seconds = start.elapsed().as_secs_f64();
        eprintln!(
            "scored {rows} rows in {seconds:.2} s ({:.0} rows/s) to {}",
            rows as f64 / seconds.max(1e-9),
            args.output.display()
        );
    }
    Ok(())
}

/// Reads a model file (I/O at the edge) and loads it.
pub fn load_model(path: &Path) -> anyhow::Result<Model> {
    let bytes = std::fs::read(path).with_context(|| format!("cannot read {}", path.display()))?;
    Model::from_json_slice(&bytes)
        .with_context(|| format!("{} is not a valid model file", path.display()))
}

/// The output spec from the command-line numbers, each checked.
pub fn output_spec(
    target_base_rate: Option<f64>,
    threshold: Option<f64>,
    cost_false_positive: Option<f64>,
    cost_false_negative: Option<f64>,
) -> anyhow::Result<OutputSpec> {
    if let Some(p) = target_base_rate {
        if !(p > 0.0 && p < 1.0) {
            bail!("--target-base-rate must be strictly between 0 and 1, got {p}");
        }
    }
    let decision = match (threshold, cost_false_positive, cost_false_negative) {
        (Some(threshold), _, _) => Some(DecisionRule::Threshold { threshold }),
        (None, Some(false_positive), Some(false_negative)) => Some(DecisionRule::Costs {
            false_positive,
            false_negative,
        }),
        _ => None,
    };
    if let Some(rule) = &decision {
        rule.validate().context("invalid decision rule")?;
    }
    Ok(OutputSpec {
        target_base_rate,
        decision,
    })
}

/// The score columns, in output order, for a model and spec.
pub fn score_columns(model: &Model, spec: &OutputSpec) -> Vec<&'static str> {
    let mut cols = vec![
        "margin",
        "log_odds",
        "calibrated_log_odds",
        "adjusted_log_odds",
        "probability",
    ];
    if model.score_scale().is_some() {
        cols.push("score");
    }
    if spec.decision.is_some() {
        cols.push("decision");
    }
    cols
}

/// Appends the score fields of `s` to `out`; floats in Rust's shortest form that reads back to the same bits.
pub fn push_scores(out: &mut StringRecord, s: &Scored, spec: &OutputSpec, buf: &mut String) {
    let mut float = |out: &mut StringRecord, v: f64| {
        buf.clear();
        let _ = write!(buf, "{v}");
        out.push_field(buf);
    };
    float(out, s.margin);
    float(out, s.log_odds);
    float(out, s.calibrated_log_odds);
    float(out, s.adjusted_log_odds);
    float(out, s.probability);
    if let Some(score) = s.score {
        float(out, score);
    }
    if spec.decision.is_some() {
        out.push_field(s.decision.as_ref().map(|d| d.as_str()).unwrap_or(""));
    }
}

/// Scores the whole input into `output`; returns the number of rows.
fn score_file<R: Read, W: Write>(
    model: &Model,
    spec: &OutputSpec,
    args: &ScoreArgs,
    reader: &mut csv::Reader<R>,
    output: W,
) -> anyhow::Result<u64> {
    let header = reader
        .headers()
        .context("cannot read the header row")?
        .clone();
    let columns = ColumnMap::new(
        model.schema(),
        &header,
        args.id_column.as_deref(),
        args.allow_missing_columns,
    )?;
    let absent: Vec<&str> = columns.absent_features().collect();
    if !absent.is_empty() && !args.quiet {
        eprintln!(
            "no column for `{}`: read as missing on every row",
            absent.join("`, `")
        );
    }
    let scores = score_columns(model, spec);
    let mut out_header = StringRecord::new();
    if args.keep_columns {
        if let Some(clash) = header.iter().find(|h| scores.contains(h)) {
            bail!("input column `{clash}` has the name of an output column; rename it or drop --keep-columns");
        }
        out_header.extend(header.iter());
    } else if let Some(id) = columns.id {
        out_header.push_field(&header[id]);
    }
    out_header.extend(scores.iter());

    let mut writer = csv::Writer::from_writer(output);
    writer.write_record(&out_header)?;
    let mut line = StringRecord::new();
    let mut buf = String::new();
    let rows = score_records(model, &columns, spec, reader, |record, scored| {
        line.clear();
        if args.keep_columns {
            line.extend(record.iter());
        } else if let Some(id) = columns.id {
            line.push_field(record.get(id).unwrap_or(""));
        }
        push_scores(&mut line, scored, spec, &mut buf);
        writer
            .write_record(&line)
            .context("cannot write the output")
    })?;
    writer.flush().context("cannot write the output")?;
    Ok(rows)
}

/// A byte-count progress bar on stderr.
pub(crate) fn bar(size: u64) -> ProgressBar {
    let style =
        ProgressStyle::with_template("{bar:40} {bytes}/{total_bytes} {bytes_per_sec} eta {eta}")
            .unwrap_or_else(|_| ProgressStyle::default_bar());
    ProgressBar::new(size).with_style(style)
}
