//! `probity demo`: the Harbourline Card Services scenario end to end, offline. It generates invented card
//! transactions with known fraud labels, scores them with the demo models (a tree ensemble and a points
//! scorecard, both embedded in the binary), corrects each model's training base rate to the live one, and shows
//! what a fraud analyst would look at: throughput, the probability distribution, calibration in the large, and
//! log-loss, Brier score and AUC.
//!
//! The steps are separate functions (generate, score, report) so that a live variant can reuse them.

use std::fmt::Write as _;
use std::path::PathBuf;
use std::time::Instant;

use anyhow::Context;
use csv::StringRecord;
use probity_models::metrics::{brier_score, log_loss_from_log_odds, roc_auc, MetricsError};
use probity_models::{BodyKind, Model, OutputSpec};

use super::demo_data::{write_transactions, Generator, Transaction};
use super::pipeline::{csv_reader, score_records, ColumnMap};
use super::score::{load_model, push_scores};

/// The demo models shipped in the binary: (file name, JSON text).
const EMBEDDED_MODELS: [(&str, &str); 2] = [
    (
        "harbourline-fraud-trees.json",
        include_str!("../../demo/harbourline-fraud-trees.json"),
    ),
    (
        "harbourline-fraud-scorecard.json",
        include_str!("../../demo/harbourline-fraud-scorecard.json"),
    ),
];

/// Upper edges of the probability histogram's bins; the last bin is open above.
const HISTOGRAM_EDGES: [f64; 7] = [0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5];
const HISTOGRAM_LABELS: [&str; 8] = [
    "< 0.5%", "0.5-1%", "1-2%", "2-5%", "5-10%", "10-20%", "20-50%", ">= 50%",
];
const HISTOGRAM_WIDTH: usize = 40;

/// The demo's seed. It must differ from the seed of the demo models' training data
/// ([`super::demo_data::DEFAULT_SEED`]): the generator is a stream, so the same seed would replay the first
/// training rows and flatter the models.
pub const DEMO_SEED: u64 = 20_251_103;

/// Said once at the end of the demo.
pub const CAUTIONS: &str =
    "Probabilities are decision support; thresholds and adverse-action duties follow local \
law and licensed practice; re-validate a model before using it on a new population.";

/// Arguments of `probity demo`.
#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Number of transactions to generate.
    #[arg(long, default_value_t = 20_000)]
    pub rows: u64,
    /// Seed of the transaction generator (not the training data's seed, so the models see new transactions).
    #[arg(long, default_value_t = DEMO_SEED)]
    pub seed: u64,
    /// Also write the scored transactions (id, label, each model's scores) to this CSV file.
    #[arg(long, value_name = "FILE")]
    pub write_scored: Option<PathBuf>,
    /// Score with this model file instead of the embedded demo models (repeat for several).
    #[arg(long = "model", value_name = "FILE")]
    pub models: Vec<PathBuf>,
}

/// Runs `probity demo`.
pub fn run(args: &DemoArgs) -> anyhow::Result<()> {
    let models = if args.models.is_empty() {
        embedded_models()?
    } else {
        args.models
            .iter()
            .map(|p| load_model(p))
            .collect::<anyhow::Result<Vec<_>>>()?
    };
    let data = DemoData::generate(args.rows, args.seed)?;
    let runs = models
        .iter()
        .map(|m| score_demo(m, &data))
        .collect::<anyhow::Result<Vec<_>>>()?;
    print!("{}", report(&data, &models, &runs));
    if let Some(path) = &args.write_scored {
        write_scored(path, &data, &models, &runs)
            .with_context(|| format!("cannot write {}", path.display()))?;
        println!("scored transactions written to {}", path.display());
    }
    println!("\n{CAUTIONS}");
    Ok(())
}

/// Loads the demo models compiled into the binary.
pub fn embedded_models() -> anyhow::Result<Vec<Model>> {
    EMBEDDED_MODELS
        .iter()
        .map(|(name, text)| {
            Model::from_json_str(text).with_context(|| format!("embedded demo model {name}"))
        })
        .collect()
}

