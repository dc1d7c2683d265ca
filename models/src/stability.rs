//! Per-feature stability: a feature's training distribution, as the model file states it
//! (`features[i].training_distribution`, `docs/model-format.md`), and the PSI, missing-value rate and
//! unknown-category rate of a window of dense rows measured against it.
//!
//! A distribution has *slots*: one per value bin (the numeric bins, or the categories in schema order), then one
//! for a missing value, then, for a categorical feature only, one for an unknown category. Counting a window of
//! rows into slots and comparing those counts with the training shares gives the PSI with the same formula and
//! empty-bin rule as the score distribution's ([`crate::metrics::drift`]); missing values and unknown categories
//! are slots of their own, so a feature that starts arriving empty moves its PSI too.

use crate::metrics::drift::{bin_index, psi_from_fractions, EmptyBinRule};
use crate::metrics::MetricsError;

/// Most value bins (numeric bins or categories) a training distribution may have; with the missing and unknown
/// slots, a feature has at most `MAX_DISTRIBUTION_BINS + 2` slots.
pub const MAX_DISTRIBUTION_BINS: usize = 32;

/// Most features monitored per model version, live and in the prediction store: the first ones in file order that
/// carry a training distribution (a bound on metric series and stored counts, whatever the file holds).
pub const MAX_MONITORED_FEATURES: usize = 32;

/// How far a training distribution's shares may sum from 1.
pub const SHARE_SUM_TOLERANCE: f64 = 1e-6;

/// How a training distribution cuts values into bins.
#[derive(Debug, Clone, PartialEq)]
pub enum DistributionBins {
    /// A numeric feature: interior edges, strictly increasing and finite; bin `i` is `(edges[i-1], edges[i]]`,
    /// the first open below and the last open above (the same closure as the reference score distribution).
    Numeric {
        /// Interior cut points.
        edges: Vec<f64>,
    },
    /// A categorical feature: one bin per category, in schema order.
    Categorical,
}

/// The distribution of one feature on the training data.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainingDistribution {
    /// How values are binned.
    pub bins: DistributionBins,
    /// Share of all training rows in each value bin.
    pub shares: Vec<f64>,
    /// Share of training rows with the value missing.
    pub missing: f64,
    /// Share of training rows with a category the model does not know (0 for a numeric feature).
    pub unknown: f64,
}

/// What one slot of a distribution holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Slot {
    /// Value bin `i`.
    Bin(usize),
    /// A missing value.
    Missing,
    /// An unknown category.
    Unknown,
}

impl TrainingDistribution {
    /// Whether the feature is categorical.
    pub fn is_categorical(&self) -> bool {
        matches!(self.bins, DistributionBins::Categorical)
    }

    /// Number of slots: value bins, missing, and unknown for a categorical feature.
    pub fn slots(&self) -> usize {
        self.shares.len() + if self.is_categorical() { 2 } else { 1 }
    }

    /// The slot index of a missing value.
    pub fn missing_slot(&self) -> usize {
        self.shares.len()
    }

    /// The slot index of an unknown category (`None` for a numeric feature).
    pub fn unknown_slot(&self) -> Option<usize> {
        self.is_categorical().then_some(self.shares.len() + 1)
    }

    /// What slot `i` holds.
    pub fn slot(&self, i: usize) -> Slot {
        let n = self.shares.len();
        if i < n {
            Slot::Bin(i)
        } else if i == n {
            Slot::Missing
        } else {
            Slot::Unknown
        }
    }

    /// The slot of a dense-row value: `NaN` is missing; a categorical value that is not the index of one of the
    /// categories is unknown; a numeric value (infinities too) falls in its bin.
    pub fn slot_of(&self, value: f64) -> usize {
        if value.is_nan() {
            return self.missing_slot();
        }
        match &self.bins {
            DistributionBins::Numeric { edges } => bin_index(value, edges),
            DistributionBins::Categorical => {
                let n = self.shares.len();
                if value >= 0.0 && value < n as f64 && value.fract() == 0.0 {
                    value as usize
                } else {
                    n + 1
                }
            }
        }
    }

    /// The training share of every slot, in slot order; they sum to 1 within [`SHARE_SUM_TOLERANCE`].
    pub fn expected(&self) -> Vec<f64> {
        let mut e = Vec::with_capacity(self.slots());
        e.extend_from_slice(&self.shares);
        e.push(self.missing);
        if self.is_categorical() {
            e.push(self.unknown);
        }
        e
    }

    /// Counts of `values` (one feature's dense-row values) in this distribution's slots.
    pub fn count<I: IntoIterator<Item = f64>>(&self, values: I) -> Vec<u64> {
        let mut counts = vec![0u64; self.slots()];
        for v in values {
            counts[self.slot_of(v)] += 1;
        }
        counts
    }
}

