//! `probity evaluate`: the live report's figures on a labelled CSV or Parquet file, offline, with the operating point
//! at a threshold and, given a challenger, the paired comparison. The file is read through the scoring pipeline (same
//! columns, same bad-input rules as `probity score`); every figure is computed by
//! [`probity_models::evaluate`].

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use anyhow::{anyhow, bail, Context};
use probity::report::calibration_tests::CalibrationTests;
use probity_models::evaluate::{
    band_points, compare_on_labels, evaluate, operating_point, BandPoint, Costs, EvaluateOptions,
    Evaluation, OperatingPoint, PairedComparison,
};
use probity_models::metrics::EmptyBinRule;
use probity_models::metrics::{BinStrategy, HlGrouping};
use probity_models::stability::{stability, FeatureStability};
use probity_models::{Model, OutputSpec};
use serde_json::{json, Value};

use super::pipeline::{read_label, score_rows, ColumnMap, Input};
use super::score::load_model;
use probity::charts::palette;
use probity::charts::pictures::{self, Curve, ProbabilityAxis};

/// How calibration bins are cut.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Binning {
    /// Bins of equal width on [0, 1].
    EqualWidth,
    /// Bins holding near-equal numbers of cases, cut at sample quantiles.
    EqualCount,
}

/// How Hosmer-Lemeshow groups are cut.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum HlGroups {
    /// Sorted by probability and cut into groups of near-equal size.
    Rank,
    /// Cut at the probability quantiles, tied probabilities sharing a group.
    Quantile,
}

/// Arguments of `probity evaluate`.
#[derive(Debug, clap::Args)]
pub struct EvaluateArgs {
    /// The model file.
    #[arg(long)]
    pub model: PathBuf,
    /// Labelled CSV file (gzip-compressed is read as is) or Parquet file (found by its first bytes `PAR1`, not its
    /// name): a column per model feature and a 0/1 label column.
    #[arg(long)]
    pub input: PathBuf,
    /// The label column: 1 = the positive class, 0 the other (also true/false, as a Parquet boolean column).
    #[arg(long)]
    pub label_column: String,
    /// A second model file, compared with the first on the same rows.
    #[arg(long)]
    pub challenger: Option<PathBuf>,
    /// Number of calibration bins (also the Brier decomposition's).
    #[arg(long, default_value_t = 10, value_name = "N")]
    pub bins: usize,
    /// How calibration bins are cut.
    #[arg(long, value_enum, default_value_t = Binning::EqualWidth)]
    pub binning: Binning,
    /// How Hosmer-Lemeshow groups are cut (as many groups as --bins).
    #[arg(long, value_enum, default_value_t = HlGroups::Rank)]
    pub hl_groups: HlGroups,
    /// Decline when the probability is above T; the operating point is reported there.
    #[arg(long, value_name = "T", conflicts_with_all = ["cost_false_positive", "cost_false_negative"])]
    pub threshold: Option<f64>,
    /// Cost of declining a negative; with --cost-false-negative, the threshold is A / (A + B).
    #[arg(long, value_name = "A", requires = "cost_false_negative")]
    pub cost_false_positive: Option<f64>,
    /// Cost of approving a positive.
    #[arg(long, value_name = "B", requires = "cost_false_positive")]
    pub cost_false_negative: Option<f64>,
    /// Score bands: increasing probability edges in (0, 1), comma-separated; each band is reported with the
    /// operating point of declining it and every band above.
    #[arg(long, value_delimiter = ',', value_name = "EDGES")]
    pub bands: Vec<f64>,
    /// Read a feature the input has no column for as missing on every row, instead of stopping.
    #[arg(long)]
    pub allow_missing_columns: bool,
    /// Field separator of the input: one ASCII character, or `tab`. Gzip-compressed input is read as is.
    #[arg(long, value_name = "CHAR", default_value = ",", value_parser = super::pipeline::parse_delimiter)]
    pub delimiter: u8,
    /// Print JSON instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Write the pictures (reliability, class histograms, gains) as SVG files into this folder.
    #[arg(long, value_name = "DIR")]
    pub svg_dir: Option<PathBuf>,
}

