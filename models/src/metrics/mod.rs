//! Scoring rules, calibration diagnostics, ranking statistics and drift statistics.
//!
//! Every function here is pure and works over slices. Labels are `&[bool]` or `&[u8]` (see [`Labels`]); a `u8`
//! label other than 0 or 1 is refused with its row named. Inputs are validated up front (empty input, length
//! mismatch, non-finite values, probabilities outside [0, 1], bad bin or group counts) and every failure is a
//! [`MetricsError`] naming the argument and, where there is one, the row.
//!
//! Submodules:
//! - [`loss`]: log-loss from log-odds, Brier score and its Murphy decomposition;
//! - [`calibration_table`](mod@calibration_table): binned reliability table, expected and maximum calibration error;
//! - [`hosmer_lemeshow`](mod@hosmer_lemeshow): the Hosmer-Lemeshow statistic and the chi-square survival function;
//! - [`ranking`]: ROC AUC, the two-sample KS statistic, gains and lift, counts at a threshold;
//! - [`drift`]: population stability index and the binning it uses;
//! - [`tails`]: the KS p-value (asymptotic Kolmogorov) and Student's t p-value;
//! - [`quantile`]: sample quantiles with linear interpolation, shared by the binning rules.

pub mod calibration_table;
pub mod drift;
pub mod hosmer_lemeshow;
pub mod interval;
pub mod loss;
pub mod quantile;
pub mod ranking;
pub mod tails;

pub use calibration_table::{calibration_table, BinStrategy, CalibrationBin, CalibrationTable};
pub use drift::{
    bin_counts, bin_index, psi_from_counts, psi_from_fractions, psi_from_samples, quantile_edges,
    EmptyBinRule,
};
pub use hosmer_lemeshow::{chi2_sf, hosmer_lemeshow, HlGroup, HlGrouping, HosmerLemeshow};
pub use interval::{wilson_interval, Z_95};
pub use loss::{
    brier_decomposition, brier_score, log_loss_from_log_odds, log_loss_term_pm1, log_loss_terms,
    BrierDecomposition,
};
pub use ranking::{
    confusion_at_threshold, gains_lift, ks_statistic, roc_auc, ConfusionCounts, GainsRow,
};
pub use tails::{kolmogorov_sf, ks_p_value, student_t_two_sided_p};

use std::borrow::Cow;

/// Why a statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MetricsError {
    /// An input slice had no elements.
    #[error("{what} is empty")]
    Empty {
        /// The argument that was empty.
        what: &'static str,
    },
    /// Two inputs that pair up row by row have different lengths.
    #[error("{left} has {left_len} values but {right} has {right_len}")]
    LengthMismatch {
        /// The first argument.
        left: &'static str,
        /// Its length.
        left_len: usize,
        /// The second argument.
        right: &'static str,
        /// Its length.
        right_len: usize,
    },
    /// A label was neither 0 nor 1.
    #[error("labels[{index}] is {value}; labels must be 0 or 1")]
    BadLabel {
        /// Row of the offending label.
        index: usize,
        /// The value found.
        value: u8,
    },
    /// The statistic needs both classes but the labels hold only one.
    #[error("{statistic} needs both classes, but every label is {present}")]
    OneClass {
        /// The statistic asked for.
        statistic: &'static str,
        /// The only class present (0 or 1).
        present: u8,
    },
    /// A value was NaN or infinite.
    #[error("{what}[{index}] is {value}; finite values are required")]
    NonFinite {
        /// The argument holding the value.
        what: &'static str,
        /// Its row.
        index: usize,
        /// The value found.
        value: f64,
    },
    /// A probability was outside [0, 1].
    #[error("{what}[{index}] is {value}; probabilities must lie in [0, 1]")]
    NotProbability {
        /// The argument holding the value.
        what: &'static str,
        /// Its row.
        index: usize,
        /// The value found.
        value: f64,
    },
    /// A number of bins or groups was out of range.
    #[error("{what} is {got}; it must be at least {min}{}", max.map(|m| format!(" and at most {m}")).unwrap_or_default())]
    BadBinCount {
        /// Which count.
        what: &'static str,
        /// The value asked for.
        got: usize,
        /// Smallest allowed value.
        min: usize,
        /// Largest allowed value, if any.
        max: Option<usize>,
    },
    /// Bin edges were not finite and strictly increasing.
    #[error("edges[{index}] is {value}; edges must be finite and strictly increasing")]
    BadEdges {
        /// The first offending edge.
        index: usize,
        /// Its value.
        value: f64,
    },
    /// Expected fractions did not form a distribution over the bins.
    #[error("expected fractions: {reason}")]
    BadFractions {
        /// What is wrong.
        reason: String,
    },
    /// A parameter (threshold, floor, added count) was out of its range.
    #[error("{name} is {value}; {reason}")]
    BadParameter {
        /// The parameter.
        name: &'static str,
        /// Its value.
        value: f64,
        /// The allowed range.
        reason: &'static str,
    },
    /// A group of the Hosmer-Lemeshow table had an expected count of zero, so its term is undefined.
    #[error("group {group} has expected count 0 for class {class}; the Hosmer-Lemeshow term is undefined")]
    ZeroExpected {
        /// The group (0-based, in increasing predicted probability).
        group: usize,
        /// The class (0 or 1) whose expected count is zero.
        class: u8,
    },
}

