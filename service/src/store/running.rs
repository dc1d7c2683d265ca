//! Running figures of the prediction store, exported through the `metrics` facade with route, model and version
//! labels, as sums and counts that a monitoring system can divide over any window and add across replicas.
//!
//! Every settled (prediction, label) pair adds its terms once, with `entry="add"`. A correction does not subtract
//! (counters only grow): it records the replaced pair's terms again with `entry="retract"`, so the current value of
//! any figure over any window is `add - retract`, e.g. the running log-loss is
//! `(sum(probity_outcome_log_loss_sum{entry="add"}) - sum(...{entry="retract"})) /
//!  (sum(probity_outcome_log_loss_count{entry="add"}) - sum(...{entry="retract"}))`.
//!
//! Log-loss terms are `softplus(-s h)` from the final log-odds `h` ([`log_loss_term_pm1`], with the source in its
//! doc comment); Brier terms `(p - y)^2` (Brier 1950). The calibration bins are the ten equal-width bins of the
//! report's calibration table, labelled by their upper edge.
//!
//! Two gauges are computed on the writer thread over windows of recent predictions: the PSI of the recent score
//! distribution against the model file's reference distribution ([`psi_from_fractions`], floor 1e-4 on empty
//! bins), and the Saerens-Latinne-Decaestecker EM estimate of the live base rate ([`estimate_prior`]), a
//! monitoring signal that never changes a served probability.

use std::collections::{BTreeMap, HashMap, VecDeque};
use std::sync::{Arc, Mutex};

use metrics_exporter_prometheus::{BuildError, Matcher, PrometheusBuilder};
use probity_models::fit::{estimate_prior, EmOptions};
use probity_models::link::{logit, sigmoid};
use probity_models::metrics::quantile::{linspace_unit, right_closed_bin};
use probity_models::metrics::{log_loss_term_pm1, psi_from_fractions, EmptyBinRule};

use super::{OutcomeStatus, Reference, Settled};

/// Settled pairs (with `entry`).
pub const MATCHED: &str = "probity_outcomes_matched_total";
/// Settled positives (with `entry`).
pub const POSITIVES: &str = "probity_outcome_positives_total";
/// Per-pair log-loss; its `_sum` and `_count` are the running sums.
pub const LOG_LOSS: &str = "probity_outcome_log_loss";
/// Per-pair Brier term `(p - y)^2`.
pub const BRIER: &str = "probity_outcome_brier";
/// Predicted probability per calibration bin (label `bin`, the upper edge): `_sum` and `_count` per bin.
pub const CALIBRATION_PREDICTED: &str = "probity_outcome_calibration_probability";
/// Positives per calibration bin.
pub const CALIBRATION_POSITIVES: &str = "probity_outcome_calibration_positives_total";
/// Probability by outcome class (label `class`).
pub const CLASS_PROBABILITY: &str = "probity_outcome_probability";
/// Outcome time minus prediction time, seconds.
pub const DELAY: &str = "probity_outcome_delay_seconds";
/// Outcomes received, by status.
pub const RECEIVED: &str = "probity_outcomes_received_total";
/// Outcomes whose prediction never came within the hold period.
pub const UNMATCHED: &str = "probity_outcomes_unmatched_total";
/// Predictions settled as negatives at maturity, by route.
pub const MATURED: &str = "probity_outcomes_matured_total";
/// Predictions written to the log, by route.
pub const WRITTEN: &str = "probity_store_predictions_written_total";
/// Predictions not written, by route and reason (`queue_full`, `closed`, `disk_full`, `read_only`, `write_error`,
/// `duplicate_id`).
pub const DROPPED: &str = "probity_store_predictions_dropped_total";
/// Calls of routes with `record = "before-answer"` refused because their predictions were not committed, by route
/// and reason (`queue_full`, `closed`, `disk_full`, `read_only`, `write_error`, `deadline`).
pub const RECORD_REFUSALS: &str = "probity_store_record_refusals_total";
/// Predictions waiting in the queue.
pub const QUEUE_DEPTH: &str = "probity_store_queue_depth";
/// Predictions removed by the retention sweep.
pub const REMOVED: &str = "probity_store_predictions_removed_total";
/// PSI of the recent window against the reference distribution.
pub const PSI: &str = "probity_psi";
/// The Saerens EM estimate of the live base rate over the recent window.
pub const BASE_RATE_ESTIMATE: &str = "probity_base_rate_estimate";