/// Everything `evaluate` computed.
struct Outcome {
    options: EvaluateOptions,
    champion_name: String,
    champion: Evaluation,
    point: Option<OperatingPoint>,
    costs: Option<Costs>,
    bands: Vec<BandPoint>,
    challenger_name: Option<String>,
    challenger: Option<Evaluation>,
    comparison: Option<PairedComparison>,
    /// Spiegelhalter's z and logistic recalibration (Cox 1958), as in the live report; with what could not be
    /// computed noted.
    champion_tests: (CalibrationTests, Vec<String>),
    challenger_tests: Option<(CalibrationTests, Vec<String>)>,
    /// The champion's per-feature stability against the training distributions in its file (empty without any).
    features: Vec<(String, FeatureStability)>,
}

/// The live report's calibration tests on the same pairs.
fn calibration_tests(p: &[f64], h: &[f64], y: &[bool]) -> (CalibrationTests, Vec<String>) {
    let mut notes = Vec::new();
    let tests = probity::report::calibration_tests::compute(p, h, y, &mut notes);
    (tests, notes)
}

/// Runs `probity evaluate`.
pub fn run(args: &EvaluateArgs) -> anyhow::Result<()> {
    let options = EvaluateOptions {
        bins: match args.binning {
            Binning::EqualWidth => BinStrategy::Uniform(args.bins),
            Binning::EqualCount => BinStrategy::Quantile(args.bins),
        },
        hl: match args.hl_groups {
            HlGroups::Rank => HlGrouping::ByRank(args.bins),
            HlGroups::Quantile => HlGrouping::ByQuantile(args.bins),
        },
        ..EvaluateOptions::default()
    };
    let costs = match (args.cost_false_positive, args.cost_false_negative) {
        (Some(a), Some(b)) => Some(Costs {
            false_positive: a,
            false_negative: b,
        }),
        _ => None,
    };
    let threshold = match (args.threshold, costs) {
        (Some(t), _) => Some(t),
        (None, Some(c)) => {
            if !(c.false_positive >= 0.0 && c.false_negative >= 0.0)
                || c.false_positive + c.false_negative <= 0.0
            {
                bail!("costs must be at least 0 with a positive sum");
            }
            Some(c.false_positive / (c.false_positive + c.false_negative))
        }
        _ => None,
    };
    let model = load_model(&args.model)?;
    let (h, p, y, slot_counts) = read_scored(&model, args)?;
    let features = model
        .training_distributions()
        .zip(&slot_counts)
        .map(|((i, d), counts)| {
            let name = model
                .schema()
                .feature(i)
                .map(|f| f.name.clone())
                .unwrap_or_default();
            stability(d, counts, EmptyBinRule::default())
                .map(|s| (name.clone(), s))
                .with_context(|| format!("stability of feature `{name}`"))
        })
        .collect::<anyhow::Result<Vec<_>>>()?;
    let champion = evaluate(&h, &p, &y, &options)
        .with_context(|| format!("cannot evaluate {}", args.model.display()))?;
    let point = threshold
        .map(|t| operating_point(&p, &y, t, costs))
        .transpose()
        .context("operating point")?;
    let bands = if args.bands.is_empty() {
        Vec::new()
    } else {
        let ok = args.bands.windows(2).all(|w| w[0] < w[1])
            && args.bands.iter().all(|e| *e > 0.0 && *e < 1.0);
        if !ok {
            bail!("--bands must be strictly increasing probabilities in (0, 1)");
        }
        let labels: Vec<String> = (1..=args.bands.len() + 1)
            .map(|i| format!("band {i}"))
            .collect();
        band_points(&p, &y, &args.bands, &labels, costs).context("score bands")?
    };
    let (challenger_name, challenger, comparison) = match &args.challenger {
        None => (None, None, None),
        Some(path) => {
            let other = load_model(path)?;
            let (h2, p2, y2, _) = read_scored(&other, args)?;
            if y2 != y {
                bail!(
                    "the challenger read different rows from {}",
                    args.input.display()
                );
            }
            let e = evaluate(&h2, &p2, &y2, &options)
                .with_context(|| format!("cannot evaluate {}", path.display()))?;
            let c = compare_on_labels(&h, &h2, &y, &options).context("paired comparison")?;
            let tests = calibration_tests(&p2, &h2, &y2);
            (Some(name_of(&other)), Some((e, tests)), Some(c))
        }
    };
    let (challenger, challenger_tests) = match challenger {
        Some((e, t)) => (Some(e), Some(t)),
        None => (None, None),
    };
    let outcome = Outcome {
        options,
        champion_name: name_of(&model),
        champion,
        point,
        costs,
        bands,
        challenger_name,
        challenger,
        comparison,
        champion_tests: calibration_tests(&p, &h, &y),
        challenger_tests,
        features,
    };
    if let Some(dir) = &args.svg_dir {
        write_pictures(dir, &outcome)?;
    }
    if args.json {
        super::emit(&(serde_json::to_string_pretty(&to_json(&outcome))? + "\n"))?;
    } else {
        super::emit(&text(&outcome))?;
    }
    Ok(())
}

