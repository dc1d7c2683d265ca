//! `probity score`: score every row of a CSV file and write one output row per input row.

use std::fmt::Write as _;
use std::fs::File;
use std::io::{BufWriter, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::time::Instant;

use anyhow::{bail, Context};
use csv::StringRecord;
use indicatif::{ProgressBar, ProgressStyle};
use probity_models::{DecisionRule, Model, OutputSpec, Scored};

use super::pipeline::{score_records, Input, OnReject, Rejected, RunNotes};

mod remote;

/// Files smaller than this finish before a progress bar is worth drawing.
pub(crate) const PROGRESS_MIN_BYTES: u64 = 1 << 20;

/// Arguments of `probity score`.
#[derive(Debug, clap::Args)]
pub struct ScoreArgs {
    /// The model file (or --server and --route to score through a running server).
    #[arg(long, required_unless_present = "server")]
    pub model: Option<PathBuf>,
    /// The file to score: CSV (its header names the columns; gzip-compressed is read as is) or Parquet (found by
    /// its first bytes `PAR1`, not its name); a column per model feature is expected.
    #[arg(long)]
    pub input: PathBuf,
    /// Where to write the scored CSV file.
    #[arg(long)]
    pub output: PathBuf,
    /// The column copied to the output to identify each row [default: `id`, when the input has it].
    #[arg(long)]
    pub id_column: Option<String>,
    /// Base rate of the population being scored; shifts the log-odds by logit(P) - logit(model base rate).
    /// Without it, the model file's `serving_base_rate`; where the file has none, one of this and
    /// --keep-training-base-rate is required: a model trained on re-sampled data answers at its training rate
    /// otherwise, which can be many times the live one.
    #[arg(long, value_name = "P")]
    pub target_base_rate: Option<f64>,
    /// Serve at the base rate the model was trained (or calibrated) on, even when the file names a serving base
    /// rate: right only when the training rate is the scored population's own.
    #[arg(long, conflicts_with = "target_base_rate")]
    pub keep_training_base_rate: bool,
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
    /// What a row that cannot be scored does: `fail` stops the run (nothing is written), `skip` leaves it out of
    /// the output and lists it in the rejects file.
    #[arg(long, value_enum, default_value_t = OnError::Fail)]
    pub on_error: OnError,
    /// With `--on-error skip`: where to write the rows left out (data row, line and reason) [default: OUTPUT with
    /// `.rejects.csv` in place of its extension].
    #[arg(long, value_name = "FILE")]
    pub rejects: Option<PathBuf>,
    /// Significant digits of the margin, log-odds and probability columns (points are rounded to whole points).
    #[arg(long, value_name = "N", default_value_t = 6, value_parser = clap::value_parser!(u8).range(1..=17))]
    pub digits: u8,
    /// Full precision instead: every number in the shortest form that reads back to the same bits.
    #[arg(long, conflicts_with = "digits")]
    pub full_precision: bool,
    /// Add a `warnings` column saying, per row, what reading it noticed (missing cells, numbers that are not finite,
    /// unknown categories, every feature missing); a summary by kind and column is printed either way.
    #[arg(long)]
    pub warnings_column: bool,
    /// Field separator of the input: one ASCII character, or `tab`. Gzip-compressed input is read as is.
    #[arg(long, value_name = "CHAR", default_value = ",", value_parser = super::pipeline::parse_delimiter)]
    pub delimiter: u8,
    /// No progress bar and no summary line.
    #[arg(long, short)]
    pub quiet: bool,
    /// Score through a running server instead of a model file (http://HOST:PORT or https://HOST:PORT); the
    /// route's own base rate and decision rule apply.
    #[arg(
        long,
        value_name = "URL",
        requires = "route",
        conflicts_with_all = ["model", "target_base_rate", "keep_training_base_rate", "threshold",
            "cost_false_positive", "cost_false_negative"]
    )]
    pub server: Option<String>,
    /// With --server: the route that scores.
    #[arg(long, requires = "server")]
    pub route: Option<String>,
    /// With --server: rows per call (at most the server's `limits.max_batch_rows`).
    #[arg(long, value_name = "N", default_value_t = 500)]
    pub batch_size: usize,
    /// With --server: PEM certificate(s) of the authority that signed the server's certificate.
    #[arg(long, value_name = "FILE", requires = "server")]
    pub ca_file: Option<PathBuf>,
    /// With --server: PEM client certificate for mutual TLS (with --client-key).
    #[arg(long, value_name = "FILE", requires_all = ["server", "client_key"])]
    pub client_cert: Option<PathBuf>,
    /// With --server: PEM private key of --client-cert.
    #[arg(long, value_name = "FILE", requires_all = ["server", "client_cert"])]
    pub client_key: Option<PathBuf>,
    /// With --server: a file holding a bearer token of a configured caller.
    #[arg(long, value_name = "FILE", requires = "server")]
    pub token_file: Option<PathBuf>,
    /// With --server: the name to verify the server's certificate against.
    #[arg(long, value_name = "NAME", requires = "server")]
    pub tls_server_name: Option<String>,
}