/// The stability figures of one feature over a window of rows.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FeatureStability {
    /// Rows counted.
    pub rows: u64,
    /// PSI of the window's slot shares against the training shares.
    pub psi: f64,
    /// Share of the window's rows with the value missing.
    pub missing_rate: f64,
    /// Share with an unknown category (`None` for a numeric feature).
    pub unknown_rate: Option<f64>,
}

/// The PSI, missing rate and unknown-category rate of slot `counts` (as [`TrainingDistribution::count`] gives
/// them) against the training distribution.
///
/// The empty-bin rule is `rule`; [`EmptyBinRule::default`], a floor of 1e-4 on both the training and the window
/// shares, is what the server, its recording rule and `probity evaluate` use (a floor is common practice, no
/// single source; its value is ours). Errors: counts of another length, a window with no row.
pub fn stability(
    distribution: &TrainingDistribution,
    counts: &[u64],
    rule: EmptyBinRule,
) -> Result<FeatureStability, MetricsError> {
    let psi = psi_from_fractions(&distribution.expected(), counts, rule)?;
    let rows: u64 = counts.iter().sum();
    let rate = |slot: usize| counts[slot] as f64 / rows as f64;
    Ok(FeatureStability {
        rows,
        psi,
        missing_rate: rate(distribution.missing_slot()),
        unknown_rate: distribution.unknown_slot().map(rate),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numeric() -> TrainingDistribution {
        TrainingDistribution {
            bins: DistributionBins::Numeric {
                edges: vec![10.0, 20.0],
            },
            shares: vec![0.3, 0.3, 0.3],
            missing: 0.1,
            unknown: 0.0,
        }
    }

    fn categorical() -> TrainingDistribution {
        TrainingDistribution {
            bins: DistributionBins::Categorical,
            shares: vec![0.5, 0.25, 0.25],
            missing: 0.0,
            unknown: 0.0,
        }
    }

    #[test]
    fn slots_of_values() {
        let n = numeric();
        assert_eq!(n.slots(), 4);
        // Bins closed on the right, as the reference score distribution's.
        let got: Vec<usize> = [
            f64::NEG_INFINITY,
            10.0,
            10.5,
            20.0,
            20.5,
            f64::INFINITY,
            f64::NAN,
        ]
        .iter()
        .map(|&v| n.slot_of(v))
        .collect();
        assert_eq!(got, vec![0, 0, 1, 1, 2, 2, 3]);
        assert_eq!(n.unknown_slot(), None);
        let c = categorical();
        assert_eq!(c.slots(), 5);
        let got: Vec<usize> = [0.0, 2.0, 3.0, -1.0, 1.5, f64::NAN, f64::INFINITY]
            .iter()
            .map(|&v| c.slot_of(v))
            .collect();
        assert_eq!(got, vec![0, 2, 4, 4, 4, 3, 4]);
        assert_eq!(c.slot(3), Slot::Missing);
        assert_eq!(c.slot(4), Slot::Unknown);
    }

    #[test]
    fn hand_computed_psi_and_rates() {
        // Training shares (0.5, 0.25, 0.25, missing 0, unknown 0); window of 8 rows: 2, 2, 2, 1 missing,
        // 1 unknown -> shares (0.25, 0.25, 0.25, 0.125, 0.125). With the floor 1e-4 on the empty training slots:
        // PSI = (0.25 - 0.5) ln(0.5) + 0 + 0 + 2 (0.125 - 1e-4) ln(0.125 / 1e-4), worked by hand from the formula
        // (Siddiqi 2006).
        let c = categorical();
        let counts = c.count([0.0, 0.0, 1.0, 1.0, 2.0, 2.0, f64::NAN, 7.0]);
        assert_eq!(counts, vec![2, 2, 2, 1, 1]);
        let s = stability(&c, &counts, EmptyBinRule::default()).unwrap();
        let want = -0.25 * 0.5f64.ln() + 2.0 * (0.125 - 1e-4) * (0.125f64 / 1e-4).ln();
        assert!((s.psi - want).abs() < 1e-12, "{} vs {want}", s.psi);
        assert_eq!(s.rows, 8);
        assert_eq!(s.missing_rate, 0.125);
        assert_eq!(s.unknown_rate, Some(0.125));
        // The same shares as training: PSI 0.
        let same = stability(&c, &[2, 1, 1, 0, 0], EmptyBinRule::default()).unwrap();
        assert_eq!(same.psi, 0.0);
    }

    #[test]
    fn bad_counts() {
        let n = numeric();
        assert!(stability(&n, &[1, 1], EmptyBinRule::default()).is_err());
        assert!(stability(&n, &[0, 0, 0, 0], EmptyBinRule::default()).is_err());
    }
}
