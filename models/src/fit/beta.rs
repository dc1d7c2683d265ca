//! Beta calibration (Kull, Silva Filho and Flach 2017, "Beta calibration: a well-founded and easily implemented
//! improvement on logistic calibration for binary classifiers", AISTATS): calibrated log-odds
//! `a ln p - b ln(1 - p) + c` with `p = sigmoid(h)`, fitted as an unpenalised logistic regression of the labels
//! on the two columns `ln p` and `-ln(1 - p)`.
//!
//! The paper's model needs `a >= 0` and `b >= 0` (the map is then monotone). When the fit gives a negative
//! coefficient, the paper refits without that column: `a < 0` refits on `-ln(1 - p)` alone with `a = 0`, otherwise
//! `b < 0` refits on `ln p` alone with `b = 0`. If the refitted coefficient is still not positive the scores do
//! not rise with the outcome, and we refuse ([`FitError::NoPositiveRelation`]).
//!
//! The columns are computed from `h` without forming `p`: `ln p = -softplus(-h)`, `-ln(1 - p) = softplus(h)`.

use super::newton::{fit_logistic, NewtonFailure, MAX_ITERATIONS};
use super::{check_holdout, FitError, Method};
use crate::calibration::Calibration;
use crate::link::softplus;

/// Fits beta calibration to log-odds `h` and 0/1 labels `y`; returns [`Calibration::Beta`].
///
/// Errors: those of [`super::check_holdout`]; [`FitError::NotConverged`] when the likelihood has no maximum
/// (separable data) or the columns are collinear; [`FitError::NoPositiveRelation`] as above.
pub fn fit_beta(h: &[f64], y: &[f64]) -> Result<Calibration, FitError> {
    let (labels, positives) = check_holdout(h, y)?;
    let t: Vec<f64> = labels.iter().map(|&b| f64::from(u8::from(b))).collect();
    let ln_p: Vec<f64> = h.iter().map(|&v| -softplus(-v)).collect();
    let neg_ln_q: Vec<f64> = h.iter().map(|&v| softplus(v)).collect();
    let start = (positives as f64 / (labels.len() - positives) as f64).ln();
    let fail = |e: NewtonFailure| FitError::NotConverged {
        method: Method::Beta.as_str(),
        iterations: match e {
            NewtonFailure::NotConverged(n) => n,
            NewtonFailure::Singular => MAX_ITERATIONS,
        },
    };
    let w = fit_logistic(&[&ln_p, &neg_ln_q], &t, start).map_err(fail)?;
    let (a, b, c) = (w[0], w[1], w[2]);
    if a < 0.0 {
        let w = fit_logistic(&[&neg_ln_q], &t, start).map_err(fail)?;
        if w[0].is_nan() || w[0] <= 0.0 {
            return Err(FitError::NoPositiveRelation {
                method: Method::Beta,
                slope: w[0],
            });
        }
        return Ok(Calibration::Beta {
            a: 0.0,
            b: w[0],
            c: w[1],
        });
    }
    if b < 0.0 {
        let w = fit_logistic(&[&ln_p], &t, start).map_err(fail)?;
        if w[0].is_nan() || w[0] <= 0.0 {
            return Err(FitError::NoPositiveRelation {
                method: Method::Beta,
                slope: w[0],
            });
        }
        return Ok(Calibration::Beta {
            a: w[0],
            b: 0.0,
            c: w[1],
        });
    }
    Ok(Calibration::Beta { a, b, c })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::link::sigmoid;

    #[test]
    fn a_beta_shaped_truth_is_recovered() {
        // Outcome probabilities that follow a beta map exactly (a = 2, b = 0.5, c = -0.3) as fractional targets
        // written as 0/1 rows: 1000 rows per score, round(10 q) positives.
        let (a0, b0, c0) = (2.0, 0.5, -0.3);
        let mut h = Vec::new();
        let mut y = Vec::new();
        for i in 0..41 {
            let s = -4.0 + 0.2 * i as f64;
            let p = sigmoid(s);
            let q = sigmoid(a0 * p.ln() - b0 * (1.0 - p).ln() + c0);
            let k = (q * 1000.0).round() as usize;
            for j in 0..1000 {
                h.push(s);
                y.push(if j < k { 1.0 } else { 0.0 });
            }
        }
        let Calibration::Beta { a, b, c } = fit_beta(&h, &y).unwrap() else {
            panic!()
        };
        // Rounding each share to 1/1000 moves the fit a little; 0.05 is ample and still fails on a wrong model.
        assert!(
            (a - a0).abs() < 0.05 && (b - b0).abs() < 0.05 && (c - c0).abs() < 0.05,
            "{a} {b} {c}"
        );
    }
}