/// The error policy of a scoring run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum OnError {
    /// Stop at the first row that cannot be scored.
    Fail,
    /// Leave the row out and record it in the rejects file.
    Skip,
}

/// Runs `probity score`.
pub fn run(args: &ScoreArgs) -> anyhow::Result<()> {
    let Some(model_path) = &args.model else {
        return remote::run(args);
    };
    let model = load_model(model_path)?;
    let target_base_rate = match (args.target_base_rate, model.serving_base_rate()) {
        (Some(p), _) => Some(p),
        (None, _) if args.keep_training_base_rate => None,
        (None, Some(p)) => {
            if !args.quiet {
                eprintln!(
                    "serving at the model file's serving_base_rate {p} (trained at {}); --target-base-rate overrides it",
                    model.base_rate()
                );
            }
            Some(p)
        }
        (None, None) => bail!(
            "no base rate given: {} was trained (or calibrated) at a base rate of {}, and a model trained on \
             re-sampled data overstates every probability when served at it; give --target-base-rate P (the scored \
             population's base rate) or --keep-training-base-rate",
            model_path.display(),
            model.base_rate()
        ),
    };
    let spec = output_spec(
        target_base_rate,
        args.threshold,
        args.cost_false_positive,
        args.cost_false_negative,
    )?;
    if args.rejects.is_some() && args.on_error != OnError::Skip {
        bail!("--rejects is written only with --on-error skip");
    }
    let rejects_path = (args.on_error == OnError::Skip).then(|| {
        args.rejects
            .clone()
            .unwrap_or_else(|| args.output.with_extension("rejects.csv"))
    });
    refuse_same_file(&args.input, "--input", &args.output, "--output")?;
    if let Some(r) = &rejects_path {
        refuse_same_file(&args.input, "--input", r, "--rejects")?;
        if r == &args.output {
            bail!("--rejects and --output name the same file {}", r.display());
        }
    }
    let (progress, mut reader) = open_input(&args.input, args.delimiter, args.quiet)?;
    // Written beside the target and renamed over it only when the whole run succeeds: a failed run leaves any
    // existing file as it was, and a half-written output never passes for a result.
    let output = Staged::beside(&args.output)?;
    let rejects = rejects_path.as_deref().map(Staged::beside).transpose()?;

    let start = Instant::now();
    let result = score_file(
        &model,
        &spec,
        args,
        &mut reader,
        BufWriter::new(output.file()),
        rejects.as_ref().map(|r| BufWriter::new(r.file())),
    );
    progress.finish_and_clear();
    let (rows, rejected, notes) =
        result.with_context(|| format!("cannot score {}", args.input.display()))?;
    output.commit()?;
    if let Some(r) = rejects {
        r.commit()?;
    }
    if !args.quiet {
        let seconds = start.elapsed().as_secs_f64();
        eprintln!(
            "scored {rows} rows in {seconds:.2} s ({:.0} rows/s) to {}",
            rows as f64 / seconds.max(1e-9),
            args.output.display()
        );
        let summary = notes.summary(
            &model
                .schema()
                .features()
                .iter()
                .map(|f| f.name.clone())
                .collect::<Vec<_>>(),
        );
        if !summary.is_empty() {
            eprintln!("noticed while reading (same rule as the gRPC warnings):");
            for line in summary {
                eprintln!("  {line}");
            }
        }
        if let Some(path) = &rejects_path {
            eprintln!(
                "left out {rejected} rows that could not be scored: listed in {}",
                path.display()
            );
        }
    }
    Ok(())
}

