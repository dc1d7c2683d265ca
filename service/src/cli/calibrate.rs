//! `probity calibrate`: fit a calibration map for a model from a labelled holdout CSV and write a new model file
//! version that carries it, with the base rate it corresponds to.
//!
//! The holdout gives the model's raw log-odds either through the model (a column per feature) or directly (a
//! margin column, on the model's own margin scale), plus a 0/1 label column. Fitting, cross-validation and the
//! base-rate corrections are `probity_models::fit`; this module only reads, writes and prints.
//!
//! The new file is the old document with `calibration`, `base_rate` and `version` replaced and a
//! `metadata.calibration_fit` record added; it is loaded back and validated before it is written. A calibration
//! already in the file is replaced, not composed: the new map is fitted on the raw log-odds.

use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context};
use probity_models::fit::{self, BaseRateCorrection, FitReport, Method, Sampling};
use probity_models::{Calibration, IsotonicInput, Model, OutputSpec};
use serde_json::{json, Value};

use super::pipeline::{read_label, score_records, ColumnMap, Input, Row};
use super::reliability::reliability_svg;

/// Arguments of `probity calibrate`.
#[derive(Debug, clap::Args)]
pub struct CalibrateArgs {
    /// The model file to calibrate.
    #[arg(long)]
    pub model: PathBuf,
    /// The labelled holdout: a CSV file (gzip-compressed is read as is) or a Parquet file (found by its first bytes
    /// `PAR1`, not its name).
    #[arg(long)]
    pub holdout: PathBuf,
    /// Where to write the new model file.
    #[arg(long)]
    pub output: PathBuf,
    /// The label column (values 0 or 1; also true/false, as a Parquet boolean column).
    #[arg(long, default_value = "label")]
    pub label_column: String,
    /// Field separator of the input: one ASCII character, or `tab`. Gzip-compressed input is read as is.
    #[arg(long, value_name = "CHAR", default_value = ",", value_parser = super::pipeline::parse_delimiter)]
    pub delimiter: u8,
    /// Read the model's raw margin from this column instead of computing it from the features.
    #[arg(long)]
    pub margin_column: Option<String>,
    /// platt, platt-unsmoothed, isotonic, isotonic-strict, beta, temperature, or auto (lowest cross-validated
    /// log-loss).
    #[arg(long, default_value = "auto", value_parser = parse_method)]
    pub method: MethodChoice,
    /// Folds for the cross-validated report and for `auto`.
    #[arg(long, default_value_t = 5)]
    pub folds: usize,
    /// Uniform bins of the reliability table and the expected calibration error.
    #[arg(long, default_value_t = 10)]
    pub bins: usize,
    /// The holdout kept every positive and this fraction of negatives (Dal Pozzolo et al. 2015).
    #[arg(long, value_name = "BETA", conflicts_with = "positive_share")]
    pub negative_sampling_rate: Option<f64>,
    /// The holdout was drawn with this fixed share of positives (King and Zeng 2001); needs
    /// --population-base-rate.
    #[arg(long, value_name = "S", requires = "population_base_rate")]
    pub positive_share: Option<f64>,
    /// The population's share of positives, for --positive-share.
    #[arg(long, value_name = "TAU", requires = "positive_share")]
    pub population_base_rate: Option<f64>,
    /// Version string of the new model file [default: the old one with `-calibrated` appended].
    #[arg(long)]
    pub new_version: Option<String>,
    /// Write the fit report as JSON here.
    #[arg(long)]
    pub report: Option<PathBuf>,
    /// Write a reliability diagram (before and after, cross-validated) as SVG here.
    #[arg(long)]
    pub reliability_svg: Option<PathBuf>,
    /// Read a feature the holdout has no column for as missing on every row.
    #[arg(long)]
    pub allow_missing_columns: bool,
}

/// A fixed method, or the cross-validated choice.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MethodChoice {
    /// Choose by k-fold log-loss.
    Auto,
    /// This method.
    Fixed(Method),
}

fn parse_method(s: &str) -> Result<MethodChoice, String> {
    if s == "auto" {
        return Ok(MethodChoice::Auto);
    }
    Method::from_name(s)
        .map(MethodChoice::Fixed)
        .ok_or_else(|| {
            let names: Vec<&str> = Method::ALL.iter().map(|m| m.as_str()).collect();
            format!("unknown method `{s}`; choose auto, {}", names.join(", "))
        })
}