/// The generated transactions, as rows and as the CSV text a customer would send.
pub struct DemoData {
    /// Generator seed.
    pub seed: u64,
    /// The transactions, in file order.
    pub transactions: Vec<Transaction>,
    /// The same transactions as CSV (without the true probability).
    pub csv: Vec<u8>,
    /// The fraud labels, in file order.
    pub labels: Vec<bool>,
    /// The live base rate: the mean of the generator's true fraud probabilities.
    pub live_base_rate: f64,
}

impl DemoData {
    /// Generates `rows` transactions from `seed`.
    pub fn generate(rows: u64, seed: u64) -> anyhow::Result<Self> {
        let rows = usize::try_from(rows).context("row count too large")?;
        anyhow::ensure!(rows > 0, "the demo needs at least one row");
        let transactions: Vec<Transaction> = Generator::new(seed)?.take(rows).collect();
        let mut csv = Vec::new();
        write_transactions(&mut csv, transactions.iter().cloned(), false)?;
        let labels = transactions.iter().map(|t| t.fraud).collect();
        let live_base_rate = transactions.iter().map(|t| t.probability).sum::<f64>() / rows as f64;
        Ok(Self {
            seed,
            transactions,
            csv,
            labels,
            live_base_rate,
        })
    }

    /// Share of rows labelled fraud.
    pub fn observed_rate(&self) -> f64 {
        self.labels.iter().filter(|&&y| y).count() as f64 / self.labels.len() as f64
    }
}

/// One model's results on the demo data.
pub struct DemoRun {
    /// The spec used: the live base rate as target.
    pub spec: OutputSpec,
    /// Scored rows, as output CSV fields (see [`push_scores`]).
    pub fields: Vec<StringRecord>,
    /// Final probabilities, in file order.
    pub probabilities: Vec<f64>,
    /// Base-rate-corrected log-odds, in file order.
    pub log_odds: Vec<f64>,
    /// Wall time of the scoring, CSV parsing included.
    pub seconds: f64,
}

/// Scores the demo CSV with `model`, shifting its base rate to the data's live one.
pub fn score_demo(model: &Model, data: &DemoData) -> anyhow::Result<DemoRun> {
    let spec = OutputSpec {
        target_base_rate: Some(data.live_base_rate),
        decision: None,
    };
    let start = Instant::now();
    let mut reader = csv_reader(data.csv.as_slice());
    let header = reader.headers()?.clone();
    let columns = ColumnMap::new(model.schema(), &header, None, false)
        .with_context(|| format!("model {} does not fit the demo data", model.name()))?;
    let n = data.transactions.len();
    let (mut probabilities, mut log_odds) = (Vec::with_capacity(n), Vec::with_capacity(n));
    let mut fields = Vec::with_capacity(n);
    let mut buf = String::new();
    score_records(model, &columns, &spec, &mut reader, |_, s| {
        probabilities.push(s.probability);
        log_odds.push(s.adjusted_log_odds);
        let mut record = StringRecord::new();
        push_scores(&mut record, s, &spec, &mut buf);
        fields.push(record);
        Ok(())
    })
    .with_context(|| format!("scoring with model {}", model.name()))?;
    let seconds = start.elapsed().as_secs_f64();
    Ok(DemoRun {
        spec,
        fields,
        probabilities,
        log_odds,
        seconds,
    })
}

