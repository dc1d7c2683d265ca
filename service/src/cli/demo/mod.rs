//! `probity demo`: the Harbourline Card Services scenario end to end. It generates invented card transactions with
//! known fraud labels and scores them with the demo models (a tree ensemble and a points scorecard, both embedded in
//! the binary), each model's training base rate corrected to the live one, then shows what a fraud analyst would
//! look at: the probability distribution, calibration in the large, and log-loss, Brier score and AUC.
//!
//! By default the demo is live ([`live`]): it starts the real gRPC server on loopback with its prediction store on and
//! the scorecard a silent challenger of the tree model, drives the transactions through a gRPC client
//! ([`traffic`]), reports requests, failures, throughput and latency beside the model figures, sends the fraud
//! labels back as delayed outcomes ([`outcomes`]), prints the server's report and the champion-challenger
//! comparison and writes their pictures ([`loop_report`]), and keeps serving until interrupted. `--offline` ([`offline`]) scores in process instead. Both print through
//! [`summary`], and both give the same bits for every row.

mod live;
mod loop_report;
mod offline;
mod outcomes;
mod summary;
mod traffic;

use std::path::PathBuf;

use anyhow::Context;
use csv::StringRecord;
use probity_models::{Model, OutputSpec};

use super::demo_data::{write_transactions, Generator, Transaction};

/// The demo models shipped in the binary: (file name, route name, JSON text).
const EMBEDDED_MODELS: [(&str, &str, &str); 2] = [
    (
        "harbourline-fraud-trees.json",
        "card-fraud",
        include_str!("../../../demo/harbourline-fraud-trees.json"),
    ),
    (
        "harbourline-fraud-scorecard.json",
        "card-fraud-scorecard",
        include_str!("../../../demo/harbourline-fraud-scorecard.json"),
    ),
];

/// The demo's seed. It must differ from the seed of the demo models' training data
/// ([`super::demo_data::DEFAULT_SEED`]): the generator is a stream, so the same seed would replay the first
/// training rows and flatter the models.
pub const DEMO_SEED: u64 = 20_251_103;

pub use super::CAUTIONS;

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
    /// Score with this model file instead of the embedded demo models (repeat for several); live, each is served
    /// on a route named after the model.
    #[arg(long = "model", value_name = "FILE")]
    pub models: Vec<PathBuf>,
    /// Score in process, without the server.
    #[arg(long)]
    pub offline: bool,
    /// gRPC listen address of the demo server: a loopback address, as the demo serves plain text (port 0 picks
    /// a free port).
    #[arg(
        long,
        value_name = "HOST:PORT",
        default_value = "127.0.0.1:0",
        conflicts_with = "offline"
    )]
    pub grpc_listen: String,
    /// Monitoring HTTP listen address (/metrics, /livez, /readyz) of the demo server.
    #[arg(
        long,
        value_name = "HOST:PORT",
        default_value = "127.0.0.1:0",
        conflicts_with = "offline"
    )]
    pub metrics_listen: String,
    /// Stop the server after the traffic run instead of serving until Ctrl-C or SIGTERM.
    #[arg(long, conflicts_with = "offline")]
    pub exit_after_run: bool,
    /// gRPC connections the demo client opens.
    #[arg(long, default_value_t = 4, value_parser = clap::value_parser!(u16).range(1..=64), conflicts_with = "offline")]
    pub connections: u16,
    /// Calls in flight on each connection.
    #[arg(long, default_value_t = 2, value_parser = clap::value_parser!(u16).range(1..=64), conflicts_with = "offline")]
    pub calls_per_connection: u16,
    /// Rows in each ScoreBatch call (one row in five goes by unary Score instead).
    #[arg(long, default_value_t = 100, value_parser = clap::value_parser!(u16).range(1..=1000), conflicts_with = "offline")]
    pub batch_rows: u16,
    /// Keep the demo's prediction store (predictions.db) in this directory instead of the temporary one removed at
    /// exit.
    #[arg(long, value_name = "DIR", conflicts_with = "offline")]
    pub data_dir: Option<PathBuf>,
    /// Write the report's and the comparison's SVG pictures into this directory.
    #[arg(
        long,
        value_name = "DIR",
        default_value = "probity-demo-report",
        conflicts_with = "offline"
    )]
    pub svg_dir: PathBuf,
}

/// Runs `probity demo`.
pub fn run(args: &DemoArgs) -> anyhow::Result<()> {
    let models = demo_models(args)?;
    let data = DemoData::generate(args.rows, args.seed)?;
    if args.offline {
        offline::run(args, &data, &models)
    } else {
        live::run(args, &data, models)
    }
}

/// One model of the demo, with the route that serves it live and the file text the server loads.
pub struct DemoModel {
    /// The loaded model.
    pub model: Model,
    /// The route name.
    pub route: String,
    /// The model file's bytes.
    pub bytes: Vec<u8>,
}

/// The embedded models (routes `card-fraud` and `card-fraud-scorecard`), or the `--model` files (each on a route
/// named after its model).
fn demo_models(args: &DemoArgs) -> anyhow::Result<Vec<DemoModel>> {
    let models = if args.models.is_empty() {
        EMBEDDED_MODELS
            .iter()
            .map(|(name, route, text)| {
                let model = Model::from_json_str(text)
                    .with_context(|| format!("embedded demo model {name}"))?;
                Ok(DemoModel {
                    model,
                    route: (*route).to_string(),
                    bytes: text.as_bytes().to_vec(),
                })
            })
            .collect::<anyhow::Result<Vec<_>>>()?
    } else {
        args.models
            .iter()
            .map(|path| {
                let bytes = std::fs::read(path)
                    .with_context(|| format!("cannot read {}", path.display()))?;
                let model = Model::from_json_slice(&bytes)
                    .with_context(|| format!("{} is not a valid model file", path.display()))?;
                Ok(DemoModel {
                    route: model.name().to_string(),
                    model,
                    bytes,
                })
            })
            .collect::<anyhow::Result<Vec<_>>>()?
    };
    for (i, m) in models.iter().enumerate() {
        if let Some(other) = models[..i]
            .iter()
            .find(|o| o.model.name() == m.model.name())
        {
            anyhow::bail!(
                "two --model files declare the model name `{}` (version {} and {}); the demo serves each name once",
                m.model.name(),
                other.model.version(),
                m.model.version()
            );
        }
    }
    Ok(models)
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

    /// The output spec every demo model scores with: the live base rate as target, no decision rule.
    pub fn spec(&self) -> OutputSpec {
        OutputSpec {
            target_base_rate: Some(self.live_base_rate),
            decision: None,
        }
    }
}

/// One model's results on the demo data.
pub struct DemoRun {
    /// The spec used: the live base rate as target.
    pub spec: OutputSpec,
    /// Scored rows, as output CSV fields (see [`super::score::push_scores`]).
    pub fields: Vec<StringRecord>,
    /// Final probabilities, in file order.
    pub probabilities: Vec<f64>,
    /// Base-rate-corrected log-odds, in file order.
    pub log_odds: Vec<f64>,
    /// Wall time of in-process scoring, CSV parsing included; `None` when the rows were scored by the server.
    pub seconds: Option<f64>,
}