fn name_of(model: &Model) -> String {
    format!("{} {}", model.name(), model.version())
}

/// What `read_scored` returns: final log-odds, probabilities, labels, and the slot counts of every feature with a
/// training distribution (in [`Model::training_distributions`] order).
type Scored = (Vec<f64>, Vec<f64>, Vec<bool>, Vec<Vec<u64>>);

/// Final log-odds, probabilities and labels of every row, in file order, and each training distribution's slot
/// counts; the first bad row stops the run.
fn read_scored(model: &Model, args: &EvaluateArgs) -> anyhow::Result<Scored> {
    let mut reader = Input::open(
        &args.input,
        args.delimiter,
        &indicatif::ProgressBar::hidden(),
    )?;
    let header = reader
        .header()
        .with_context(|| format!("cannot read the header row of {}", args.input.display()))?;
    let columns = ColumnMap::new(model.schema(), &header, None, args.allow_missing_columns)
        .with_context(|| format!("cannot read {}", args.input.display()))?;
    let label_col = header
        .iter()
        .position(|c| c == args.label_column)
        .ok_or_else(|| {
            anyhow!(
                "{} has no label column `{}`",
                args.input.display(),
                args.label_column
            )
        })?;
    let mut used = columns.used();
    used.push(label_col);
    reader
        .select(Some(&used))
        .with_context(|| format!("cannot read {}", args.input.display()))?;
    let (mut h, mut p, mut y) = (Vec::new(), Vec::new(), Vec::new());
    let distributions: Vec<_> = model.training_distributions().collect();
    let mut slot_counts: Vec<Vec<u64>> = distributions
        .iter()
        .map(|(_, d)| vec![0; d.slots()])
        .collect();
    let mut row = 0u64;
    score_rows(
        model,
        &columns,
        &OutputSpec::default(),
        &mut reader,
        None,
        |record, values, scored, _| {
            row += 1;
            for ((i, d), counts) in distributions.iter().zip(&mut slot_counts) {
                if let Some(c) = values.get(*i).and_then(|&v| counts.get_mut(d.slot_of(v))) {
                    *c += 1;
                }
            }
            let text = record.get(label_col).unwrap_or("").trim();
            let label = match read_label(text) {
                Some(label) => label,
                None => {
                    let place = record.position().map_or(format!("row {row}"), |q| {
                        format!("row {row} (line {})", q.line())
                    });
                    bail!(
                        "{place}, column `{}`: label `{text}` is not 0 or 1",
                        args.label_column
                    )
                }
            };
            h.push(scored.adjusted_log_odds);
            p.push(scored.probability);
            y.push(label);
            Ok(())
        },
    )
    .with_context(|| format!("cannot evaluate {}", args.input.display()))?;
    if y.is_empty() {
        bail!("{} has no data rows", args.input.display());
    }
    Ok((h, p, y, slot_counts))
}

fn binning_words(o: &EvaluateOptions) -> String {
    match o.bins {
        BinStrategy::Uniform(n) => format!("{n} equal-width bins"),
        BinStrategy::Quantile(n) => format!("{n} equal-count bins"),
    }
}

fn hl_words(o: &EvaluateOptions) -> String {
    match o.hl {
        HlGrouping::ByRank(n) => format!("{n} groups by rank"),
        HlGrouping::ByQuantile(n) => format!("{n} groups by quantile"),
    }
}

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.6}"))
}