/// What the demo prints: the data, then each model, then the generating model as the yardstick.
pub fn report(data: &DemoData, models: &[Model], runs: &[DemoRun]) -> String {
    let n = data.labels.len();
    let mut out = String::new();
    let _ = writeln!(
        out,
        "Harbourline Card Services: card fraud scoring demo (invented data)"
    );
    let _ = writeln!(
        out,
        "{n} transactions generated (seed {}), {} labelled fraud ({:.2}%)",
        data.seed,
        data.labels.iter().filter(|&&y| y).count(),
        100.0 * data.observed_rate()
    );
    let _ = writeln!(
        out,
        "live base rate {:.3}% (the generator's mean fraud probability); each model's training base rate is \
         corrected to it",
        100.0 * data.live_base_rate
    );
    for (model, run) in models.iter().zip(runs) {
        let s = model.summary();
        let body = match s.kind {
            BodyKind::Ensemble => format!("tree ensemble, {} trees", s.trees),
            BodyKind::Linear => format!("linear, {} terms", s.terms),
        };
        let _ = writeln!(
            out,
            "\n{} {} ({body}), trained at base rate {:.4}",
            model.name(),
            model.version(),
            model.base_rate()
        );
        let _ = writeln!(
            out,
            "  scored {n} rows in {:.3} s ({:.0} rows/s, CSV parsing included)",
            run.seconds,
            n as f64 / run.seconds.max(1e-9)
        );
        out += &histogram(&run.probabilities);
        let mean = run.probabilities.iter().sum::<f64>() / n as f64;
        let _ = writeln!(
            out,
            "  mean predicted {:.3}%, observed {:.3}%",
            100.0 * mean,
            100.0 * data.observed_rate()
        );
        out += &metrics_line(&run.log_odds, &run.probabilities, &data.labels);
    }
    let true_log_odds: Vec<f64> = data
        .transactions
        .iter()
        .map(super::demo_data::true_log_odds)
        .collect();
    let true_p: Vec<f64> = data.transactions.iter().map(|t| t.probability).collect();
    let _ = writeln!(
        out,
        "\nthe generating model itself (the best any model can expect on this data):"
    );
    out += &metrics_line(&true_log_odds, &true_p, &data.labels);
    out
}

/// `log-loss ... Brier ... AUC ...`, or the reason a figure cannot be computed.
fn metrics_line(log_odds: &[f64], probabilities: &[f64], labels: &[bool]) -> String {
    let show = |r: Result<f64, MetricsError>| match r {
        Ok(v) => format!("{v:.5}"),
        Err(e) => format!("n/a ({e})"),
    };
    format!(
        "  log-loss {}, Brier score {}, AUC {}\n",
        show(log_loss_from_log_odds(log_odds, labels)),
        show(brier_score(probabilities, labels)),
        show(roc_auc(probabilities, labels)),
    )
}

/// A text histogram of probabilities over [`HISTOGRAM_EDGES`].
fn histogram(probabilities: &[f64]) -> String {
    let mut counts = [0usize; HISTOGRAM_LABELS.len()];
    for &p in probabilities {
        let bin = HISTOGRAM_EDGES.partition_point(|&e| e <= p);
        counts[bin] += 1;
    }
    let max = counts.iter().copied().max().unwrap_or(0).max(1);
    let mut out = String::from("  probability        rows\n");
    for (label, count) in HISTOGRAM_LABELS.iter().zip(counts) {
        // Round up so that a non-empty bin always shows at least one mark.
        let bar = "#".repeat((count * HISTOGRAM_WIDTH).div_ceil(max));
        let line = format!("  {label:<12} {count:>10}  {bar}");
        let _ = writeln!(out, "{}", line.trim_end());
    }
    out
}

/// Writes id, label and each model's score columns, prefixed with the model's name.
fn write_scored(
    path: &std::path::Path,
    data: &DemoData,
    models: &[Model],
    runs: &[DemoRun],
) -> anyhow::Result<()> {
    let mut w = csv::Writer::from_path(path)?;
    let mut header = StringRecord::from(vec!["id", "label"]);
    for (model, run) in models.iter().zip(runs) {
        for col in super::score::score_columns(model, &run.spec) {
            header.push_field(&format!("{}.{col}", model.name()));
        }
    }
    w.write_record(&header)?;
    for (i, t) in data.transactions.iter().enumerate() {
        let mut record = StringRecord::from(vec![t.id(), u8::from(t.fraud).to_string()]);
        for run in runs {
            if let Some(fields) = run.fields.get(i) {
                record.extend(fields.iter());
            }
        }
        w.write_record(&record)?;
    }
    w.flush()?;
    Ok(())
}
