//! `probity explain`: every row of a CSV or Parquet file with its contributions and top reasons, one output row per
//! input row. Same input rules, progress and error messages as `probity score` (the shared [`super::pipeline`]).

use std::fmt::Write as _;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::time::Instant;

use anyhow::{bail, Context};
use csv::StringRecord;
use probity_models::explain::Workspace;
use probity_models::{Adverse, Model, OutputSpec, ReasonRequest};

use super::pipeline::{score_rows, Input};
use super::score::{load_model, open_input, output_spec};

/// Which direction of the log-odds counts against the subject.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum AdverseArg {
    /// A higher log-odds (probability of the positive class) is adverse.
    Higher,
    /// A lower log-odds is adverse.
    Lower,
}

/// Arguments of `probity explain`.
#[derive(Debug, clap::Args)]
pub struct ExplainArgs {
    /// The model file (a tree ensemble needs per-node `cover`, model format version 2).
    #[arg(long)]
    pub model: PathBuf,
    /// The file to explain: CSV (its header names the columns; gzip-compressed is read as is) or Parquet (found by
    /// its first bytes `PAR1`, not its name); a column per model feature is expected.
    #[arg(long)]
    pub input: PathBuf,
    /// Where to write the CSV file: id, log_odds, probability, bias, one `contribution.FEATURE` column per
    /// feature (log-odds scale), and `reasons` (codes, most adverse first, separated by `;`).
    #[arg(long)]
    pub output: PathBuf,
    /// The column copied to the output to identify each row [default: `id`, when the input has it].
    #[arg(long)]
    pub id_column: Option<String>,
    /// Base rate of the population; changes the probability column, not the contributions.
    #[arg(long, value_name = "P")]
    pub target_base_rate: Option<f64>,
    /// At most this many reasons per row.
    #[arg(long, default_value_t = probity_models::DEFAULT_REASONS)]
    pub reasons: usize,
    /// Which direction of the log-odds counts against the subject.
    #[arg(long, value_enum, default_value_t = AdverseArg::Higher)]
    pub adverse: AdverseArg,
    /// Read a feature the input has no column for as missing on every row, instead of stopping.
    #[arg(long)]
    pub allow_missing_columns: bool,
    /// Field separator of the input: one ASCII character, or `tab`. Gzip-compressed input is read as is.
    #[arg(long, value_name = "CHAR", default_value = ",", value_parser = super::pipeline::parse_delimiter)]
    pub delimiter: u8,
    /// No progress bar and no summary line.
    #[arg(long, short)]
    pub quiet: bool,
}

/// Runs `probity explain`.
pub fn run(args: &ExplainArgs) -> anyhow::Result<()> {
    let model = load_model(&args.model)?;
    model
        .explainable()
        .with_context(|| format!("cannot explain with {}", args.model.display()))?;
    let spec = output_spec(args.target_base_rate, None, None, None)?;
    let request = ReasonRequest {
        limit: args.reasons,
        adverse: match args.adverse {
            AdverseArg::Higher => Adverse::Higher,
            AdverseArg::Lower => Adverse::Lower,
        },
    };
    let (progress, mut reader) = open_input(&args.input, args.delimiter, args.quiet)?;
    let output = File::create(&args.output)
        .with_context(|| format!("cannot create {}", args.output.display()))?;
    let start = Instant::now();
    let result = explain_file(
        &model,
        &spec,
        &request,
        args,
        &mut reader,
        BufWriter::new(output),
    );
    progress.finish_and_clear();
    let rows = match result {
        Ok(rows) => rows,
        Err(e) => {
            // A half-written output must not pass for a result.
            let _ = std::fs::remove_file(&args.output);
            return Err(e.context(format!("cannot explain {}", args.input.display())));
        }
    };
    if !args.quiet {
        let seconds = start.elapsed().as_secs_f64();
        eprintln!(
            "explained {rows} rows in {seconds:.2} s ({:.0} rows/s) to {}",
            rows as f64 / seconds.max(1e-9),
            args.output.display()
        );
    }
    Ok(())
}

fn explain_file<W: Write>(
    model: &Model,
    spec: &OutputSpec,
    request: &ReasonRequest,
    args: &ExplainArgs,
    reader: &mut Input,
    output: W,
) -> anyhow::Result<u64> {
    let (header, columns) = super::pipeline::map_header(
        reader,
        model.schema(),
        args.id_column.as_deref(),
        args.allow_missing_columns,
        args.quiet,
    )?;
    reader.select(Some(&columns.used()))?;
    let mut out_header = StringRecord::new();
    if let Some(id) = columns.id {
        out_header.push_field(&header[id]);
    }
    out_header.extend(["log_odds", "probability", "bias"]);
    for f in model.schema().features() {
        out_header.push_field(&format!("contribution.{}", f.name));
    }
    out_header.push_field("reasons");
    if let Some(id) = columns.id {
        if out_header.iter().skip(1).any(|h| h == &header[id]) {
            bail!(
                "the id column `{}` has the name of an output column; choose another with --id-column",
                &header[id]
            );
        }
    }
    let mut writer = csv::Writer::from_writer(output);
    writer.write_record(&out_header)?;
    let mut line = StringRecord::new();
    let mut buf = String::new();
    let mut ws = Workspace::default();
    let mut number = 0u64;
    let rows = score_rows(
        model,
        &columns,
        spec,
        reader,
        None,
        |record, row, scored, _| {
            number += 1;
            let c = model.contributions_with(row, &mut ws).map_err(|e| {
                let at = record
                    .position()
                    .map_or(String::new(), |p| format!(" (line {})", p.line()));
                anyhow::anyhow!("row {number}{at}: {e}")
            })?;
            line.clear();
            if let Some(id) = columns.id {
                line.push_field(record.get(id).unwrap_or(""));
            }
            let mut float = |line: &mut StringRecord, v: f64| {
                buf.clear();
                let _ = write!(buf, "{v}");
                line.push_field(&buf);
            };
            float(&mut line, c.log_odds);
            float(&mut line, scored.probability);
            float(&mut line, c.bias);
            for &v in &c.features {
                float(&mut line, v);
            }
            let codes: Vec<String> = model
                .reasons(&c, request)
                .into_iter()
                .map(|r| r.code)
                .collect();
            line.push_field(&codes.join(";"));
            writer
                .write_record(&line)
                .context("cannot write the output")
        },
    )?;
    writer.flush().context("cannot write the output")?;
    Ok(rows)
}