/// Binary labels accepted by the metrics: `bool`, or `u8` restricted to 0 and 1.
pub trait Labels {
    /// The labels as booleans (`true` = positive class), or the first value that is not 0/1.
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError>;
}

impl Labels for [bool] {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        Ok(Cow::Borrowed(self))
    }
}

impl Labels for [u8] {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        self.iter()
            .enumerate()
            .map(|(index, &value)| match value {
                0 => Ok(false),
                1 => Ok(true),
                _ => Err(MetricsError::BadLabel { index, value }),
            })
            .collect::<Result<Vec<bool>, _>>()
            .map(Cow::Owned)
    }
}

impl Labels for Vec<bool> {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        self.as_slice().to_bools()
    }
}

impl Labels for Vec<u8> {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        self.as_slice().to_bools()
    }
}

impl<const N: usize> Labels for [bool; N] {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        self.as_slice().to_bools()
    }
}

impl<const N: usize> Labels for [u8; N] {
    fn to_bools(&self) -> Result<Cow<'_, [bool]>, MetricsError> {
        self.as_slice().to_bools()
    }
}

/// Refuses an empty slice.
pub(crate) fn non_empty<T>(what: &'static str, xs: &[T]) -> Result<(), MetricsError> {
    if xs.is_empty() {
        Err(MetricsError::Empty { what })
    } else {
        Ok(())
    }
}

/// Refuses a NaN or infinite value, naming its row.
pub(crate) fn all_finite(what: &'static str, xs: &[f64]) -> Result<(), MetricsError> {
    match xs.iter().position(|x| !x.is_finite()) {
        Some(index) => Err(MetricsError::NonFinite {
            what,
            index,
            value: xs[index],
        }),
        None => Ok(()),
    }
}

/// Refuses a value outside [0, 1] (NaN included), naming its row.
pub(crate) fn all_probabilities(what: &'static str, xs: &[f64]) -> Result<(), MetricsError> {
    match xs.iter().position(|x| !(0.0..=1.0).contains(x)) {
        Some(index) => Err(MetricsError::NotProbability {
            what,
            index,
            value: xs[index],
        }),
        None => Ok(()),
    }
}

/// Validates a score or probability vector against labels of the same length; returns the labels as booleans.
pub(crate) fn paired<'a, L: Labels + ?Sized>(
    what: &'static str,
    xs: &[f64],
    labels: &'a L,
) -> Result<Cow<'a, [bool]>, MetricsError> {
    let y = labels.to_bools()?;
    non_empty(what, xs)?;
    if xs.len() != y.len() {
        return Err(MetricsError::LengthMismatch {
            left: what,
            left_len: xs.len(),
            right: "labels",
            right_len: y.len(),
        });
    }
    Ok(y)
}

/// Refuses labels that hold one class only.
pub(crate) fn both_classes(statistic: &'static str, y: &[bool]) -> Result<usize, MetricsError> {
    let positives = y.iter().filter(|&&b| b).count();
    if positives == 0 {
        Err(MetricsError::OneClass {
            statistic,
            present: 0,
        })
    } else if positives == y.len() {
        Err(MetricsError::OneClass {
            statistic,
            present: 1,
        })
    } else {
        Ok(positives)
    }
}

/// Sizes of `groups` consecutive groups of near-equal size covering `n` rows: the first `n mod groups` groups
/// have one row more (the convention of `numpy.array_split`).
pub(crate) fn split_sizes(n: usize, groups: usize) -> Vec<usize> {
    let (base, extra) = (n / groups, n % groups);
    (0..groups).map(|k| base + usize::from(k < extra)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn u8_labels_other_than_0_1_are_refused_with_their_row() {
        let y: [u8; 3] = [0, 1, 2];
        assert_eq!(
            y.to_bools(),
            Err(MetricsError::BadLabel { index: 2, value: 2 })
        );
        let ok: [u8; 2] = [1, 0];
        assert_eq!(ok.to_bools().unwrap().as_ref(), &[true, false]);
    }

    #[test]
    fn split_sizes_put_the_extra_rows_first() {
        assert_eq!(split_sizes(10, 3), vec![4, 3, 3]);
        assert_eq!(split_sizes(11, 3), vec![4, 4, 3]);
        assert_eq!(split_sizes(3, 3), vec![1, 1, 1]);
    }
}
