//! Proper scoring rules: log-loss computed from log-odds, the Brier score and its decomposition.
//!
//! Log-loss (the negative log-likelihood of Bernoulli outcomes) is `-[y ln p + (1 - y) ln(1 - p)]` for `y` in
//! {0, 1}; written with `s = 2y - 1` in {-1, +1} and the log-odds `h` it is `ln(1 + e^(-s h)) = softplus(-s h)`.
//! That form is evaluated here, never `-ln p` of a rounded probability and never `softplus(h) - y h`, which
//! cancels to 0 where the true loss is tiny (about 4e-18 at `h = 40`). `sklearn.metrics.log_loss` clips `p`, so
//! it caps one example's loss near 36; on ordinary data the two agree.

use super::calibration_table::{assign_bins, BinStrategy};
use super::{all_finite, all_probabilities, paired, Labels, MetricsError};
use crate::link::softplus;

/// Log-loss of one example from its log-odds `h` and label in {-1, +1} coding: `ln(1 + e^(-s h))`, with `s = +1`
/// for a positive and `-1` for a negative. Exact for every finite `h` (it is 0 only where the true value
/// underflows, e.g. `e^-800`).
pub fn log_loss_term_pm1(log_odds: f64, positive: bool) -> f64 {
    let s = if positive { 1.0 } else { -1.0 };
    softplus(-s * log_odds)
}

/// Per-example log-loss (natural log) from log-odds; see [`log_loss_term_pm1`].
///
/// Errors: empty input, length mismatch, non-finite log-odds, a label other than 0/1.
pub fn log_loss_terms<L: Labels + ?Sized>(
    log_odds: &[f64],
    labels: &L,
) -> Result<Vec<f64>, MetricsError> {
    let y = paired("log_odds", log_odds, labels)?;
    all_finite("log_odds", log_odds)?;
    Ok(log_odds
        .iter()
        .zip(y.iter())
        .map(|(&h, &yi)| log_loss_term_pm1(h, yi))
        .collect())
}

/// Mean log-loss (natural log) from log-odds, the value `sklearn.metrics.log_loss` reports on the matching
/// probabilities away from its clipping.
pub fn log_loss_from_log_odds<L: Labels + ?Sized>(
    log_odds: &[f64],
    labels: &L,
) -> Result<f64, MetricsError> {
    let terms = log_loss_terms(log_odds, labels)?;
    Ok(terms.iter().sum::<f64>() / terms.len() as f64)
}

/// Brier score: the mean of `(p - y)^2` (Brier 1950, "Verification of forecasts expressed in terms of
/// probability", Monthly Weather Review 78); reference `sklearn.metrics.brier_score_loss`.
pub fn brier_score<L: Labels + ?Sized>(
    probabilities: &[f64],
    labels: &L,
) -> Result<f64, MetricsError> {
    let y = paired("probabilities", probabilities, labels)?;
    all_probabilities("probabilities", probabilities)?;
    let sum: f64 = probabilities
        .iter()
        .zip(y.iter())
        .map(|(&p, &yi)| {
            let d = p - f64::from(u8::from(yi));
            d * d
        })
        .sum();
    Ok(sum / probabilities.len() as f64)
}

/// The Brier score split over probability bins so that
/// `brier = reliability - resolution + uncertainty + within_bin_variance - within_bin_covariance` exactly.
///
/// Murphy (1973), "A new vector partition of the probability score", J. Applied Meteorology 12, gives
/// reliability, resolution and uncertainty for forecasts that take a few values; for continuous forecasts grouped
/// into bins the identity needs the two within-bin terms of Stephenson, Coelho and Jolliffe (2008), "Two extra
/// components in the Brier score decomposition", Weather and Forecasting 23. With bins `k` of `n_k` forecasts,
/// bin mean forecast `f_k`, bin outcome rate `o_k`, overall rate `o` and `N` forecasts:
/// - reliability `= (1/N) sum_k n_k (f_k - o_k)^2`,
/// - resolution `= (1/N) sum_k n_k (o_k - o)^2`,
/// - uncertainty `= o (1 - o)`,
/// - within-bin variance `= (1/N) sum_k sum_{i in k} (f_i - f_k)^2`,
/// - within-bin covariance `= (2/N) sum_k sum_{i in k} (o_i - o_k)(f_i - f_k)`.
#[derive(Debug, Clone, PartialEq)]
pub struct BrierDecomposition {
    /// The Brier score itself, computed directly.
    pub brier: f64,
    /// Reliability (calibration) term; smaller is better.
    pub reliability: f64,
    /// Resolution term; larger is better.
    pub resolution: f64,
    /// Uncertainty of the outcomes, `o (1 - o)`.
    pub uncertainty: f64,
    /// Within-bin variance of the forecasts.
    pub within_bin_variance: f64,
    /// Within-bin covariance of forecasts and outcomes, times two.
    pub within_bin_covariance: f64,
}

impl BrierDecomposition {
    /// `reliability - resolution + uncertainty + within_bin_variance - within_bin_covariance`, equal to
    /// [`BrierDecomposition::brier`] up to rounding.
    pub fn recomposed(&self) -> f64 {
        self.reliability - self.resolution + self.uncertainty + self.within_bin_variance
            - self.within_bin_covariance
    }
}