/// Runs `probity calibrate`.
pub fn run(args: &CalibrateArgs) -> anyhow::Result<()> {
    let text = std::fs::read_to_string(&args.model)
        .with_context(|| format!("cannot read {}", args.model.display()))?;
    let model = Model::from_json_str(&text)
        .with_context(|| format!("{} is not a valid model file", args.model.display()))?;
    let (h, y) = read_holdout(&model, args)
        .with_context(|| format!("holdout {}", args.holdout.display()))?;
    let positives = y.iter().filter(|&&v| v == 1.0).count();
    let holdout_rate = positives as f64 / y.len() as f64;

    let (method, calibration, reason, candidates) = match args.method {
        MethodChoice::Fixed(m) => (m, m.fit(&h, &y)?, None, Vec::new()),
        MethodChoice::Auto => {
            let sel = fit::auto_select(&h, &y, args.folds, &Method::ALL)?;
            let scores = sel
                .scores
                .iter()
                .map(|s| match &s.result {
                    Ok(v) => {
                        json!({"method": s.method.as_str(), "cv_log_loss": finite_or_null(*v)})
                    }
                    Err(e) => json!({"method": s.method.as_str(), "error": e.to_string()}),
                })
                .collect();
            (sel.method, sel.calibration, Some(sel.reason), scores)
        }
    };
    let report = fit::fit_report(method, &h, &y, args.folds, args.bins)?;

    let correction = sampling(args)?
        .map(|s| s.correction(holdout_rate))
        .transpose()?;
    let (final_map, base_rate) = match correction {
        Some(c) => (
            fit::shift_calibration(&calibration, c.log_odds_shift),
            c.population_base_rate,
        ),
        None => (calibration.clone(), holdout_rate),
    };

    let version = match &args.new_version {
        Some(v) => v.clone(),
        None => format!("{}-calibrated", model.version()),
    };
    let mut doc: Value = serde_json::from_str(&text)
        .with_context(|| format!("{} is not JSON", args.model.display()))?;
    let fit_record = json!({
        "fitted_by": "probity calibrate",
        "method": method.as_str(),
        "reason": reason,
        "candidates": candidates,
        "holdout_rows": y.len(),
        "holdout_positives": positives,
        "holdout_base_rate": holdout_rate,
        "sampling": correction.map(|c| sampling_record(args, &c)),
        "folds": args.folds,
        "cross_validated": report_json(&report, false),
        "from_version": model.version(),
    });
    let obj = doc
        .as_object_mut()
        .ok_or_else(|| anyhow!("{}: the document is not an object", args.model.display()))?;
    obj.insert("version".into(), json!(version));
    obj.insert("base_rate".into(), json!(base_rate));
    obj.insert("calibration".into(), calibration_json(&final_map));
    let metadata = obj.entry("metadata").or_insert_with(|| json!({}));
    match metadata.as_object_mut() {
        Some(m) => {
            m.insert("calibration_fit".into(), fit_record.clone());
        }
        None => bail!("{}: `metadata` is not an object", args.model.display()),
    }
    let out_text = serde_json::to_string_pretty(&doc)?;
    Model::from_json_str(&out_text).context("the calibrated model file does not validate")?;
    std::fs::write(&args.output, out_text + "\n")
        .with_context(|| format!("cannot write {}", args.output.display()))?;

    if let Some(path) = &args.report {
        let mut full = fit_record.clone();
        full["cross_validated"] = report_json(&report, true);
        let text = serde_json::to_string_pretty(&full)?;
        std::fs::write(path, text + "\n")
            .with_context(|| format!("cannot write {}", path.display()))?;
    }
    if let Some(path) = &args.reliability_svg {
        let title = format!(
            "{} {}: {} ({}-fold)",
            model.name(),
            version,
            method,
            args.folds
        );
        std::fs::write(path, reliability_svg(&title, &report))
            .with_context(|| format!("cannot write {}", path.display()))?;
    }
    print_summary(
        args,
        method,
        reason.as_deref(),
        &final_map,
        base_rate,
        holdout_rate,
        &report,
        &version,
    );
    Ok(())
}

/// The raw log-odds and 0/1 labels of the holdout, in file order.
fn read_holdout(model: &Model, args: &CalibrateArgs) -> anyhow::Result<(Vec<f64>, Vec<f64>)> {
    let mut reader = Input::open(
        &args.holdout,
        args.delimiter,
        &indicatif::ProgressBar::hidden(),
    )?;
    let header = reader.header().context("cannot read the header")?;
    let column = |name: &str| {
        header
            .iter()
            .position(|c| c == name)
            .ok_or_else(|| anyhow!("no column `{name}` in the header"))
    };
    let label_col = column(&args.label_column)?;
    let (mut h, mut y) = (Vec::new(), Vec::new());
    let label = |record: &csv::StringRecord, row: usize| -> anyhow::Result<f64> {
        let text = record.get(label_col).unwrap_or("").trim();
        match text
            .parse::<f64>()
            .ok()
            .or_else(|| read_label(text).map(f64::from))
        {
            Some(v) if v == 0.0 || v == 1.0 => Ok(v),
            _ => Err(anyhow!(
                "{}, column `{}`: label `{text}` is not 0 or 1",
                row_name(row, record),
                args.label_column
            )),
        }
    };
    match &args.margin_column {
        Some(name) => {
            let margin_col = column(name)?;
            reader.select(Some(&[margin_col, label_col]))?;
            let mut row = Row::default();
            for i in 0.. {
                if !reader
                    .read(&mut row)
                    .with_context(|| format!("cannot read data row {}", i + 1))?
                {
                    break;
                }
                let record = &row.record;
                let text = record.get(margin_col).unwrap_or("").trim();
                let margin: f64 = text
                    .parse()
                    .ok()
                    .filter(|v: &f64| v.is_finite())
                    .ok_or_else(|| {
                        anyhow!(
                            "{}, column `{name}`: margin `{text}` is not a finite number",
                            row_name(i + 1, record)
                        )
                    })?;
                h.push(model.margin_scale().to_log_odds(margin));
                y.push(label(record, i + 1)?);
            }
        }
        None => {
            let columns =
                ColumnMap::new(model.schema(), &header, None, args.allow_missing_columns)?;
            let mut used = columns.used();
            used.push(label_col);
            reader.select(Some(&used))?;
            let mut row = 0;
            score_records(
                model,
                &columns,
                &OutputSpec::default(),
                &mut reader,
                None,
                |record, scored, _| {
                    row += 1;
                    h.push(scored.log_odds);
                    y.push(label(record, row)?);
                    Ok(())
                },
            )?;
        }
    }
    if h.is_empty() {
        bail!("no data rows");
    }
    Ok((h, y))
}

