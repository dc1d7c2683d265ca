//! Per-feature stability in a report: for each monitored feature of a section's model version, the PSI of its
//! values against the model file's training distribution, its missing-value rate and its unknown-category rate,
//! over the rows the store counted by hour (`crate::store::features`).
//!
//! - **Range.** The store counts by UTC hour, so the range is widened to whole hours: a window is included when its
//!   hour holds any instant of `[from, to)` (`from` rounded down, `to` rounded up to the hour). The rows counted
//!   may therefore exceed the section's predictions by those of the partial hours at either end.
//! - **Distributions.** Taken from the store's model version facts (what the model file stated when the version
//!   first logged a prediction), not from the model files a server has loaded now, so that `probity report` on a
//!   store file alone gives the same figures as the `Report` call. Facts recorded by an earlier build get the
//!   distributions when this build first writes a prediction of that version, before its counts; a counted feature
//!   the facts still do not know (a hand-edited store) shows its rows, and no PSI, with a note.
//! - **Figures.** [`probity_models::stability::stability`] with its default empty-bin rule (shares floored at
//!   1e-4), the same function as `probity evaluate`, `probity check` and the recording rules use.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use probity_models::metrics::EmptyBinRule;
use probity_models::stability::stability;
use serde::Serialize;

use crate::store::features::FeatureCount;
use crate::store::{ReportFilter, Store, StoreError};

use super::SeriesReport;

/// The stability of one feature over a report's range.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureReport {
    /// Feature name, from the model file.
    pub feature: String,
    /// Rows counted (the windows overlapping the range).
    pub rows: u64,
    /// PSI of the rows' slot shares against the training shares; `None` without the training distribution.
    pub psi: Option<f64>,
    /// Share of the rows with the value missing.
    pub missing_rate: Option<f64>,
    /// Share with a category the model does not know; `None` for a numeric feature.
    pub unknown_rate: Option<f64>,
    /// Rows per slot, in slot order: value bins, missing, then unknown for a categorical feature.
    pub counts: Vec<u64>,
    /// Start of the first hour window counted, ms since the epoch.
    pub first_window_ms: i64,
}

/// How the report states the windows.
pub const WINDOWS: &str =
    "one-hour windows aligned to UTC hours; the range is widened to whole hours";

/// Fills each section's `features` from the store's hourly counts (one query for the whole report).
pub fn add(
    store: &mut dyn Store,
    filter: &ReportFilter,
    series: &mut [SeriesReport],
) -> Result<(), StoreError> {
    if series.is_empty() {
        return Ok(());
    }
    let counts = store.feature_counts(filter)?;
    type Key = (String, String, String, String);
    let mut by_series: BTreeMap<Key, Vec<FeatureCount>> = BTreeMap::new();
    for c in counts {
        let key = (
            c.route.clone(),
            c.model.clone(),
            c.version.clone(),
            c.role.clone(),
        );
        by_series.entry(key).or_default().push(c);
    }
    for s in series.iter_mut() {
        let key = (
            s.route.clone(),
            s.model.clone(),
            s.version.clone(),
            s.role.clone(),
        );
        let Some(counts) = by_series.remove(&key) else {
            continue;
        };
        let facts = store.model_version(&s.model, &s.version)?;
        let distributions = facts.map(|f| f.features).unwrap_or_default();
        s.features = section(&distributions, counts, &mut s.notes);
    }
    Ok(())
}

/// The features of one section: one entry per monitored feature, in the model file's order, then any counted
/// feature the facts do not know, by name.
fn section(
    distributions: &[crate::store::features::FeatureDistribution],
    counts: Vec<FeatureCount>,
    notes: &mut Vec<String>,
) -> Vec<FeatureReport> {
    let mut by_feature: BTreeMap<String, Vec<FeatureCount>> = BTreeMap::new();
    for c in counts {
        by_feature.entry(c.feature.clone()).or_default().push(c);
    }
    let mut out = Vec::new();
    for d in distributions {
        let Some(rows) = by_feature.remove(&d.feature) else {
            continue;
        };
        let distribution = d.distribution();
        let mut slots = vec![0u64; distribution.slots()];
        let mut first = i64::MAX;
        for c in &rows {
            first = first.min(c.window_ms);
            let n = u64::try_from(c.rows).unwrap_or(0);
            match usize::try_from(c.slot).ok().and_then(|i| slots.get_mut(i)) {
                Some(slot) => *slot += n,
                None => notes.push(format!(
                    "feature {}: {n} rows in slot {} that its training distribution does not have; left out",
                    d.feature, c.slot
                )),
            }
        }
        let figures = match stability(&distribution, &slots, EmptyBinRule::default()) {
            Ok(f) => Some(f),
            Err(e) => {
                notes.push(format!("feature {}: {e}", d.feature));
                None
            }
        };
        out.push(FeatureReport {
            feature: d.feature.clone(),
            rows: slots.iter().sum(),
            psi: figures.map(|f| f.psi),
            missing_rate: figures.map(|f| f.missing_rate),
            unknown_rate: figures.and_then(|f| f.unknown_rate),
            counts: slots,
            first_window_ms: first,
        });
    }
    for (feature, rows) in by_feature {
        notes.push(format!(
            "feature {feature}: counted, but the store's facts of this model version hold no training distribution for it (no PSI)"
        ));
        let total: u64 = rows
            .iter()
            .map(|c| u64::try_from(c.rows).unwrap_or(0))
            .sum();
        out.push(FeatureReport {
            feature,
            rows: total,
            psi: None,
            missing_rate: None,
            unknown_rate: None,
            counts: Vec::new(),
            first_window_ms: rows.iter().map(|c| c.window_ms).min().unwrap_or(0),
        });
    }
    out
}

/// The features as text lines of a section.
pub fn render(s: &mut String, features: &[FeatureReport]) {
    if features.is_empty() {
        return;
    }
    let _ = writeln!(
        s,
        "feature stability against the training distribution ({WINDOWS}; PSI shares floored at 1e-4):"
    );
    let _ = writeln!(
        s,
        "  {:<24} {:>10} {:>10} {:>10} {:>10}",
        "feature", "rows", "PSI", "missing", "unknown"
    );
    let opt = |v: Option<f64>| v.map_or_else(|| "-".to_string(), |v| format!("{v:.6}"));
    for f in features {
        let _ = writeln!(
            s,
            "  {:<24} {:>10} {:>10} {:>10} {:>10}",
            f.feature,
            f.rows,
            opt(f.psi),
            opt(f.missing_rate),
            opt(f.unknown_rate)
        );
    }
}