/// Upper edges of the ten calibration bins, as labels.
const BIN_LABELS: [&str; 10] = [
    "0.1", "0.2", "0.3", "0.4", "0.5", "0.6", "0.7", "0.8", "0.9", "1.0",
];
/// Log-loss buckets (nats).
const LOSS_BUCKETS: [f64; 9] = [0.01, 0.05, 0.1, 0.2, 0.5, 0.693, 1.0, 2.0, 5.0];
/// Brier-term buckets.
const BRIER_BUCKETS: [f64; 7] = [0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 1.0];
/// Class-conditional probability buckets: the calibration bins.
const CLASS_BUCKETS: [f64; 10] = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0];
/// Delay buckets: a minute to a quarter.
const DELAY_BUCKETS: [f64; 9] = [
    60.0,
    3_600.0,
    21_600.0,
    86_400.0,
    259_200.0,
    604_800.0,
    1_209_600.0,
    2_592_000.0,
    7_776_000.0,
];

/// Adds this module's histogram buckets to the exporter's builder.
pub fn buckets(builder: PrometheusBuilder) -> Result<PrometheusBuilder, BuildError> {
    builder
        .set_buckets_for_metric(Matcher::Full(LOG_LOSS.into()), &LOSS_BUCKETS)?
        .set_buckets_for_metric(Matcher::Full(BRIER.into()), &BRIER_BUCKETS)?
        .set_buckets_for_metric(Matcher::Full(CALIBRATION_PREDICTED.into()), &[1.0])?
        .set_buckets_for_metric(Matcher::Full(CLASS_PROBABILITY.into()), &CLASS_BUCKETS)?
        .set_buckets_for_metric(Matcher::Full(DELAY.into()), &DELAY_BUCKETS)
}

/// The calibration bin of `p` among ten equal-width bins closed on the right, as `calibration_curve` cuts them.
pub fn calibration_bin(p: f64) -> usize {
    // (e_k, e_{k+1}], the first bin also taking 0, with the same linspace edges as the report's table.
    let inner: [f64; 9] = std::array::from_fn(|i| linspace_unit(i + 1, 10));
    right_closed_bin(&inner, p)
}

fn series(s: &Settled, entry: &'static str) -> Vec<(&'static str, String)> {
    vec![
        ("route", s.route.clone()),
        ("model", s.model.clone()),
        ("version", s.version.clone()),
        ("entry", entry.to_string()),
    ]
}

fn pair(s: &Settled, label: bool, entry: &'static str) {
    let labels = series(s, entry);
    let y = f64::from(u8::from(label));
    metrics::counter!(MATCHED, &labels).increment(1);
    if label {
        metrics::counter!(POSITIVES, &labels).increment(1);
    }
    metrics::histogram!(LOG_LOSS, &labels).record(log_loss_term_pm1(s.adjusted_log_odds, label));
    metrics::histogram!(BRIER, &labels).record((s.probability - y).powi(2));
    let mut binned = labels.clone();
    binned.push((
        "bin",
        BIN_LABELS[calibration_bin(s.probability)].to_string(),
    ));
    metrics::histogram!(CALIBRATION_PREDICTED, &binned).record(s.probability);
    if label {
        metrics::counter!(CALIBRATION_POSITIVES, &binned).increment(1);
    }
    let mut classed = labels;
    classed.push((
        "class",
        if label { "positive" } else { "negative" }.to_string(),
    ));
    metrics::histogram!(CLASS_PROBABILITY, &classed).record(s.probability);
}

/// Records settled pairs (after their transaction committed).
pub fn settled(pairs: &[Settled]) {
    for s in pairs {
        if let Some(old) = s.previous {
            pair(s, old, "retract");
        } else {
            let labels = [
                ("route", s.route.clone()),
                ("model", s.model.clone()),
                ("version", s.version.clone()),
            ];
            metrics::histogram!(DELAY, &labels).record(s.delay_seconds);
        }
        pair(s, s.label, "add");
    }
}

