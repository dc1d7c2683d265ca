//! Platt (1999) sigmoid: calibrated log-odds `a h + b`, fitted by maximum likelihood.
//!
//! Platt, "Probabilistic outputs for support vector machines and comparisons to regularized likelihood methods"
//! (1999), section 2.2, fits against smoothed targets `(N+ + 1)/(N+ + 2)` for positives and `1/(N- + 2)` for
//! negatives, a prior that keeps the fit finite on separable data. scikit-learn 1.9.1's `_sigmoid_calibration`
//! (read in `sklearn/calibration.py`) uses exactly these targets, starts from Platt's point (slope 0, intercept
//! `ln((N+ + 1)/(N- + 1))`), and divides the scores by their largest magnitude when it is 30 or more; that rescaling
//! changes nothing at the optimum and our Newton fit always rescales (see [`super::newton`]). The one difference is
//! the optimiser: scikit-learn stops L-BFGS-B at a gradient of 1e-6 on the summed loss, we iterate Newton's
//! method to rounding level; the fixtures show the two agree well inside 1e-6.
//!
//! [`Targets::Labels`] fits the plain 0/1 labels instead: the maximum-likelihood logistic regression on `h`
//! (statsmodels `Logit(y, [h, 1])`). It does not exist when the scores separate the classes; that is refused.

use super::newton::{fit_logistic, NewtonFailure};
use super::{check_holdout, FitError, Method};
use crate::calibration::Calibration;

/// Which targets the sigmoid is fitted against.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Targets {
    /// Platt's (1999) smoothed targets `(N+ + 1)/(N+ + 2)` and `1/(N- + 2)`.
    Smoothed,
    /// The labels themselves.
    Labels,
}

/// Platt's (1999) targets for `positives` positive and `negatives` negative rows: `(t+, t-)`.
pub fn platt_targets(positives: usize, negatives: usize) -> (f64, f64) {
    let (np, nn) = (positives as f64, negatives as f64);
    ((np + 1.0) / (np + 2.0), 1.0 / (nn + 2.0))
}

/// Fits `a h + b` to log-odds `h` and 0/1 labels `y`; returns [`Calibration::Platt`] with `a > 0`.
///
/// Errors: those of [`check_holdout`]; [`FitError::Separable`] for unsmoothed targets on perfectly separated
/// scores; [`FitError::NoPositiveRelation`] when the best slope is not positive (the format requires `a > 0`).
pub fn fit_platt(h: &[f64], y: &[f64], targets: Targets) -> Result<Calibration, FitError> {
    let (labels, positives) = check_holdout(h, y)?;
    let negatives = labels.len() - positives;
    let method = match targets {
        Targets::Smoothed => Method::Platt,
        Targets::Labels => Method::PlattUnsmoothed,
    };
    let t: Vec<f64> = match targets {
        Targets::Smoothed => {
            let (hi, lo) = platt_targets(positives, negatives);
            labels.iter().map(|&b| if b { hi } else { lo }).collect()
        }
        Targets::Labels => {
            if separated(h, &labels) {
                return Err(FitError::Separable { method });
            }
            labels.iter().map(|&b| f64::from(u8::from(b))).collect()
        }
    };
    let start = ((positives as f64 + 1.0) / (negatives as f64 + 1.0)).ln();
    let w = fit_logistic(&[h], &t, start).map_err(|e| match e {
        NewtonFailure::Singular | NewtonFailure::NotConverged(_) => FitError::NotConverged {
            method: method.as_str(),
            iterations: super::newton::MAX_ITERATIONS,
        },
    })?;
    let (a, b) = (w[0], w[1]);
    if a.is_nan() || a <= 0.0 {
        return Err(FitError::NoPositiveRelation { method, slope: a });
    }
    Ok(Calibration::Platt { a, b })
}

/// True when one threshold splits the classes (ties at the threshold allowed): then the likelihood keeps rising as
/// the slope grows and has no maximum (quasi-complete separation, Albert and Anderson 1984, Biometrika 71).
pub(crate) fn separated(h: &[f64], labels: &[bool]) -> bool {
    let (mut min_pos, mut max_pos, mut min_neg, mut max_neg) = (
        f64::INFINITY,
        f64::NEG_INFINITY,
        f64::INFINITY,
        f64::NEG_INFINITY,
    );
    for (&v, &b) in h.iter().zip(labels) {
        if b {
            min_pos = min_pos.min(v);
            max_pos = max_pos.max(v);
        } else {
            min_neg = min_neg.min(v);
            max_neg = max_neg.max(v);
        }
    }
    max_neg <= min_pos || max_pos <= min_neg
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn targets_are_platts() {
        // Platt (1999), section 2.2: t+ = (N+ + 1)/(N+ + 2), t- = 1/(N- + 2).
        assert_eq!(platt_targets(3, 8), (4.0 / 5.0, 1.0 / 10.0));
    }

    #[test]
    fn separable_scores_are_refused_unsmoothed_and_fitted_smoothed() {
        let h = [-2.0, -1.0, 0.5, 1.0, 3.0];
        let y = [0.0, 0.0, 1.0, 1.0, 1.0];
        assert_eq!(
            fit_platt(&h, &y, Targets::Labels),
            Err(FitError::Separable {
                method: Method::PlattUnsmoothed
            })
        );
        let Calibration::Platt { a, .. } = fit_platt(&h, &y, Targets::Smoothed).unwrap() else {
            panic!()
        };
        assert!(a.is_finite() && a > 0.0);
    }

    #[test]
    fn reversed_scores_are_refused() {
        let h = [-2.0, -1.0, 0.5, 1.0, 3.0, 0.0];
        let y = [1.0, 1.0, 0.0, 0.0, 0.0, 1.0];
        assert!(matches!(
            fit_platt(&h, &y, Targets::Smoothed),
            Err(FitError::NoPositiveRelation { .. })
        ));
    }

    #[test]
    fn smoothed_fit_satisfies_the_score_equations() {
        // At the maximum of Platt's likelihood, sum (p_i - t_i) = 0 and sum (p_i - t_i) h_i = 0.
        let h: Vec<f64> = (0..40).map(|i| (i as f64 - 20.0) / 5.0).collect();
        let y: Vec<f64> = (0..40)
            .map(|i| if (i * 7) % 11 < 2 + i / 6 { 1.0 } else { 0.0 })
            .collect();
        let Calibration::Platt { a, b } = fit_platt(&h, &y, Targets::Smoothed).unwrap() else {
            panic!()
        };
        let np = y.iter().sum::<f64>() as usize;
        let (tp, tn) = platt_targets(np, 40 - np);
        let (mut g0, mut g1) = (0.0, 0.0);
        for (hi, yi) in h.iter().zip(&y) {
            let r = crate::link::sigmoid(a * hi + b) - if *yi == 1.0 { tp } else { tn };
            g0 += r;
            g1 += r * hi;
        }
        assert!(g0.abs() < 1e-12 && g1.abs() < 1e-12, "{g0} {g1}");
    }
}
