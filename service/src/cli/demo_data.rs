//! The demo scenario's data: card transactions at Harbourline Card Services, a fictional card issuer, with a fraud
//! label drawn from a known ("true") logistic model. Everything here is invented, for the demo only.
//!
//! Each row is drawn from a seeded ChaCha8 generator in a fixed order, so a seed gives the same file, byte for
//! byte, on every machine (with the locked versions of `rand`, `rand_chacha` and `rand_distr`).
//!
//! # The generating model
//!
//! Inputs, drawn independently per row except where noted:
//!
//! | column | distribution |
//! |---|---|
//! | `amount` | log-normal, `ln amount ~ N(3.6, 1.1)`, rounded to cents, at least 0.01 |
//! | `hour` | 0 to 23 with a day-time-heavy profile ([`HOUR_WEIGHTS`]) |
//! | `merchant_group` | grocery 32%, online_retail 24%, fuel 16%, gaming 12%, electronics 9%, travel 7% |
//! | `channel` | depends on the merchant group ([`channel_weights`]): mostly online for online retail and gaming |
//! | `card_age_days` | exponential with mean 700, whole days; empty (missing) for 4% of rows |
//! | `txn_count_24h` | Poisson with mean 2 |
//! | `distance_km` | log-normal, `ln km ~ N(2.0, 1.3)`, one decimal; empty (missing) for 10% of rows |
//! | `foreign` | 1 with probability 7% |
//!
//! The fraud label is Bernoulli with probability `sigmoid(eta)`, where `eta` (see [`true_log_odds`]) is
//!
//! ```text
//! eta = -7.05
//!     + 0.45 * (ln amount - 3.6)
//!     + 1.1   if 0 <= hour <= 5 (night)
//!     + merchant: grocery -0.5, fuel -0.1, online_retail 0.3, travel 0.7, electronics 1.0, gaming 0.9
//!     + channel: chip 0, contactless -0.3, online 0.8, phone 1.0
//!     + 1.3   if foreign
//!     + 0.3 * min(txn_count_24h, 10)
//!     + 0.35 * ln(1 + distance_km), or 0.4 when the distance is missing
//!     + 1.5 * exp(-card_age_days / 45), or 0.6 when the card age is missing
//!     + 0.9   if night and foreign                                  (interaction)
//!     + 1.0   if the channel is online or phone and the card is under 30 days old (interaction)
//!     + 1.0   if electronics and amount > 400                        (interaction)
//! ```
//!
//! The intercept puts the mean fraud probability near 1.5%. The threshold-shaped interactions are there so that a
//! tree ensemble has something to find that an additive scorecard cannot express.

use std::io::Write;
use std::path::PathBuf;

use anyhow::Context;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Exp, LogNormal, Poisson};

/// Arguments of `probity generate-demo-data`.
#[derive(Debug, clap::Args)]
pub struct GenerateArgs {
    /// Number of transactions to write.
    #[arg(long, default_value_t = 100_000)]
    pub rows: u64,
    /// Seed of the random generator; the same seed always gives the same file.
    #[arg(long, default_value_t = DEFAULT_SEED)]
    pub seed: u64,
    /// Where to write the CSV file.
    #[arg(long)]
    pub output: PathBuf,
    /// Add a column with each row's true fraud probability (known only because the data is invented).
    #[arg(long)]
    pub with_true_probability: bool,
}

/// The default seed; the demo models in `service/demo/` were trained on data drawn from it.
pub const DEFAULT_SEED: u64 = 20_240_917;

/// Runs `probity generate-demo-data`.
pub fn run(args: &GenerateArgs) -> anyhow::Result<()> {
    let file = std::fs::File::create(&args.output)
        .with_context(|| format!("cannot create {}", args.output.display()))?;
    let frauds = write_csv(
        std::io::BufWriter::new(file),
        args.rows,
        args.seed,
        args.with_true_probability,
    )
    .with_context(|| format!("cannot write {}", args.output.display()))?;
    eprintln!(
        "wrote {} transactions ({} labelled fraud) to {}",
        args.rows,
        frauds,
        args.output.display()
    );
    Ok(())
}

