//! Monitoring statistics beyond the scoring rules: tests with a stated error rate that a route's owner can read at
//! any time.
//!
//! - [`calibration_test`](mod@calibration_test): Spiegelhalter's (1986) z-test, and calibration-in-the-large and
//!   the calibration slope by logistic recalibration (Cox 1958), with Wald intervals;
//! - [`sequential`]: always-valid comparisons of champion and challenger (mixture sequential probability ratio
//!   test and the matching confidence sequence; Johari, Pekelis and Walsh 2017; Howard, Ramdas, McAuliffe and
//!   Sekhon 2021), which may be looked at after every outcome without raising the false-verdict rate;
//! - [`delay`]: the Kaplan-Meier estimate of the delay from prediction to positive outcome, with Greenwood's
//!   variance, and the eventual positive rate of windows whose outcomes are still arriving;
//! - [`eventual`]: the eventual log-loss, Brier score, positive rate and calibration table of such a window, scaled
//!   up per calibration bin by the delay distribution (Lawless 1994), with delta-method intervals.
//!
//! Every function is pure; errors are [`MonitorError`] and name the argument and row.

pub mod calibration_test;
pub mod delay;
pub mod eventual;
pub mod sequential;

pub use calibration_test::{
    logistic_recalibration, logistic_recalibration_by, spiegelhalter_z, spiegelhalter_z_by,
    Coefficient, LikelihoodRatioTest, Recalibration, Spiegelhalter,
};
pub use delay::{
    eventual_rate, kaplan_meier, DelayObservation, EventualRate, KaplanMeier, KaplanMeierSteps,
    WindowCase,
};
pub use eventual::{
    eventual_figures, eventual_figures_by, Estimate, EventualBin, EventualFigures, ScoredCase,
};
pub use sequential::{
    always_valid_verdict, auc_sequence, loss_sequence, normal_mixture, ConfidenceSequence,
    SequentialOptions,
};

use crate::compare::normal_two_sided_p;
use crate::metrics::MetricsError;

/// Why a monitoring statistic could not be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum MonitorError {
    /// An input failed the common checks (empty, lengths, labels, non-finite values, one class).
    #[error(transparent)]
    Metric(#[from] MetricsError),
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
    /// The maximum-likelihood fit does not exist or could not be found.
    #[error("{statistic}: {reason}")]
    NoFit {
        /// The statistic asked for.
        statistic: &'static str,
        /// Why.
        reason: &'static str,
    },
}

/// The upper `tail` point of the standard normal: `z` with `P(Z > z) = tail`, for `0 < tail < 1`.
///
/// Found by bisection on the two-sided tail [`normal_two_sided_p`] (erfc through the chi-square survival function),
/// so it is as accurate as that function; 200 halvings of [-40, 40] reach the spacing of `f64`. Reference:
/// `scipy.stats.norm.isf(tail)`. Errors: `tail` not in (0, 1).
pub fn normal_upper_point(tail: f64) -> Result<f64, MonitorError> {
    if !(tail > 0.0 && tail < 1.0) {
        return Err(MonitorError::BadOption {
            name: "normal tail probability",
            value: tail,
            reason: "must lie strictly between 0 and 1",
        });
    }
    // P(Z > z) for any z, from the two-sided tail.
    let upper = |z: f64| {
        let two = normal_two_sided_p(z);
        if z >= 0.0 {
            two / 2.0
        } else {
            1.0 - two / 2.0
        }
    };
    let (mut lo, mut hi) = (-40.0f64, 40.0f64);
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mid == lo || mid == hi {
            break;
        }
        if upper(mid) > tail {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    Ok(0.5 * (lo + hi))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn normal_points_match_scipy() {
        // scipy.stats.norm.isf(0.025) = 1.9599639845400545, isf(0.005) = 2.575829303548901,
        // isf(0.9) = -1.2815515655446004 (SciPy 1.17.1).
        for (tail, want) in [
            (0.025, 1.9599639845400545),
            (0.005, 2.575829303548901),
            (0.9, -1.2815515655446004),
        ] {
            let z = normal_upper_point(tail).unwrap();
            assert!((z - want).abs() < 1e-12, "{tail}: {z} vs {want}");
        }
        assert!(normal_upper_point(0.0).is_err());
        assert!(normal_upper_point(1.0).is_err());
        assert!(normal_upper_point(f64::NAN).is_err());
    }
}