fn model_text(s: &mut String, name: &str, e: &Evaluation, o: &EvaluateOptions) {
    let _ = writeln!(s, "== {name}");
    let _ = writeln!(
        s,
        "cases {}  positives {}  observed base rate {:.6}  mean probability {:.6}",
        e.cases,
        e.positives,
        e.positives as f64 / e.cases as f64,
        e.mean_probability
    );
    let _ = writeln!(
        s,
        "log-loss {:.6}  Brier {:.6}  AUC {:.6}  KS {:.6} (p {:.3e}, asymptotic)",
        e.log_loss, e.brier, e.auc, e.ks, e.ks_p_value
    );
    let d = &e.decomposition;
    let _ = writeln!(
        s,
        "Brier = reliability {:.6} - resolution {:.6} + uncertainty {:.6} + within-bin variance {:.6} - covariance {:.6}",
        d.reliability, d.resolution, d.uncertainty, d.within_bin_variance, d.within_bin_covariance
    );
    let c = &e.calibration;
    let _ = writeln!(
        s,
        "calibration ({}): ECE {:.6}  MCE {:.6}",
        binning_words(o),
        c.ece,
        c.mce
    );
    let _ = writeln!(
        s,
        "  {:>13} {:>8} {:>9} {:>10} {:>10}",
        "bin", "count", "positives", "predicted", "observed"
    );
    for b in &c.bins {
        let _ = writeln!(
            s,
            "  ({:.2}, {:.2}] {:>8} {:>9} {:>10.4} {:>10.4}",
            b.lower, b.upper, b.count, b.positives, b.mean_predicted, b.fraction_positive
        );
    }
    match &e.hosmer_lemeshow {
        Ok(hl) => {
            let _ = writeln!(
                s,
                "Hosmer-Lemeshow ({}): C {:.4}  df {}  p {:.4}",
                hl_words(o),
                hl.statistic,
                hl.degrees_of_freedom,
                hl.p_value
            );
        }
        Err(err) => {
            let _ = writeln!(s, "note: Hosmer-Lemeshow: {err}");
        }
    }
    match &e.gains {
        Ok(gains) => {
            let _ = writeln!(
                s,
                "  {:>6} {:>8} {:>9} {:>8} {:>7} {:>8}",
                "decile", "count", "positives", "gain", "lift", "cum.lift"
            );
            for g in gains {
                let _ = writeln!(
                    s,
                    "  {:>6} {:>8} {:>9} {:>8.4} {:>7.3} {:>8.3}",
                    g.group + 1,
                    g.count,
                    g.positives,
                    g.cumulative_gain,
                    g.lift,
                    g.cumulative_lift
                );
            }
        }
        Err(err) => {
            let _ = writeln!(s, "note: gains: {err}");
        }
    }
}

fn point_text(s: &mut String, what: &str, p: &OperatingPoint) {
    let _ = writeln!(
        s,
        "{what}: decline above {:.6}: approved {:.4}  declined {:.4}  precision {}  recall {}{}",
        p.threshold,
        p.approval_rate,
        p.decline_rate,
        opt(p.precision),
        opt(p.recall),
        p.expected_cost
            .map(|c| format!("  expected cost per case {c:.6}"))
            .unwrap_or_default()
    );
}

fn text(o: &Outcome) -> String {
    let mut s = String::new();
    model_text(&mut s, &o.champion_name, &o.champion, &o.options);
    tests_text(&mut s, &o.champion_tests);
    if let Some(p) = &o.point {
        let what = match o.costs {
            Some(c) => format!(
                "operating point (costs: false positive {}, false negative {})",
                c.false_positive, c.false_negative
            ),
            None => "operating point".to_string(),
        };
        point_text(&mut s, &what, p);
    }
    for b in &o.bands {
        let _ = writeln!(
            s,
            "{} ({:.4}, {:.4}]: cases {}  positives {}",
            b.label, b.lower, b.upper, b.cases, b.positives
        );
        point_text(
            &mut s,
            &format!("  declining {} and above", b.label),
            &b.from_here,
        );
    }
    if let (Some(name), Some(e), Some(c)) = (&o.challenger_name, &o.challenger, &o.comparison) {
        s.push('\n');
        model_text(&mut s, &format!("challenger {name}"), e, &o.options);
        if let Some(t) = &o.challenger_tests {
            tests_text(&mut s, t);
        }
        s.push('\n');
        let _ = writeln!(
            s,
            "== challenger against {} (challenger minus champion)",
            o.champion_name
        );
        if let Some(t) = &c.outcomes.log_loss {
            let _ = writeln!(
                s,
                "paired log-loss difference {:.6}  statistic {}  p {} (normal)  p {} (Student t, {} df)",
                t.mean,
                opt(t.statistic),
                opt(t.p_value),
                opt(c.log_loss_t_p_value),
                t.cases - 1
            );
        }
        if let Some(t) = &c.outcomes.brier {
            let _ = writeln!(
                s,
                "paired Brier difference {:.6}  statistic {}  p {} (normal)  p {} (Student t)",
                t.mean,
                opt(t.statistic),
                opt(t.p_value),
                opt(c.brier_t_p_value)
            );
        }
        if let Some(d) = &c.outcomes.delong {
            let _ = writeln!(
                s,
                "AUC {:.6} against {:.6}: difference {:.6}  standard error {:.6}  z {}  p {} (DeLong)",
                d.auc_challenger,
                d.auc_champion,
                d.difference,
                d.standard_error,
                opt(d.z),
                opt(d.p_value)
            );
        }
    }
    if !o.features.is_empty() {
        let _ = writeln!(
            s,
            "\n== feature stability of {} against its training distributions (PSI, empty slots floored at 1e-4)",
            o.champion_name
        );
        let width = o
            .features
            .iter()
            .map(|(n, _)| n.len())
            .max()
            .unwrap_or(0)
            .max(7);
        let _ = writeln!(
            s,
            "{:<width$}  {:>9}  {:>9}  {:>9}",
            "feature", "PSI", "missing", "unknown"
        );
        for (name, f) in &o.features {
            let _ = writeln!(
                s,
                "{name:<width$}  {:>9.6}  {:>9.6}  {:>9}",
                f.psi,
                f.missing_rate,
                f.unknown_rate
                    .map_or_else(|| "-".to_string(), |u| format!("{u:.6}"))
            );
        }
    }
    let _ = writeln!(s, "\n{}", super::CAUTIONS);
    s
}

