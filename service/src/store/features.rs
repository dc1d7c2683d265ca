//! Per-feature stability in the prediction store: how many scored rows fell in each slot of each monitored
//! feature's training distribution, per hour.
//!
//! - **What is counted.** The scoring path already finds, for every answered row, the slot of each monitored
//!   feature's value (the first [`probity_models::stability::MAX_MONITORED_FEATURES`] features of the model
//!   file that carry a training distribution) for the `probity_feature_values_total` counters. The same slots, one
//!   byte per feature held inline, ride with the row's prediction to the store writer ([`RowFeatures`]): no second
//!   lookup and no allocation per row.
//!   Rows scored silently by a challenger are not counted (they are the answered row's values again).
//! - **Windows.** One hour, aligned to UTC hours (`time_ms` rounded down to a multiple of 3,600,000, the Unix
//!   epoch being an hour boundary of UTC): the prediction's own time decides its window.
//! - **Key and bound.** (window, route, model, version, role, feature, slot) -> rows. Per hour and (route, model
//!   version, role), at most 32 features x 34 slots = 1,088 rows, whatever the callers send.
//! - **Exactly once.** The counts of a batch are added in the same transaction as its predictions, and only for
//!   the predictions that transaction actually wrote: a prediction already logged (a client's retry with the same
//!   id, a batch written again after a lost answer) adds nothing, and a batch rolled back adds nothing. Several
//!   replicas and successive batches add up through an upsert (`rows = rows + excluded.rows`). So a window holds
//!   exactly the rows of the predictions the log holds (or held, once retention has removed some of the hour).
//! - **Retention.** A window is removed when its whole hour is older than the retention cutoff.
//! - **Slots.** Stored by index, as [`TrainingDistribution::slot`] numbers them: the value bins `0..n`, then `n`
//!   for a missing value and `n + 1` for an unknown category, `n` being the number of value bins of the model
//!   version's distribution (kept in its facts, [`super::ModelVersionInfo::features`]).

use std::collections::BTreeMap;
use std::sync::Arc;

use probity_models::stability::{DistributionBins, TrainingDistribution};

use super::PredictionRecord;

/// Length of a window, ms: one hour.
pub const WINDOW_MS: i64 = 3_600_000;

/// The start of the (UTC hour) window holding `time_ms`.
pub fn window_of(time_ms: i64) -> i64 {
    time_ms.div_euclid(WINDOW_MS) * WINDOW_MS
}

/// Most features a row's slots hold: the monitored features of a model version.
pub const MAX_ROW_FEATURES: usize = probity_models::stability::MAX_MONITORED_FEATURES;

/// The monitored features of one scored row: their names (shared by every row of the model version) and the slot
/// of each one's value, in the same order. The slots are held inline (no allocation per row).
#[derive(Debug, Clone, PartialEq)]
pub struct RowFeatures {
    names: Arc<[String]>,
    slots: [u8; MAX_ROW_FEATURES],
}

impl RowFeatures {
    /// The slots `slots[i]` of features `names[i]`; `None` when the two lengths differ or exceed
    /// [`MAX_ROW_FEATURES`].
    pub fn new(names: Arc<[String]>, slots: &[u8]) -> Option<RowFeatures> {
        if slots.len() != names.len() || slots.len() > MAX_ROW_FEATURES {
            return None;
        }
        let mut inline = [0u8; MAX_ROW_FEATURES];
        inline[..slots.len()].copy_from_slice(slots);
        Some(RowFeatures {
            names,
            slots: inline,
        })
    }

    /// Feature names, in monitored order.
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// Slot index of each feature's value in its training distribution.
    pub fn slots(&self) -> &[u8] {
        &self.slots[..self.names.len()]
    }
}

/// Rows counted in one slot of one window.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct FeatureCount {
    /// Window start, ms since the epoch (a whole UTC hour).
    pub window_ms: i64,
    /// Route.
    pub route: String,
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// Role (`champion`, `challenger`).
    pub role: String,
    /// Feature name.
    pub feature: String,
    /// Slot index ([`TrainingDistribution::slot`]).
    pub slot: i64,
    /// Rows.
    pub rows: i64,
}

/// The counts to add for the written records of a batch: `features[i]` belongs to `records[i]`, and only the
/// records with `written[i]` count.
pub fn counts_of(
    records: &[PredictionRecord],
    features: &[Option<&RowFeatures>],
    written: &[bool],
) -> Vec<FeatureCount> {
    type Key<'a> = (i64, &'a str, &'a str, &'a str, &'a str, &'a str, u8);
    let mut sums: BTreeMap<Key<'_>, i64> = BTreeMap::new();
    for ((r, f), w) in records.iter().zip(features).zip(written) {
        let (Some(f), true) = (f, *w) else { continue };
        let window = window_of(r.time_ms);
        for (name, &slot) in f.names().iter().zip(f.slots()) {
            let key = (
                window,
                r.route.as_str(),
                r.model.as_str(),
                r.version.as_str(),
                r.role.as_str(),
                name.as_str(),
                slot,
            );
            *sums.entry(key).or_default() += 1;
        }
    }
    sums.into_iter()
        .map(
            |((window_ms, route, model, version, role, feature, slot), rows)| FeatureCount {
                window_ms,
                route: route.to_string(),
                model: model.to_string(),
                version: version.to_string(),
                role: role.to_string(),
                feature: feature.to_string(),
                slot: i64::from(slot),
                rows,
            },
        )
        .collect()
}

/// A feature's training distribution as the store's model version facts keep it (`docs/model-format.md`,
/// `features[i].training_distribution`), so that a report needs nothing but the store.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct FeatureDistribution {
    /// Feature name.
    pub feature: String,
    /// Interior edges of a numeric feature; `None` for a categorical one (one bin per category).
    pub edges: Option<Vec<f64>>,
    /// Training share of each value bin.
    pub shares: Vec<f64>,
    /// Training share of missing values.
    pub missing: f64,
    /// Training share of unknown categories.
    pub unknown: f64,
}

impl FeatureDistribution {
    /// From the model crate's type.
    pub fn of(feature: &str, d: &TrainingDistribution) -> FeatureDistribution {
        FeatureDistribution {
            feature: feature.to_string(),
            edges: match &d.bins {
                DistributionBins::Numeric { edges } => Some(edges.clone()),
                DistributionBins::Categorical => None,
            },
            shares: d.shares.clone(),
            missing: d.missing,
            unknown: d.unknown,
        }
    }

    /// Back to the model crate's type.
    pub fn distribution(&self) -> TrainingDistribution {
        TrainingDistribution {
            bins: match &self.edges {
                Some(edges) => DistributionBins::Numeric {
                    edges: edges.clone(),
                },
                None => DistributionBins::Categorical,
            },
            shares: self.shares.clone(),
            missing: self.missing,
            unknown: self.unknown,
        }
    }
}

/// The facts text to store in place of `stored` when those facts, first registered by a build that did not keep
/// training distributions, lack the ones `info` brings: `stored` with `info`'s distributions added, everything else
/// left as first recorded. `None` when nothing is to change (the facts are recorded once otherwise).
pub fn facts_with_distributions(stored: &str, info: &super::ModelVersionInfo) -> Option<String> {
    if info.features.is_empty() {
        return None;
    }
    let mut facts: super::ModelVersionInfo = serde_json::from_str(stored).ok()?;
    if !facts.features.is_empty() {
        return None;
    }
    facts.features.clone_from(&info.features);
    serde_json::to_string(&facts).ok()
}