fn row_name(row: usize, record: &csv::StringRecord) -> String {
    match record.position() {
        Some(p) => format!("row {row} (line {})", p.line()),
        None => format!("row {row}"),
    }
}

fn sampling(args: &CalibrateArgs) -> anyhow::Result<Option<Sampling>> {
    Ok(
        match (
            args.negative_sampling_rate,
            args.positive_share,
            args.population_base_rate,
        ) {
            (Some(beta), None, _) => Some(Sampling::NegativeRate { beta }),
            (None, Some(share), Some(population)) => {
                Some(Sampling::PositiveShare { share, population })
            }
            (None, None, None) => None,
            _ => bail!(
                "give --negative-sampling-rate, or --positive-share with --population-base-rate"
            ),
        },
    )
}

fn sampling_record(args: &CalibrateArgs, c: &BaseRateCorrection) -> Value {
    json!({
        "negative_sampling_rate": args.negative_sampling_rate,
        "positive_share": args.positive_share,
        "population_base_rate": c.population_base_rate,
        "log_odds_shift": c.log_odds_shift,
        "source": if args.negative_sampling_rate.is_some() {
            "Dal Pozzolo, Caelen, Johnson and Bontempi (2015)"
        } else {
            "King and Zeng (2001)"
        },
    })
}

/// The model-file form of a map (`docs/model-format.md`).
pub fn calibration_json(c: &Calibration) -> Value {
    match c {
        Calibration::Platt { a, b } => json!({"platt": {"a": a, "b": b}}),
        Calibration::Beta { a, b, c } => json!({"beta": {"a": a, "b": b, "c": c}}),
        Calibration::Temperature { t } => json!({"temperature": {"t": t}}),
        Calibration::Isotonic { input, x, y } => {
            let input = match input {
                IsotonicInput::LogOdds => "log_odds",
                IsotonicInput::Probability => "probability",
            };
            json!({"isotonic": {"input": input, "x": x, "y": y}})
        }
    }
}

fn finite_or_null(v: f64) -> Value {
    if v.is_finite() {
        json!(v)
    } else {
        Value::Null
    }
}

/// Before and after scores; with `bins`, the reliability tables too (the report file has them, the model's
/// metadata only the summary).
fn report_json(r: &FitReport, bins: bool) -> Value {
    let side = |s: &fit::Scores| {
        let mut v = json!({
            "log_loss": finite_or_null(s.log_loss),
            "brier": s.brier,
            "ece": s.table.ece,
        });
        if bins {
            v["bins"] = s
                .table
                .bins
                .iter()
                .map(|b| {
                    json!({
                        "lower": b.lower, "upper": b.upper, "count": b.count,
                        "mean_predicted": b.mean_predicted, "fraction_positive": b.fraction_positive,
                    })
                })
                .collect();
        }
        v
    };
    json!({"before": side(&r.before), "after": side(&r.after)})
}

#[allow(clippy::too_many_arguments)]
fn print_summary(
    args: &CalibrateArgs,
    method: Method,
    reason: Option<&str>,
    map: &Calibration,
    base_rate: f64,
    holdout_rate: f64,
    report: &FitReport,
    version: &str,
) {
    println!("method: {method}");
    if let Some(r) = reason {
        println!("why: {r}");
    }
    println!("map: {}", calibration_json(map));
    println!("holdout base rate: {holdout_rate:.6}; base rate written: {base_rate:.6}");
    println!("{}-fold cross-validated, on the holdout:", report.folds);
    println!("  {:<10} {:>10} {:>10}", "", "before", "after");
    println!(
        "  {:<10} {:>10.6} {:>10.6}",
        "log-loss", report.before.log_loss, report.after.log_loss
    );
    println!(
        "  {:<10} {:>10.6} {:>10.6}",
        "Brier", report.before.brier, report.after.brier
    );
    println!(
        "  {:<10} {:>10.6} {:>10.6}",
        "ECE", report.before.table.ece, report.after.table.ece
    );
    if !report.after.log_loss.is_finite() {
        println!("  (log-loss is infinite: the map gives probability 0 or 1 to a row of the other class)");
    }
    println!("wrote {} (version {version})", display(&args.output));
    println!("\n{}", super::CAUTIONS);
}

fn display(p: &Path) -> String {
    p.display().to_string()
}
