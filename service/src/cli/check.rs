//! `probity check`: load and validate a model file, then print what it holds.

use std::path::PathBuf;

use probity_models::model::DistributionScale;
use probity_models::{BodyKind, Calibration, FeatureKind, IsotonicInput, Model, OddsOf};
use serde_json::{json, Value};

use super::score::load_model;

/// Arguments of `probity check`.
#[derive(Debug, clap::Args)]
pub struct CheckArgs {
    /// The model file.
    pub model_file: PathBuf,
    /// Print the summary as one JSON object.
    #[arg(long)]
    pub json: bool,
}

/// Runs `probity check`.
pub fn run(args: &CheckArgs) -> anyhow::Result<()> {
    let model = load_model(&args.model_file)?;
    let summary = summary_json(&model);
    if args.json {
        println!("{}", serde_json::to_string_pretty(&summary)?);
    } else {
        print!("{}", summary_text(&model));
    }
    Ok(())
}

/// The summary as JSON: the same facts as the text form.
pub fn summary_json(model: &Model) -> Value {
    let s = model.summary();
    let body = match s.kind {
        BodyKind::Ensemble => json!({
            "kind": "ensemble", "trees": s.trees, "nodes": s.nodes, "leaves": s.leaves, "max_depth": s.max_depth,
            "engine_bytes": s.engine_bytes,
        }),
        BodyKind::Linear => {
            json!({"kind": "linear", "terms": s.terms, "engine_bytes": s.engine_bytes})
        }
    };
    let features: Vec<Value> = model
        .schema()
        .features()
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let mut v = match &f.kind {
                FeatureKind::Numeric => json!({"name": f.name, "type": "numeric"}),
                FeatureKind::Categorical { categories } => {
                    json!({"name": f.name, "type": "categorical", "categories": categories.len()})
                }
            };
            if let Some(d) = model.training_distribution(i) {
                v["training_distribution"] = json!({
                    "bins": d.shares.len(),
                    "missing": d.missing,
                    "unknown": d.unknown,
                });
            }
            v
        })
        .collect();
    let calibration = model.calibration().map(|c| match c {
        Calibration::Platt { a, b } => json!({"kind": "platt", "a": a, "b": b}),
        Calibration::Temperature { t } => json!({"kind": "temperature", "t": t}),
        Calibration::Beta { a, b, c } => json!({"kind": "beta", "a": a, "b": b, "c": c}),
        Calibration::Isotonic { input, x, .. } => json!({
            "kind": "isotonic", "input": isotonic_input(*input), "points": x.len(),
        }),
    });
    let reference = model.reference_distribution().map(|r| {
        json!({
            "on": distribution_scale(r.on), "bins": r.fractions.len(), "edges": r.edges, "fractions": r.fractions,
        })
    });
    let score_scale = model.score_scale().map(|s| {
        json!({"points": s.points, "at_odds": s.at_odds, "pdo": s.pdo, "odds_of": odds_of(s.odds_of)})
    });
    json!({
        "name": model.name(),
        "version": model.version(),
        "body": body,
        "features": features,
        "margin_scale": model.margin_scale().as_str(),
        "base_rate": model.base_rate(),
        "serving_base_rate": model.serving_base_rate(),
        "calibration": calibration,
        "reference_distribution": reference,
        "score_scale": score_scale,
        "metadata": model.metadata(),
    })
}