/// Decomposes the Brier score over the bins of `strategy` (the same bins as
/// [`calibration_table`](super::calibration_table())).
///
/// Errors: as [`brier_score`], plus a bin count of zero.
pub fn brier_decomposition<L: Labels + ?Sized>(
    probabilities: &[f64],
    labels: &L,
    strategy: BinStrategy,
) -> Result<BrierDecomposition, MetricsError> {
    let brier = brier_score(probabilities, labels)?;
    let y = labels.to_bools()?;
    let (edges, ids) = assign_bins(probabilities, strategy)?;
    let nb = edges.len() - 1;
    let mut count = vec![0.0f64; nb];
    let mut pos = vec![0.0f64; nb];
    let mut sum = vec![0.0f64; nb];
    for ((&p, &yi), &k) in probabilities.iter().zip(y.iter()).zip(&ids) {
        count[k] += 1.0;
        pos[k] += f64::from(u8::from(yi));
        sum[k] += p;
    }
    let total = probabilities.len() as f64;
    let base_rate = pos.iter().sum::<f64>() / total;
    let mean_f: Vec<f64> = sum
        .iter()
        .zip(&count)
        .map(|(s, c)| if *c > 0.0 { s / c } else { 0.0 })
        .collect();
    let mean_o: Vec<f64> = pos
        .iter()
        .zip(&count)
        .map(|(s, c)| if *c > 0.0 { s / c } else { 0.0 })
        .collect();
    let (mut rel, mut res) = (0.0, 0.0);
    for k in 0..nb {
        rel += count[k] * (mean_f[k] - mean_o[k]).powi(2);
        res += count[k] * (mean_o[k] - base_rate).powi(2);
    }
    let (mut wbv, mut wbc) = (0.0, 0.0);
    for ((&p, &yi), &k) in probabilities.iter().zip(y.iter()).zip(&ids) {
        let df = p - mean_f[k];
        wbv += df * df;
        wbc += (f64::from(u8::from(yi)) - mean_o[k]) * df;
    }
    Ok(BrierDecomposition {
        brier,
        reliability: rel / total,
        resolution: res / total,
        uncertainty: base_rate * (1.0 - base_rate),
        within_bin_variance: wbv / total,
        within_bin_covariance: 2.0 * wbc / total,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_loss_hand_values() {
        // ln 2 at h = 0 for either label; ln(1 + e^-1) for a positive at h = 1 = 0.31326168751822286 (from the
        // formula, evaluated with ln_1p by hand below).
        assert_eq!(log_loss_term_pm1(0.0, true), std::f64::consts::LN_2);
        assert_eq!(log_loss_term_pm1(0.0, false), std::f64::consts::LN_2);
        let want = (-1.0f64).exp().ln_1p();
        assert!((log_loss_term_pm1(1.0, true) - want).abs() < 1e-16);
        assert!((log_loss_term_pm1(-1.0, false) - want).abs() < 1e-16);
        let mean = log_loss_from_log_odds(&[1.0, 0.0], &[true, false]).unwrap();
        assert!((mean - (want + std::f64::consts::LN_2) / 2.0).abs() < 1e-16);
    }

    #[test]
    fn log_loss_refuses_non_finite_log_odds() {
        // NaN != NaN, so match on the variant and the row.
        assert!(matches!(
            log_loss_from_log_odds(&[0.0, f64::NAN], &[0u8, 1]),
            Err(MetricsError::NonFinite {
                what: "log_odds",
                index: 1,
                ..
            })
        ));
        assert_eq!(
            log_loss_from_log_odds(&[0.0], &[0u8, 1]),
            Err(MetricsError::LengthMismatch {
                left: "log_odds",
                left_len: 1,
                right: "labels",
                right_len: 2
            })
        );
    }

    #[test]
    fn brier_hand_values() {
        // ((0.2 - 0)^2 + (0.6 - 1)^2) / 2 = (0.04 + 0.16) / 2 = 0.1.
        assert!((brier_score(&[0.2, 0.6], &[0u8, 1]).unwrap() - 0.1).abs() < 1e-16);
    }

    #[test]
    fn decomposition_hand_values() {
        // One bin (Uniform(1)): f = [0.2, 0.6], o = [0, 1]; f_k = 0.4, o_k = 0.5 = o.
        // REL = (0.4 - 0.5)^2 = 0.01, RES = 0, UNC = 0.25, WBV = (0.04 + 0.04) / 2 = 0.04,
        // WBC = 2 * ((-0.5)(-0.2) + (0.5)(0.2)) / 2 = 0.2; 0.01 - 0 + 0.25 + 0.04 - 0.2 = 0.1 = Brier.
        let d = brier_decomposition(&[0.2, 0.6], &[0u8, 1], BinStrategy::Uniform(1)).unwrap();
        assert!((d.reliability - 0.01).abs() < 1e-15);
        assert!(d.resolution.abs() < 1e-15);
        assert!((d.uncertainty - 0.25).abs() < 1e-15);
        assert!((d.within_bin_variance - 0.04).abs() < 1e-15);
        assert!((d.within_bin_covariance - 0.2).abs() < 1e-15);
        assert!((d.recomposed() - d.brier).abs() < 1e-15);
    }
}