/// Refuses to write `output` when it is the file `input` names (same path, link or hard link): the run would
/// destroy its own input.
fn refuse_same_file(
    input: &Path,
    input_flag: &str,
    output: &Path,
    output_flag: &str,
) -> anyhow::Result<()> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        if let (Ok(a), Ok(b)) = (std::fs::metadata(input), std::fs::metadata(output)) {
            if a.dev() == b.dev() && a.ino() == b.ino() {
                bail!(
                    "{output_flag} {} is the {input_flag} file: choose another output",
                    output.display()
                );
            }
        }
    }
    if let (Ok(a), Ok(b)) = (input.canonicalize(), output.canonicalize()) {
        if a == b {
            bail!(
                "{output_flag} {} is the {input_flag} file: choose another output",
                output.display()
            );
        }
    }
    Ok(())
}

/// A file written under a temporary name in the target's folder and renamed over the target on [`Staged::commit`];
/// dropped without a commit, the temporary file goes and the target is untouched.
struct Staged {
    temp: tempfile::NamedTempFile,
    target: PathBuf,
}

impl Staged {
    fn beside(target: &Path) -> anyhow::Result<Self> {
        let folder = match target.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => Path::new("."),
        };
        let temp = tempfile::Builder::new()
            .prefix(".probity-")
            .suffix(".partial")
            .tempfile_in(folder)
            .with_context(|| format!("cannot create {}", target.display()))?;
        Ok(Self {
            temp,
            target: target.to_path_buf(),
        })
    }

    fn file(&self) -> &File {
        self.temp.as_file()
    }

    fn commit(self) -> anyhow::Result<()> {
        let target = self.target;
        self.temp
            .persist(&target)
            .map_err(|e| e.error)
            .with_context(|| format!("cannot write {}", target.display()))?;
        Ok(())
    }
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

/// How many digits the score columns carry.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Precision {
    /// Rust's shortest form that reads back to the same bits (up to 17 significant digits).
    Full,
    /// This many significant digits for margins, log-odds and probabilities; points rounded to whole points.
    Digits(usize),
}

/// `v` rounded to `digits` significant digits, printed in the shortest form of the rounded value.
fn significant(v: f64, digits: usize) -> f64 {
    if !v.is_finite() || v == 0.0 {
        return v;
    }
    format!("{:.*e}", digits.saturating_sub(1), v)
        .parse()
        .unwrap_or(v)
}

impl Precision {
    /// The precision `score` was asked for.
    pub fn of(args: &ScoreArgs) -> Precision {
        if args.full_precision {
            Precision::Full
        } else {
            Precision::Digits(usize::from(args.digits))
        }
    }

    /// Appends a margin, log-odds or probability.
    pub fn push(self, out: &mut StringRecord, v: f64, buf: &mut String) {
        buf.clear();
        let v = match self {
            Precision::Full => v,
            Precision::Digits(d) => significant(v, d),
        };
        let _ = write!(buf, "{v}");
        out.push_field(buf);
    }

    /// Appends points: whole points unless at full precision.
    pub fn push_points(self, out: &mut StringRecord, v: f64, buf: &mut String) {
        match self {
            Precision::Full => self.push(out, v, buf),
            Precision::Digits(_) => {
                buf.clear();
                let _ = write!(buf, "{}", v.round());
                out.push_field(buf);
            }
        }
    }
}

/// Appends the score fields of `s` to `out` at `precision`.
pub fn push_scores(
    out: &mut StringRecord,
    s: &Scored,
    spec: &OutputSpec,
    precision: Precision,
    buf: &mut String,
) {
    for v in [
        s.margin,
        s.log_odds,
        s.calibrated_log_odds,
        s.adjusted_log_odds,
        s.probability,
    ] {
        precision.push(out, v, buf);
    }
    if let Some(score) = s.score {
        precision.push_points(out, score, buf);
    }
    if spec.decision.is_some() {
        out.push_field(s.decision.as_ref().map(|d| d.as_str()).unwrap_or(""));
    }
}