/// The summary for a person to read.
pub fn summary_text(model: &Model) -> String {
    let s = model.summary();
    let mut out = format!("model          {} {}\n", model.name(), model.version());
    out += &match s.kind {
        BodyKind::Ensemble => format!(
            "body           tree ensemble: {} trees, {} nodes, {} leaves, max depth {}; {} bytes compiled\n",
            s.trees, s.nodes, s.leaves, s.max_depth, s.engine_bytes
        ),
        BodyKind::Linear => format!(
            "body           linear: {} terms; {} bytes compiled\n",
            s.terms, s.engine_bytes
        ),
    };
    let features = model.schema().features();
    out += &format!("features       {}\n", features.len());
    let width = features.iter().map(|f| f.name.len()).max().unwrap_or(0);
    for (i, f) in features.iter().enumerate() {
        let kind = match &f.kind {
            FeatureKind::Numeric => "numeric".to_string(),
            FeatureKind::Categorical { categories } => {
                format!(
                    "categorical, {} categories: {}",
                    categories.len(),
                    category_list(categories)
                )
            }
        };
        let trained = match model.training_distribution(i) {
            None => String::new(),
            Some(d) if d.is_categorical() => format!(
                "; training distribution: missing {:.2}%, unknown {:.2}%",
                100.0 * d.missing,
                100.0 * d.unknown
            ),
            Some(d) => format!(
                "; training distribution: {} bins, missing {:.2}%",
                d.shares.len(),
                100.0 * d.missing
            ),
        };
        out += &format!("  {:width$}  {kind}{trained}\n", f.name);
    }
    out += &format!("margin scale   {}\n", model.margin_scale().as_str());
    out += &format!(
        "base rate      trained at {}; {}\n",
        model.base_rate(),
        match model.serving_base_rate() {
            Some(p) => format!(
                "`probity score` serves at the file's serving_base_rate {p} unless --target-base-rate is given"
            ),
            None => "no serving_base_rate in the file: `probity score` needs --target-base-rate (or \
                     --keep-training-base-rate)"
                .to_string(),
        }
    );
    out += &format!(
        "calibration    {}\n",
        match model.calibration() {
            None => "none".to_string(),
            Some(Calibration::Platt { a, b }) => format!("platt, a = {a}, b = {b}"),
            Some(Calibration::Temperature { t }) => format!("temperature, t = {t}"),
            Some(Calibration::Beta { a, b, c }) => format!("beta, a = {a}, b = {b}, c = {c}"),
            Some(Calibration::Isotonic { input, x, .. }) => {
                format!(
                    "isotonic on the {}, {} points",
                    isotonic_input(*input).replace('_', "-"),
                    x.len()
                )
            }
        }
    );
    out += &format!(
        "reference      {}\n",
        match model.reference_distribution() {
            None => "none".to_string(),
            Some(r) => format!(
                "{} bins on the {}",
                r.fractions.len(),
                distribution_scale(r.on).replace('_', "-")
            ),
        }
    );
    out += &format!(
        "score scale    {}\n",
        match model.score_scale() {
            None => "none".to_string(),
            Some(s) => format!(
                "{} points at odds {} of the {} class, {} points to double the odds",
                s.points,
                s.at_odds,
                odds_of(s.odds_of),
                s.pdo
            ),
        }
    );
    let metadata = model.metadata();
    if !metadata.is_null() {
        out += "metadata\n";
        metadata_lines(metadata, 1, &mut out);
    }
    out
}

/// The first categories, quoted, and how many more: a list of 65,536 stays one line.
fn category_list(categories: &[String]) -> String {
    const SHOWN: usize = 12;
    let mut list: Vec<String> = categories
        .iter()
        .take(SHOWN)
        .map(|c| format!("{c:?}"))
        .collect();
    if categories.len() > SHOWN {
        list.push(format!("... ({} more)", categories.len() - SHOWN));
    }
    list.join(", ")
}

/// Metadata one key a line, nested objects indented, long text cut with its length said.
fn metadata_lines(value: &serde_json::Value, depth: usize, out: &mut String) {
    const LONGEST: usize = 100;
    let indent = "  ".repeat(depth);
    match value {
        serde_json::Value::Object(map) => {
            for (k, v) in map {
                if v.is_object() {
                    out.push_str(&format!("{indent}{k}\n"));
                    metadata_lines(v, depth + 1, out);
                } else {
                    let text = match v {
                        serde_json::Value::String(s) => s.clone(),
                        other => other.to_string(),
                    };
                    let shown = if text.chars().count() > LONGEST {
                        format!(
                            "{}... ({} characters)",
                            text.chars().take(LONGEST).collect::<String>(),
                            text.chars().count()
                        )
                    } else {
                        text
                    };
                    out.push_str(&format!("{indent}{k}: {shown}\n"));
                }
            }
        }
        other => out.push_str(&format!("{indent}{other}\n")),
    }
}

fn isotonic_input(i: IsotonicInput) -> &'static str {
    match i {
        IsotonicInput::LogOdds => "log_odds",
        IsotonicInput::Probability => "probability",
    }
}

fn distribution_scale(d: DistributionScale) -> &'static str {
    match d {
        DistributionScale::Probability => "probability",
        DistributionScale::LogOdds => "log_odds",
    }
}

fn odds_of(o: OddsOf) -> &'static str {
    match o {
        OddsOf::Negative => "negative",
        OddsOf::Positive => "positive",
    }
}