fn point_json(p: &OperatingPoint) -> Value {
    json!({
        "threshold": p.threshold,
        "true_positive": p.counts.true_positive,
        "false_positive": p.counts.false_positive,
        "true_negative": p.counts.true_negative,
        "false_negative": p.counts.false_negative,
        "approval_rate": p.approval_rate,
        "decline_rate": p.decline_rate,
        "precision": p.precision,
        "recall": p.recall,
        "expected_cost": p.expected_cost,
    })
}

fn model_json(name: &str, e: &Evaluation, o: &EvaluateOptions) -> Value {
    let d = &e.decomposition;
    json!({
        "model": name,
        "cases": e.cases,
        "positives": e.positives,
        "mean_probability": e.mean_probability,
        "log_loss": e.log_loss,
        "brier": e.brier,
        "brier_decomposition": {
            "reliability": d.reliability,
            "resolution": d.resolution,
            "uncertainty": d.uncertainty,
            "within_bin_variance": d.within_bin_variance,
            "within_bin_covariance": d.within_bin_covariance,
        },
        "auc": e.auc,
        "ks": e.ks,
        "ks_p_value": e.ks_p_value,
        "calibration": {
            "binning": binning_words(o),
            "ece": e.calibration.ece,
            "mce": e.calibration.mce,
            "bins": e.calibration.bins.iter().map(|b| json!({
                "lower": b.lower,
                "upper": b.upper,
                "count": b.count,
                "positives": b.positives,
                "mean_predicted": b.mean_predicted,
                "fraction_positive": b.fraction_positive,
            })).collect::<Vec<_>>(),
        },
        "hosmer_lemeshow": match &e.hosmer_lemeshow {
            Ok(hl) => json!({
                "grouping": hl_words(o),
                "statistic": hl.statistic,
                "degrees_of_freedom": hl.degrees_of_freedom,
                "p_value": hl.p_value,
            }),
            Err(err) => json!({ "note": err.to_string() }),
        },
        "gains": match &e.gains {
            Ok(g) => json!(g.iter().map(|g| json!({
                "group": g.group,
                "count": g.count,
                "positives": g.positives,
                "cumulative_gain": g.cumulative_gain,
                "lift": g.lift,
                "cumulative_lift": g.cumulative_lift,
            })).collect::<Vec<_>>()),
            Err(err) => json!({ "note": err.to_string() }),
        },
        "histogram_negative": e.histogram_negative,
        "histogram_positive": e.histogram_positive,
    })
}

fn tests_text(s: &mut String, (tests, notes): &(CalibrationTests, Vec<String>)) {
    probity::report::calibration_tests::render(s, tests);
    for n in notes {
        let _ = writeln!(s, "note: {n}");
    }
}

fn tests_json((tests, notes): &(CalibrationTests, Vec<String>)) -> Value {
    let mut v = serde_json::to_value(tests).unwrap_or_default();
    v["notes"] = json!(notes);
    v
}

