//! Per-feature stability on a live route: every scored row's feature values counted into the slots of the model
//! file's training distributions (`features[i].training_distribution`), exported as counters that add across
//! replicas, with the training shares beside them as gauges. The fleet's PSI, missing rate and unknown-category
//! rate over a window are recording rules on these (`deploy/prometheus/rules.yml`); the formula and the empty-bin
//! rule are those of [`probity_models::stability::stability`].
//!
//! Cardinality, bounded by the model file and the configuration, never by a caller: per (configured route, model
//! version answering on it), at most [`MAX_MONITORED_FEATURES`] features (the first ones in file order that carry a
//! training distribution; the others are not counted) and per feature at most
//! [`probity_models::stability::MAX_DISTRIBUTION_BINS`] value bins plus `missing` and `unknown`: at most
//! 32 x 34 = 1,088 counter series per route and model version. Label values: the route's configured name, the
//! model's name and version, the feature's name from the file, and the slot (`0` to `31`, `missing`, `unknown`).
//!
//! The handles of a configured route are registered when its model loads (`serve/server.rs`), at zero, so that
//! Prometheus's `increase()` and `rate()` count every row, and the first slots hit are not lost to the first scrape.
//!
//! Cost per scored row: one slot lookup per monitored feature (a binary search over at most 31 edges, or a range
//! check) and one relaxed atomic increment, through the handles of the row's prediction series (one lookup per row
//! records the prediction and its features, `serve/metrics.rs`).

use probity_models::stability::{Slot, TrainingDistribution, MAX_DISTRIBUTION_BINS};
use probity_models::Model;

use crate::store::features::RowFeatures;

/// Rows counted per slot of a feature's training distribution, by route, model, version, feature and slot.
pub const FEATURE_VALUES: &str = "probity_feature_values_total";
/// The training share of each slot, by model, version, feature and slot (from the model file).
pub const FEATURE_TRAINING_SHARE: &str = "probity_feature_training_share";

pub use probity_models::stability::MAX_MONITORED_FEATURES;

/// The `bin` label of value bin `i` (at most [`MAX_DISTRIBUTION_BINS`]).
const BIN_LABELS: [&str; MAX_DISTRIBUTION_BINS] = [
    "0", "1", "2", "3", "4", "5", "6", "7", "8", "9", "10", "11", "12", "13", "14", "15", "16",
    "17", "18", "19", "20", "21", "22", "23", "24", "25", "26", "27", "28", "29", "30", "31",
];

/// The `bin` label of a slot.
pub fn slot_label(slot: Slot) -> &'static str {
    match slot {
        Slot::Bin(i) => BIN_LABELS.get(i).copied().unwrap_or("other"),
        Slot::Missing => "missing",
        Slot::Unknown => "unknown",
    }
}

/// The HELP texts.
pub fn describe() {
    metrics::describe_counter!(
        FEATURE_VALUES,
        "Scored rows by the slot of each monitored feature's value in its training distribution (bin, missing, unknown)."
    );
    metrics::describe_gauge!(
        FEATURE_TRAINING_SHARE,
        "Share of the training rows in each slot of a feature's training distribution (from the model file)."
    );
}

/// One monitored feature: its column, distribution and one counter per slot.
struct Monitored {
    column: usize,
    distribution: TrainingDistribution,
    counters: Vec<metrics::Counter>,
}

/// The counters of one (route, model, version).
pub struct FeatureCounters {
    features: Vec<Monitored>,
    /// The monitored features' names, shared by every row's slots sent to the store.
    names: std::sync::Arc<[String]>,
}

impl FeatureCounters {
    /// Registers the counters of `model` on `route` (all at zero, so a slot never hit still has a series for
    /// `rate()`), and sets the training-share gauges. `None` when the model has no training distribution.
    pub fn new(route: &str, model: &Model) -> Option<FeatureCounters> {
        let mut features = Vec::new();
        let mut names = Vec::new();
        for (column, distribution) in model.training_distributions().take(MAX_MONITORED_FEATURES) {
            let name = model
                .schema()
                .feature(column)
                .map(|f| f.name.clone())
                .unwrap_or_default();
            let expected = distribution.expected();
            let counters = (0..distribution.slots())
                .map(|s| {
                    let bin = slot_label(distribution.slot(s));
                    metrics::gauge!(FEATURE_TRAINING_SHARE,
                        "model" => model.name().to_string(), "version" => model.version().to_string(),
                        "feature" => name.clone(), "bin" => bin)
                    .set(expected[s]);
                    metrics::counter!(FEATURE_VALUES,
                        "route" => route.to_string(), "model" => model.name().to_string(),
                        "version" => model.version().to_string(), "feature" => name.clone(), "bin" => bin)
                })
                .collect::<Vec<_>>();
            // Registered at zero: the exposition lists it before the first row arrives.
            for c in &counters {
                c.increment(0);
            }
            names.push(name);
            features.push(Monitored {
                column,
                distribution: distribution.clone(),
                counters,
            });
        }
        (!features.is_empty()).then(|| FeatureCounters {
            features,
            names: names.into(),
        })
    }

    /// Counts one row (its dense values, in the model's feature order); with `keep`, returns the slots found, one
    /// per monitored feature, for the store (`None` if a row is shorter than the schema, which the scorer never
    /// sends).
    pub fn count(&self, row: &[f64], keep: bool) -> Option<RowFeatures> {
        let mut slots = [0u8; MAX_MONITORED_FEATURES];
        let mut whole = true;
        for (m, kept) in self.features.iter().zip(slots.iter_mut()) {
            let Some(&v) = row.get(m.column) else {
                whole = false;
                continue;
            };
            let slot = m.distribution.slot_of(v);
            if let Some(c) = m.counters.get(slot) {
                c.increment(1);
            }
            // At most MAX_DISTRIBUTION_BINS + 2 = 34 slots: a byte.
            *kept = u8::try_from(slot).unwrap_or(u8::MAX);
        }
        if !(keep && whole) {
            return None;
        }
        RowFeatures::new(
            std::sync::Arc::clone(&self.names),
            &slots[..self.features.len()],
        )
    }
}
