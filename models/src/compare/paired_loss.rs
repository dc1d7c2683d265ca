//! Paired loss differences and the Diebold-Mariano test of equal predictive accuracy.
//!
//! Diebold and Mariano (1995), "Comparing predictive accuracy", J. Business & Economic Statistics 13: with per-case
//! loss differences `d_t = L(challenger)_t - L(champion)_t` on the same cases, the statistic
//! `DM = mean(d) / sqrt(V / n)` is asymptotically standard normal when both models forecast equally well, with `V`
//! an estimate of the long-run variance of `d`. Two estimators are offered ([`VarianceEstimator`]):
//! - [`VarianceEstimator::Independent`]: the cases are one-step-ahead and independent of one another (separate
//!   requests), so `V` is the ordinary sample variance with divisor `n - 1`. `DM` is then exactly the paired
//!   t-statistic (`scipy.stats.ttest_rel(...).statistic`), judged against the normal rather than Student's t;
//! - [`VarianceEstimator::NeweyWest`]: when neighbouring cases may be correlated (bursts from one source),
//!   `V = g_0 + 2 sum_{k=1}^{L} (1 - k / (L + 1)) g_k` with autocovariances `g_k = (1/n) sum_t (d_t - mean)
//!   (d_{t-k} - mean)` and Bartlett weights (Newey and West 1987, "A simple, positive semi-definite,
//!   heteroskedasticity and autocorrelation consistent covariance matrix", Econometrica 55). Reference:
//!   statsmodels `OLS(d, 1).fit(cov_type="HAC", cov_kwds={"maxlags": L, "use_correction": False})`.
//!
//! The p-value is two-sided, from the standard normal ([`normal_two_sided_p`](super::normal_two_sided_p)).
//! Log-loss is taken from log-odds with the stable softplus form ([`crate::metrics::log_loss_term_pm1`]).

use super::{check_pair, z_and_p, CompareError};
use crate::metrics::{log_loss_term_pm1, Labels};

/// How the variance of the mean difference is estimated.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VarianceEstimator {
    /// Independent cases: sample variance (divisor `n - 1`) over `n`.
    Independent,
    /// Newey-West (Bartlett kernel) long-run variance with this many lags, over `n`; lag 0 is the sample variance
    /// with divisor `n`.
    NeweyWest {
        /// Number of autocovariance lags, below the number of cases.
        lag: usize,
    },
}

impl VarianceEstimator {
    /// A short name for reports: `independent` or `newey-west(L)`.
    pub fn label(&self) -> String {
        match self {
            VarianceEstimator::Independent => "independent".to_string(),
            VarianceEstimator::NeweyWest { lag } => format!("newey-west({lag})"),
        }
    }
}

/// A test that the mean paired difference is zero.
#[derive(Debug, Clone, PartialEq)]
pub struct PairedTest {
    /// Number of paired cases.
    pub cases: usize,
    /// Mean difference, challenger minus champion (negative favours the challenger for a loss).
    pub mean: f64,
    /// Standard error of the mean difference.
    pub standard_error: f64,
    /// `mean / standard_error`; `None` when the standard error is zero (every difference equal).
    pub statistic: Option<f64>,
    /// Two-sided p-value of the statistic under the standard normal; `None` with the statistic.
    pub p_value: Option<f64>,
    /// The variance estimator used.
    pub estimator: VarianceEstimator,
}

/// Lag of the Newey-West estimator by the rule `floor(4 (n / 100)^(2/9))`, a common automatic choice (attributed to
/// Newey and West 1994, "Automatic lag selection in covariance matrix estimation", Review of Economic Studies 61;
/// from memory); capped at `n - 1`.
pub fn newey_west_lag(cases: usize) -> usize {
    let lag = (4.0 * (cases as f64 / 100.0).powf(2.0 / 9.0)).floor() as usize;
    lag.min(cases.saturating_sub(1))
}

/// Per-case log-loss differences `L(challenger) - L(champion)` (natural log) from the two models' log-odds.
///
/// Errors: different lengths, no case, non-finite log-odds, a label other than 0/1.
pub fn log_loss_differences<L: Labels + ?Sized>(
    champion: &[f64],
    challenger: &[f64],
    labels: &L,
) -> Result<Vec<f64>, CompareError> {
    let y = labels.to_bools()?;
    check_pair("log-loss difference", champion, challenger, 1)?;
    if y.len() != champion.len() {
        return Err(CompareError::LengthMismatch {
            left: "log-odds",
            left_len: champion.len(),
            right: "labels",
            right_len: y.len(),
        });
    }
    Ok(champion
        .iter()
        .zip(challenger)
        .zip(y.iter())
        .map(|((&a, &b), &yi)| log_loss_term_pm1(b, yi) - log_loss_term_pm1(a, yi))
        .collect())
}