/// Scores the whole input into `output`, and rows that cannot be scored into `rejects` when it is given; returns
/// the numbers of rows scored and rejected.
fn score_file<W: Write>(
    model: &Model,
    spec: &OutputSpec,
    args: &ScoreArgs,
    reader: &mut Input,
    output: W,
    rejects: Option<W>,
) -> anyhow::Result<(u64, u64, RunNotes)> {
    let (header, columns) = super::pipeline::map_header(
        reader,
        model.schema(),
        args.id_column.as_deref(),
        args.allow_missing_columns,
        args.quiet,
    )?;
    reader.select((!args.keep_columns).then(|| columns.used()).as_deref())?;
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
    if args.warnings_column {
        if header.iter().any(|h| h == "warnings") && args.keep_columns {
            bail!("input column `warnings` has the name of an output column; rename it or drop --keep-columns");
        }
        out_header.push_field("warnings");
    }
    let mut run_notes = RunNotes::default();
    let precision = Precision::of(args);

    let mut writer = csv::Writer::from_writer(output);
    writer.write_record(&out_header)?;
    let mut line = StringRecord::new();
    let mut buf = String::new();
    let mut rejected = 0u64;
    let mut rejects = rejects.map(csv::Writer::from_writer);
    if let Some(r) = rejects.as_mut() {
        r.write_record(["row", "line", "reason"])
            .context("cannot write the rejects file")?;
    }
    let mut reject = |bad: Rejected<'_>| -> anyhow::Result<()> {
        rejected += 1;
        if let Some(r) = rejects.as_mut() {
            let line = bad
                .record
                .position()
                .map(|p| p.line().to_string())
                .unwrap_or_default();
            r.write_record([bad.number.to_string(), line, bad.reason])
                .context("cannot write the rejects file")?;
        }
        Ok(())
    };
    let on_reject: OnReject<'_> = if args.on_error == OnError::Skip {
        Some(&mut reject)
    } else {
        None
    };
    let rows = score_records(
        model,
        &columns,
        spec,
        reader,
        on_reject,
        |record, scored, notes| {
            run_notes.add(notes);
            line.clear();
            if args.keep_columns {
                line.extend(record.iter());
            } else if let Some(id) = columns.id {
                line.push_field(record.get(id).unwrap_or(""));
            }
            push_scores(&mut line, scored, spec, precision, &mut buf);
            if args.warnings_column {
                line.push_field(&notes.describe(columns.names()));
            }
            writer
                .write_record(&line)
                .context("cannot write the output")
        },
    )?;
    writer.flush().context("cannot write the output")?;
    if let Some(r) = rejects.as_mut() {
        r.flush().context("cannot write the rejects file")?;
    }
    Ok((rows, rejected, run_notes))
}

/// Opens an input file ([`Input::open`]) with a progress bar on stderr when it is large, not `quiet` and stderr is
/// a terminal.
pub(crate) fn open_input(
    path: &Path,
    delimiter: u8,
    quiet: bool,
) -> anyhow::Result<(ProgressBar, Input)> {
    let size = std::fs::metadata(path).map(|m| m.len()).unwrap_or(0);
    let show = !quiet && size >= PROGRESS_MIN_BYTES && std::io::stderr().is_terminal();
    let progress = if show {
        bar(size)
    } else {
        ProgressBar::hidden()
    };
    let input = Input::open(path, delimiter, &progress)?;
    Ok((progress, input))
}

/// A byte-count progress bar on stderr.
pub(crate) fn bar(size: u64) -> ProgressBar {
    let style =
        ProgressStyle::with_template("{bar:40} {bytes}/{total_bytes} {bytes_per_sec} eta {eta}")
            .unwrap_or_else(|_| ProgressStyle::default_bar());
    ProgressBar::new(size).with_style(style)
}