/// Records one outcome's status.
pub fn received(status: OutcomeStatus) {
    metrics::counter!(RECEIVED, "status" => status.as_str()).increment(1);
}

/// Records predictions not written.
pub fn dropped(route: &str, reason: &'static str, n: u64) {
    metrics::counter!(DROPPED, "route" => route.to_string(), "reason" => reason).increment(n);
}

/// Records predictions written.
pub fn written(route: &str, n: u64) {
    metrics::counter!(WRITTEN, "route" => route.to_string()).increment(n);
}

/// Records a call refused for want of its record.
pub fn record_refused(route: &str, reason: &'static str) {
    metrics::counter!(RECORD_REFUSALS, "route" => route.to_string(), "reason" => reason)
        .increment(1);
}

/// Sets the queue depth gauge.
pub fn queue_depth(n: usize) {
    metrics::gauge!(QUEUE_DEPTH).set(n as f64);
}

/// Records sweep results.
pub fn swept(matured: &[Settled], unmatched: u64, removed: u64) {
    for s in matured {
        metrics::counter!(MATURED, "route" => s.route.clone()).increment(1);
    }
    metrics::counter!(UNMATCHED).increment(unmatched);
    metrics::counter!(REMOVED).increment(removed);
}

/// Describes the families for the exposition.
pub fn describe() {
    metrics::describe_counter!(
        MATCHED,
        "Settled (prediction, outcome) pairs; entry=retract for replaced labels."
    );
    metrics::describe_counter!(POSITIVES, "Settled pairs whose label is positive.");
    metrics::describe_histogram!(
        LOG_LOSS,
        "Per-pair log-loss (nats) from the final log-odds."
    );
    metrics::describe_histogram!(BRIER, "Per-pair Brier term (p - y)^2.");
    metrics::describe_histogram!(
        CALIBRATION_PREDICTED,
        "Predicted probability per calibration bin (upper edge)."
    );
    metrics::describe_counter!(
        CALIBRATION_POSITIVES,
        "Positives per calibration bin (upper edge)."
    );
    metrics::describe_histogram!(CLASS_PROBABILITY, "Returned probability by outcome class.");
    metrics::describe_histogram!(
        DELAY,
        metrics::Unit::Seconds,
        "Outcome time minus prediction time."
    );
    metrics::describe_counter!(RECEIVED, "Outcomes received, by status.");
    metrics::describe_counter!(
        UNMATCHED,
        "Outcomes whose prediction did not arrive within the hold period."
    );
    metrics::describe_counter!(
        MATURED,
        "Predictions settled as negatives at label maturity."
    );
    metrics::describe_counter!(WRITTEN, "Predictions written to the prediction store.");
    metrics::describe_counter!(
        DROPPED,
        "Predictions not written to the prediction store, by reason."
    );
    metrics::describe_counter!(
        RECORD_REFUSALS,
        "Calls of record = before-answer routes refused because their predictions were not committed, by reason."
    );
    metrics::describe_gauge!(
        QUEUE_DEPTH,
        "Predictions waiting for the prediction store's writer."
    );
    metrics::describe_counter!(REMOVED, "Predictions removed by the retention sweep.");
    metrics::describe_gauge!(
        PSI,
        "PSI of the recent window against the model's reference distribution."
    );
    metrics::describe_gauge!(
        BASE_RATE_ESTIMATE,
        "Saerens EM estimate of the live base rate over the recent window."
    );
}

/// A window of recent predictions of one route, model and version.
#[derive(Debug)]
struct Window {
    reference: Option<Reference>,
    /// Bins (for PSI) of the last `psi_window` predictions.
    bins: VecDeque<usize>,
    counts: Vec<u64>,
    /// Probabilities of the last `prior_window` predictions, and the base rate they are calibrated to.
    probabilities: VecDeque<f64>,
    prior: f64,
    dirty: bool,
}