/// Merchant groups, in the order of their shares in [`MERCHANT_WEIGHTS`].
pub const MERCHANT_GROUPS: [&str; 6] = [
    "grocery",
    "online_retail",
    "fuel",
    "gaming",
    "electronics",
    "travel",
];
/// Shares of the merchant groups.
const MERCHANT_WEIGHTS: [f64; 6] = [0.32, 0.24, 0.16, 0.12, 0.09, 0.07];
/// Payment channels.
pub const CHANNELS: [&str; 4] = ["chip", "contactless", "online", "phone"];
/// Relative frequency of each hour of the day, midnight first.
pub const HOUR_WEIGHTS: [f64; 24] = [
    2.0, 1.0, 1.0, 1.0, 1.0, 2.0, 4.0, 6.0, 8.0, 9.0, 10.0, 10.0, 11.0, 10.0, 10.0, 10.0, 10.0,
    11.0, 11.0, 10.0, 8.0, 6.0, 4.0, 3.0,
];
/// The CSV header written by [`write_csv`] (without the optional probability column).
pub const COLUMNS: [&str; 10] = [
    "id",
    "amount",
    "hour",
    "merchant_group",
    "channel",
    "card_age_days",
    "txn_count_24h",
    "distance_km",
    "foreign",
    "label",
];
/// Name of the optional column holding each row's true fraud probability.
pub const PROBABILITY_COLUMN: &str = "true_probability";

/// Channel shares given the merchant group (index into [`MERCHANT_GROUPS`]), in the order of [`CHANNELS`].
pub fn channel_weights(merchant: usize) -> [f64; 4] {
    match MERCHANT_GROUPS.get(merchant).copied() {
        Some("online_retail") | Some("gaming") => [0.05, 0.05, 0.85, 0.05],
        Some("travel") => [0.20, 0.15, 0.50, 0.15],
        _ => [0.45, 0.50, 0.03, 0.02],
    }
}

/// One generated transaction.
#[derive(Debug, Clone, PartialEq)]
pub struct Transaction {
    /// Sequence number from 1; written as `txn-000001`.
    pub number: u64,
    /// Amount in the card's currency, rounded to cents.
    pub amount: f64,
    /// Hour of the day, 0 to 23.
    pub hour: u32,
    /// Index into [`MERCHANT_GROUPS`].
    pub merchant: usize,
    /// Index into [`CHANNELS`].
    pub channel: usize,
    /// Days since the card was issued; `None` when not on file.
    pub card_age_days: Option<u32>,
    /// Transactions on the same card in the last 24 hours.
    pub txn_count_24h: u32,
    /// Distance from the cardholder's home, one decimal; `None` when unknown.
    pub distance_km: Option<f64>,
    /// Whether the merchant is abroad.
    pub foreign: bool,
    /// The true fraud probability, `sigmoid(true_log_odds(self))`.
    pub probability: f64,
    /// The drawn label: true for fraud.
    pub fraud: bool,
}

impl Transaction {
    /// The id written to the file.
    pub fn id(&self) -> String {
        format!("txn-{:06}", self.number)
    }
}

/// The true log-odds of fraud for the feature values of `t` (its `probability` and `fraud` are ignored); the
/// formula is in the module documentation.
pub fn true_log_odds(t: &Transaction) -> f64 {
    let night = t.hour <= 5;
    let merchant = match MERCHANT_GROUPS.get(t.merchant).copied() {
        Some("grocery") => -0.5,
        Some("fuel") => -0.1,
        Some("online_retail") => 0.3,
        Some("travel") => 0.7,
        Some("electronics") => 1.0,
        Some("gaming") => 0.9,
        _ => 0.0,
    };
    let remote = matches!(
        CHANNELS.get(t.channel).copied(),
        Some("online") | Some("phone")
    );
    let channel = match CHANNELS.get(t.channel).copied() {
        Some("contactless") => -0.3,
        Some("online") => 0.8,
        Some("phone") => 1.0,
        _ => 0.0,
    };
    let mut eta = -7.05 + 0.45 * (t.amount.ln() - 3.6) + merchant + channel;
    if night {
        eta += 1.1;
    }
    if t.foreign {
        eta += 1.3;
    }
    eta += 0.3 * f64::from(t.txn_count_24h.min(10));
    eta += match t.distance_km {
        Some(km) => 0.35 * km.ln_1p(),
        None => 0.4,
    };
    eta += match t.card_age_days {
        Some(days) => 1.5 * (-f64::from(days) / 45.0).exp(),
        None => 0.6,
    };
    if night && t.foreign {
        eta += 0.9;
    }
    if remote && t.card_age_days.is_some_and(|d| d < 30) {
        eta += 1.0;
    }
    if MERCHANT_GROUPS.get(t.merchant) == Some(&"electronics") && t.amount > 400.0 {
        eta += 1.0;
    }
    eta
}