fn to_json(o: &Outcome) -> Value {
    let mut v = json!({
        "champion": model_json(&o.champion_name, &o.champion, &o.options),
        "operating_point": o.point.as_ref().map(point_json),
        "costs": o.costs.map(|c| json!({"false_positive": c.false_positive, "false_negative": c.false_negative})),
        "bands": o.bands.iter().map(|b| json!({
            "label": b.label,
            "lower": b.lower,
            "upper": b.upper,
            "cases": b.cases,
            "positives": b.positives,
            "declining_from_here": point_json(&b.from_here),
        })).collect::<Vec<_>>(),
        "cautions": super::CAUTIONS,
    });
    v["champion"]["calibration_tests"] = tests_json(&o.champion_tests);
    if !o.features.is_empty() {
        v["champion"]["feature_stability"] = json!({
            "empty_bin_rule": "both shares floored at 1e-4",
            "features": o.features.iter().map(|(name, f)| json!({
                "feature": name,
                "rows": f.rows,
                "psi": f.psi,
                "missing_rate": f.missing_rate,
                "unknown_rate": f.unknown_rate,
            })).collect::<Vec<_>>(),
        });
    }
    if let (Some(name), Some(e), Some(c)) = (&o.challenger_name, &o.challenger, &o.comparison) {
        let paired = |t: &Option<probity_models::compare::PairedTest>, tp: Option<f64>| {
            t.as_ref().map(|t| {
                json!({
                    "cases": t.cases,
                    "mean_difference": t.mean,
                    "standard_error": t.standard_error,
                    "statistic": t.statistic,
                    "p_value_normal": t.p_value,
                    "p_value_student_t": tp,
                    "degrees_of_freedom": t.cases - 1,
                })
            })
        };
        v["challenger"] = model_json(name, e, &o.options);
        if let Some(t) = &o.challenger_tests {
            v["challenger"]["calibration_tests"] = tests_json(t);
        }
        v["comparison"] = json!({
            "sign": "challenger minus champion",
            "log_loss": paired(&c.outcomes.log_loss, c.log_loss_t_p_value),
            "brier": paired(&c.outcomes.brier, c.brier_t_p_value),
            "delong": c.outcomes.delong.as_ref().map(|d| json!({
                "auc_champion": d.auc_champion,
                "auc_challenger": d.auc_challenger,
                "difference": d.difference,
                "standard_error": d.standard_error,
                "z": d.z,
                "p_value": d.p_value,
            })),
        });
    }
    v
}

fn write_pictures(dir: &Path, o: &Outcome) -> anyhow::Result<()> {
    std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let mut curves = vec![Curve {
        label: o.champion_name.clone(),
        colour: palette::TIDE,
        class: "",
        bins: pictures::bins_of(&o.champion.calibration),
    }];
    if let (Some(name), Some(e)) = (&o.challenger_name, &o.challenger) {
        curves.push(Curve {
            label: format!("challenger {name}"),
            colour: palette::OCHRE,
            class: "challenger",
            bins: pictures::bins_of(&e.calibration),
        });
    }
    let note = format!(
        "ECE {:.4} over {} labelled cases ({})",
        o.champion.calibration.ece,
        o.champion.cases,
        binning_words(&o.options)
    );
    let files = [
        (
            "reliability.svg",
            pictures::reliability(
                &format!("Reliability: {}", o.champion_name),
                &curves,
                ProbabilityAxis::Auto,
                &[(palette::INK, note)],
            ),
        ),
        (
            "histograms.svg",
            pictures::class_histograms(
                &format!("Scores by class: {}", o.champion_name),
                &o.champion.histogram_negative,
                &o.champion.histogram_positive,
            ),
        ),
        (
            "gains.svg",
            pictures::gains(
                &format!("Cumulative gains: {}", o.champion_name),
                &gains_points(&o.champion),
            ),
        ),
    ];
    for (name, svg) in files {
        let path = dir.join(name);
        std::fs::write(&path, svg).with_context(|| format!("cannot write {}", path.display()))?;
    }
    Ok(())
}

fn gains_points(e: &Evaluation) -> Vec<(f64, f64)> {
    match &e.gains {
        Ok(g) => g
            .iter()
            .map(|g| {
                (
                    g.cumulative_count as f64 / e.cases as f64,
                    g.cumulative_gain,
                )
            })
            .collect(),
        Err(_) => Vec::new(),
    }
}
