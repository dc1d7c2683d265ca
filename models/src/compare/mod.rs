//! Comparing a champion model with a challenger on the same cases.
//!
//! Two stages, matching what a live route knows:
//! - **before outcomes** ([`agreement`](mod@agreement)): from the first request both models have scored, how much
//!   they agree: Spearman rank correlation of the log-odds, mean and largest absolute log-odds difference, the share
//!   of decisions that flip at a threshold, and the PSI of the challenger's log-odds against the champion's;
//! - **with outcomes** ([`outcomes`](mod@outcomes)), on cases both models scored and whose outcome is known: the
//!   paired per-case log-loss difference with a Diebold-Mariano test ([`paired_loss`](mod@paired_loss)), both
//!   AUCs with the DeLong, DeLong and Clarke-Pearson (1988) test for correlated AUCs ([`delong`](mod@delong)), the
//!   Brier difference and each model's expected calibration error, summed up in a [`Verdict`].
//!
//! [`share`](mod@share) maps a subject key to the model that answers it when live challengers answer shares; it is a pure
//! function of its inputs, stable across restarts, platforms and Rust versions.
//!
//! Sign convention everywhere: a difference is **challenger minus champion**. A negative log-loss or Brier
//! difference, or a positive AUC difference, favours the challenger.

pub mod agreement;
pub mod delong;
pub mod outcomes;
pub mod paired_loss;
pub mod share;
pub mod verdict;

pub use self::z_and_p as normal_z_and_p;
pub use agreement::{agreement, spearman, Agreement, AgreementOptions, Flips};
pub use delong::{delong_test, midranks, DeLongTest};
pub use outcomes::{compare_outcomes, ModelScores, OutcomeComparison, OutcomeOptions};
pub use paired_loss::{
    diebold_mariano, log_loss_differences, newey_west_lag, PairedTest, VarianceEstimator,
};
pub use share::{share_hash, share_unit, Assignment, ShareError, SharePlan, SHARE_HASH_NAME};
pub use verdict::{Evidence, Minimums, Side, Verdict, VerdictRule};

use crate::metrics::{chi2_sf, MetricsError};

/// Why a comparison could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CompareError {
    /// The two models' score vectors (or scores and labels) do not pair up case by case.
    #[error("{left} has {left_len} values but {right} has {right_len}; the cases must be paired")]
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
    /// There were too few paired cases for the statistic.
    #[error("{statistic} needs at least {need} paired cases, got {got}")]
    TooFew {
        /// The statistic asked for.
        statistic: &'static str,
        /// Cases needed.
        need: usize,
        /// Cases given.
        got: usize,
    },
    /// A score was NaN or infinite.
    #[error("{what}[{index}] is {value}; finite values are required")]
    NonFinite {
        /// The argument holding the value.
        what: &'static str,
        /// Its row.
        index: usize,
        /// The value found.
        value: f64,
    },
    /// An option was out of range.
    #[error("{name} is {value}; {reason}")]
    BadOption {
        /// The option.
        name: &'static str,
        /// Its value.
        value: f64,
        /// The allowed range.
        reason: &'static str,
    },
    /// A metric underneath failed (labels, bins, one class only, ...).
    #[error(transparent)]
    Metric(#[from] MetricsError),
}

/// Checks that the champion's and challenger's vectors pair up, hold at least `min` cases, and are finite.
pub(crate) fn check_pair(
    statistic: &'static str,
    champion: &[f64],
    challenger: &[f64],
    min: usize,
) -> Result<(), CompareError> {
    if champion.len() != challenger.len() {
        return Err(CompareError::LengthMismatch {
            left: "champion",
            left_len: champion.len(),
            right: "challenger",
            right_len: challenger.len(),
        });
    }
    if champion.len() < min {
        return Err(CompareError::TooFew {
            statistic,
            need: min,
            got: champion.len(),
        });
    }
    for (what, xs) in [("champion", champion), ("challenger", challenger)] {
        if let Some(index) = xs.iter().position(|x| !x.is_finite()) {
            return Err(CompareError::NonFinite {
                what,
                index,
                value: xs[index],
            });
        }
    }
    Ok(())
}

/// Two-sided p-value of a standard normal statistic, `P(|Z| >= |z|) = erfc(|z| / sqrt 2)`.
///
/// Computed as the chi-square survival function with one degree of freedom at `z^2` (since `Z^2` is chi-square with
/// one degree of freedom), which [`chi2_sf`] evaluates with relative accuracy in the far tail. Reference:
/// `2 * scipy.stats.norm.sf(abs(z))`.
pub fn normal_two_sided_p(z: f64) -> f64 {
    if z.is_nan() {
        return f64::NAN;
    }
    // chi2_sf only fails for bad degrees of freedom or NaN, both excluded here.
    chi2_sf(z * z, 1.0).unwrap_or(f64::NAN).clamp(0.0, 1.0)
}

/// A test statistic with its normal-approximation p-value, or neither when the standard error is zero (for instance
/// two identical models), where the statistic is undefined.
pub fn z_and_p(estimate: f64, standard_error: f64) -> (Option<f64>, Option<f64>) {
    if standard_error > 0.0 && standard_error.is_finite() {
        let z = estimate / standard_error;
        (Some(z), Some(normal_two_sided_p(z)))
    } else {
        (None, None)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_two_sided_p_known_points() {
        // 1.959963984540054 is the 97.5% point of the standard normal (scipy.stats.norm.ppf(0.975), SciPy 1.17.1),
        // so its two-sided tail is 0.05; at 0 the tail is 1.
        assert!((normal_two_sided_p(1.959963984540054) - 0.05).abs() < 1e-12);
        assert!((normal_two_sided_p(-1.959963984540054) - 0.05).abs() < 1e-12);
        assert_eq!(normal_two_sided_p(0.0), 1.0);
        // erfc(5 / sqrt 2) = 5.733031437583866e-07 (2 * scipy.stats.norm.sf(5), SciPy 1.17.1).
        assert!((normal_two_sided_p(5.0) / 5.733031437583866e-07 - 1.0).abs() < 1e-10);
        assert!(normal_two_sided_p(f64::NAN).is_nan());
    }

    #[test]
    fn pairs_are_checked() {
        assert!(matches!(
            check_pair("x", &[1.0], &[1.0, 2.0], 1),
            Err(CompareError::LengthMismatch { .. })
        ));
        assert!(matches!(
            check_pair("x", &[1.0], &[1.0], 2),
            Err(CompareError::TooFew {
                need: 2,
                got: 1,
                ..
            })
        ));
        assert!(matches!(
            check_pair("x", &[1.0, 2.0], &[1.0, f64::INFINITY], 1),
            Err(CompareError::NonFinite {
                what: "challenger",
                index: 1,
                ..
            })
        ));
    }
}