/// A seeded, endless source of transactions.
pub struct Generator {
    rng: ChaCha8Rng,
    number: u64,
    amount: LogNormal<f64>,
    distance: LogNormal<f64>,
    card_age: Exp<f64>,
    count: Poisson<f64>,
}

impl Generator {
    /// A generator for `seed`.
    pub fn new(seed: u64) -> anyhow::Result<Self> {
        Ok(Self {
            rng: ChaCha8Rng::seed_from_u64(seed),
            number: 0,
            amount: LogNormal::new(3.6, 1.1).context("amount distribution")?,
            distance: LogNormal::new(2.0, 1.3).context("distance distribution")?,
            card_age: Exp::new(1.0 / 700.0).context("card age distribution")?,
            count: Poisson::new(2.0).context("transaction count distribution")?,
        })
    }

    /// Picks an index with probability proportional to `weights`.
    fn pick(&mut self, weights: &[f64]) -> usize {
        let total: f64 = weights.iter().sum();
        let mut u = self.rng.random::<f64>() * total;
        for (i, w) in weights.iter().enumerate() {
            if u < *w {
                return i;
            }
            u -= w;
        }
        weights.len().saturating_sub(1)
    }
}

impl Iterator for Generator {
    type Item = Transaction;

    fn next(&mut self) -> Option<Transaction> {
        self.number += 1;
        // The draw order below is part of the file format of a seed: change it and every seed's data changes.
        let amount = ((self.amount.sample(&mut self.rng) * 100.0).round() / 100.0).max(0.01);
        let hour = self.pick(&HOUR_WEIGHTS) as u32;
        let merchant = self.pick(&MERCHANT_WEIGHTS);
        let channel = self.pick(&channel_weights(merchant));
        let age = self.card_age.sample(&mut self.rng).floor() as u32;
        let card_age_days = (!self.rng.random_bool(0.04)).then_some(age);
        let txn_count_24h = self.count.sample(&mut self.rng) as u32;
        let km = (self.distance.sample(&mut self.rng) * 10.0).round() / 10.0;
        let distance_km = (!self.rng.random_bool(0.10)).then_some(km);
        let foreign = self.rng.random_bool(0.07);
        let mut t = Transaction {
            number: self.number,
            amount,
            hour,
            merchant,
            channel,
            card_age_days,
            txn_count_24h,
            distance_km,
            foreign,
            probability: 0.0,
            fraud: false,
        };
        t.probability = probity_models::link::sigmoid(true_log_odds(&t));
        t.fraud = self.rng.random::<f64>() < t.probability;
        Some(t)
    }
}

/// Writes `rows` transactions from `seed` as CSV with the header [`COLUMNS`] (plus [`PROBABILITY_COLUMN`] when
/// `with_probability`); missing values are empty cells. Returns the number of frauds written.
pub fn write_csv<W: Write>(
    out: W,
    rows: u64,
    seed: u64,
    with_probability: bool,
) -> anyhow::Result<u64> {
    let rows = usize::try_from(rows).context("row count too large")?;
    write_transactions(out, Generator::new(seed)?.take(rows), with_probability)
}

/// Writes `transactions` as CSV, as [`write_csv`] does; returns the number of frauds written.
pub fn write_transactions<W: Write>(
    out: W,
    transactions: impl Iterator<Item = Transaction>,
    with_probability: bool,
) -> anyhow::Result<u64> {
    let mut w = csv::Writer::from_writer(out);
    let mut header: Vec<&str> = COLUMNS.to_vec();
    if with_probability {
        header.push(PROBABILITY_COLUMN);
    }
    w.write_record(&header)?;
    let mut frauds = 0;
    for t in transactions {
        frauds += u64::from(t.fraud);
        let mut record = vec![
            t.id(),
            format!("{:.2}", t.amount),
            t.hour.to_string(),
            MERCHANT_GROUPS[t.merchant].to_string(),
            CHANNELS[t.channel].to_string(),
            t.card_age_days.map(|d| d.to_string()).unwrap_or_default(),
            t.txn_count_24h.to_string(),
            t.distance_km.map(|d| format!("{d:.1}")).unwrap_or_default(),
            u8::from(t.foreign).to_string(),
            u8::from(t.fraud).to_string(),
        ];
        if with_probability {
            record.push(t.probability.to_string());
        }
        w.write_record(&record)?;
    }
    w.flush()?;
    Ok(frauds)
}