/// Diebold-Mariano test that the mean of the paired `differences` is zero.
///
/// Errors: fewer than two differences, a non-finite difference, a Newey-West lag not below the number of cases.
pub fn diebold_mariano(
    differences: &[f64],
    estimator: VarianceEstimator,
) -> Result<PairedTest, CompareError> {
    check_pair("Diebold-Mariano test", differences, differences, 2)?;
    let n = differences.len();
    let nf = n as f64;
    let mean = differences.iter().sum::<f64>() / nf;
    let centred: Vec<f64> = differences.iter().map(|d| d - mean).collect();
    let sum_sq: f64 = centred.iter().map(|c| c * c).sum();
    let long_run = match estimator {
        VarianceEstimator::Independent => sum_sq / (nf - 1.0),
        VarianceEstimator::NeweyWest { lag } => {
            if lag >= n {
                return Err(CompareError::BadOption {
                    name: "Newey-West lag",
                    value: lag as f64,
                    reason: "must be below the number of cases",
                });
            }
            let mut v = sum_sq / nf;
            for k in 1..=lag {
                let gamma: f64 = centred[k..]
                    .iter()
                    .zip(&centred[..n - k])
                    .map(|(a, b)| a * b)
                    .sum::<f64>()
                    / nf;
                v += 2.0 * (1.0 - k as f64 / (lag as f64 + 1.0)) * gamma;
            }
            // Bartlett weights keep v >= 0 in exact arithmetic; guard against rounding below zero.
            v.max(0.0)
        }
    };
    let standard_error = (long_run / nf).sqrt();
    let (statistic, p_value) = z_and_p(mean, standard_error);
    Ok(PairedTest {
        cases: n,
        mean,
        standard_error,
        statistic,
        p_value,
        estimator,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn independent_hand_computed() {
        // d = [1, 2, 3, 6]: mean 3, centred [-2, -1, 0, 3], sum of squares 14, s^2 = 14/3, se = sqrt(14/12).
        let t = diebold_mariano(&[1.0, 2.0, 3.0, 6.0], VarianceEstimator::Independent).unwrap();
        assert_eq!(t.mean, 3.0);
        assert!((t.standard_error - (14.0f64 / 12.0).sqrt()).abs() < 1e-15);
        assert!((t.statistic.unwrap() - 3.0 / (14.0f64 / 12.0).sqrt()).abs() < 1e-14);
    }

    #[test]
    fn newey_west_hand_computed() {
        // Same d, lag 1: g0 = 14/4 = 3.5; g1 = ((-1)(-2) + 0(-1) + 3(0)) / 4 = 0.5; weight 1 - 1/2 = 0.5;
        // V = 3.5 + 2 * 0.5 * 0.5 = 4; se = sqrt(4 / 4) = 1.
        let t = diebold_mariano(
            &[1.0, 2.0, 3.0, 6.0],
            VarianceEstimator::NeweyWest { lag: 1 },
        )
        .unwrap();
        assert!((t.standard_error - 1.0).abs() < 1e-15);
        assert!(matches!(
            diebold_mariano(&[1.0, 2.0], VarianceEstimator::NeweyWest { lag: 2 }),
            Err(CompareError::BadOption { .. })
        ));
    }

    #[test]
    fn equal_differences_have_no_statistic() {
        let t = diebold_mariano(&[0.5, 0.5, 0.5], VarianceEstimator::Independent).unwrap();
        assert_eq!(
            (t.standard_error, t.statistic, t.p_value),
            (0.0, None, None)
        );
        assert!(matches!(
            diebold_mariano(&[0.5], VarianceEstimator::Independent),
            Err(CompareError::TooFew { need: 2, .. })
        ));
    }

    #[test]
    fn log_loss_differences_from_log_odds() {
        // Positive case: champion h = 0 (loss ln 2), challenger h = 40 (loss ln(1 + e^-40), about 4.25e-18).
        let d = log_loss_differences(&[0.0], &[40.0], &[true]).unwrap();
        let want = (-40.0f64).exp().ln_1p() - std::f64::consts::LN_2;
        assert_eq!(d, vec![want]);
        assert!(matches!(
            log_loss_differences(&[0.0, 1.0], &[0.0, 1.0], &[1u8]),
            Err(CompareError::LengthMismatch { .. })
        ));
    }

    #[test]
    fn lag_rule() {
        // 4 (n/100)^(2/9): n = 100 -> 4; n = 1000 -> 4 * 10^(2/9) = 6.67 -> 6; capped at n - 1.
        assert_eq!(newey_west_lag(100), 4);
        assert_eq!(newey_west_lag(1000), 6);
        // n = 3: 4 * 0.03^(2/9) = 1.83 -> 1; n = 1: 1.44 -> 1, capped at 0.
        assert_eq!(newey_west_lag(3), 1);
        assert_eq!(newey_west_lag(1), 0);
        assert_eq!(newey_west_lag(0), 0);
    }
}