/// The latest base-rate estimate per (route, model, version): (estimate, predictions in its window); the version
/// `""` holds the estimate of whichever version of the model published last (for routes that name the model
/// without a version). Shared with the server, which applies it to the routes that opt in (`serve::base_rate`).
pub type LatestEstimates = Arc<Mutex<BTreeMap<(String, String, String), (f64, usize)>>>;

/// The windows behind the PSI and base-rate gauges.
#[derive(Debug, Default)]
pub struct Windows {
    psi_window: usize,
    prior_window: usize,
    series: HashMap<(String, String, String), Window>,
    latest: LatestEstimates,
}

impl Windows {
    /// Empty windows of the given lengths.
    pub fn new(psi_window: usize, prior_window: usize) -> Windows {
        Windows {
            psi_window,
            prior_window,
            series: HashMap::new(),
            latest: LatestEstimates::default(),
        }
    }

    /// The shared latest estimates, filled by [`Windows::publish`].
    pub fn latest(&self) -> LatestEstimates {
        Arc::clone(&self.latest)
    }

    /// Adds one prediction. `reference` is read the first time the series is seen; `prior` is the base rate this
    /// prediction was served under. The window keeps every probability under the series' first prior (shifting the
    /// log-odds by `logit(first) - logit(prior)`, Saerens et al. 2002 eq. 2.4 on the log-odds scale), so a target
    /// that changes while the window fills (a route applying the estimate) does not mix priors in the EM.
    pub fn add(
        &mut self,
        key: (&str, &str, &str),
        probability: f64,
        adjusted_log_odds: f64,
        reference: impl FnOnce() -> Option<Reference>,
        prior: f64,
    ) {
        let k = (key.0.to_string(), key.1.to_string(), key.2.to_string());
        let w = self.series.entry(k).or_insert_with(|| {
            let reference = reference();
            let bins = reference.as_ref().map_or(0, |r| r.fractions.len());
            Window {
                reference,
                bins: VecDeque::new(),
                counts: vec![0; bins],
                probabilities: VecDeque::new(),
                prior,
                dirty: false,
            }
        });
        w.dirty = true;
        if let Some(r) = &w.reference {
            let bin = r.bin_of(r.value_of(probability, adjusted_log_odds));
            if let Some(c) = w.counts.get_mut(bin) {
                *c += 1;
                w.bins.push_back(bin);
            }
            if w.bins.len() > self.psi_window {
                if let Some(old) = w.bins.pop_front() {
                    w.counts[old] -= 1;
                }
            }
        }
        w.probabilities.push_back(if prior == w.prior {
            probability
        } else {
            sigmoid(adjusted_log_odds + logit(w.prior) - logit(prior))
        });
        if w.probabilities.len() > self.prior_window {
            w.probabilities.pop_front();
        }
    }

    /// Recomputes the gauges of the series that changed.
    pub fn publish(&mut self) {
        for ((route, model, version), w) in &mut self.series {
            if !w.dirty {
                continue;
            }
            w.dirty = false;
            let labels = [
                ("route", route.clone()),
                ("model", model.clone()),
                ("version", version.clone()),
            ];
            if let Some(r) = &w.reference {
                if let Ok(psi) =
                    psi_from_fractions(&r.fractions, &w.counts, EmptyBinRule::Floor(1e-4))
                {
                    metrics::gauge!(PSI, &labels).set(psi);
                }
            }
            let (p, _) = w.probabilities.as_slices();
            let sample: Vec<f64> = if w.probabilities.as_slices().1.is_empty() {
                p.to_vec()
            } else {
                w.probabilities.iter().copied().collect()
            };
            if let Ok(estimate) = estimate_prior(&sample, w.prior, EmOptions::default()) {
                metrics::gauge!(BASE_RATE_ESTIMATE, &labels).set(estimate.prior);
                let mut latest = self
                    .latest
                    .lock()
                    .unwrap_or_else(std::sync::PoisonError::into_inner);
                for v in [version.clone(), String::new()] {
                    latest.insert(
                        (route.clone(), model.clone(), v),
                        (estimate.prior, sample.len()),
                    );
                }
            }
        }
    }
}
