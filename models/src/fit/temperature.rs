//! Temperature scaling (Guo, Pleiss, Sun and Weinberger 2017, "On calibration of modern neural networks", ICML):
//! calibrated log-odds `h / t`, with `t > 0` chosen by maximum likelihood on the labels.
//!
//! We search the inverse temperature `s = 1/t`: the loss `sum_i softplus(-(2 y_i - 1) s h_i)` is convex in `s`,
//! with derivative `sum_i (sigmoid(s h_i) - y_i) h_i`. Its root is bracketed (0 and a doubling upper bound) and
//! found by Newton steps that fall back to bisection whenever they leave the bracket, to rounding level.
//!
//! scikit-learn 1.9.1's `CalibratedClassifierCV(method="temperature")` solves the same problem: it feeds a binary
//! score as the pair (-h, h) to a softmax and reports `beta_` with `p = sigmoid(2 beta_ h)`, so `t = 1/(2 beta_)`;
//! it searches `ln beta_` in [-10, 10] with a bounded Brent method. The optima coincide inside those bounds.

use super::{check_holdout, FitError, Method};
use crate::calibration::Calibration;
use crate::link::sigmoid;

const MAX_ITERATIONS: usize = 400;
/// Above this inverse temperature the likelihood is still rising: the scores separate the classes at 0.
const MAX_INVERSE_TEMPERATURE: f64 = 1e12;

/// Fits `h / t` to log-odds `h` and 0/1 labels `y`; returns [`Calibration::Temperature`].
///
/// Errors: those of [`check_holdout`]; [`FitError::NoPositiveRelation`] when the loss is smallest at `1/t <= 0`
/// (the scores' sign does not agree with the labels on balance); [`FitError::Separable`] when the sign of every
/// score agrees with its label, so the likelihood rises without bound as `t` falls to 0.
pub fn fit_temperature(h: &[f64], y: &[f64]) -> Result<Calibration, FitError> {
    let (labels, _) = check_holdout(h, y)?;
    let t: Vec<f64> = labels.iter().map(|&b| f64::from(u8::from(b))).collect();
    let deriv = |s: f64| -> (f64, f64) {
        let (mut g, mut curv) = (0.0, 0.0);
        for (&hi, &ti) in h.iter().zip(&t) {
            let p = sigmoid(s * hi);
            g += (p - ti) * hi;
            curv += p * (1.0 - p) * hi * hi;
        }
        (g, curv)
    };
    // Every non-zero score on its label's side of 0: the likelihood rises without bound as t falls to 0.
    if h.iter()
        .zip(&labels)
        .all(|(&hi, &b)| hi == 0.0 || (hi > 0.0) == b)
    {
        return Err(FitError::Separable {
            method: Method::Temperature,
        });
    }
    let (g0, _) = deriv(0.0);
    if g0 >= 0.0 {
        return Err(FitError::NoPositiveRelation {
            method: Method::Temperature,
            slope: 0.0,
        });
    }
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    loop {
        let (g, _) = deriv(hi);
        if g > 0.0 {
            break;
        }
        if g == 0.0 {
            return Ok(Calibration::Temperature { t: 1.0 / hi });
        }
        lo = hi;
        hi *= 2.0;
        if hi > MAX_INVERSE_TEMPERATURE {
            return Err(FitError::Separable {
                method: Method::Temperature,
            });
        }
    }
    let mut s = 0.5 * (lo + hi);
    for _ in 0..MAX_ITERATIONS {
        let (g, curv) = deriv(s);
        if g == 0.0 {
            break;
        }
        if g < 0.0 {
            lo = s;
        } else {
            hi = s;
        }
        let newton = s - g / curv;
        let next = if newton > lo && newton < hi {
            newton
        } else {
            0.5 * (lo + hi)
        };
        let done = (next - s).abs() <= 4.0 * f64::EPSILON * s || hi - lo <= 4.0 * f64::EPSILON * hi;
        s = next;
        if done {
            return Ok(Calibration::Temperature { t: 1.0 / s });
        }
    }
    if hi - lo <= 1e-12 * hi {
        return Ok(Calibration::Temperature { t: 1.0 / s });
    }
    Err(FitError::NotConverged {
        method: Method::Temperature.as_str(),
        iterations: MAX_ITERATIONS,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn overconfident_scores_get_a_temperature_above_one() {
        // Log-odds that are twice the truth: labels drawn so that each score's share of positives is
        // sigmoid(h / 2) exactly (100 rows per score); the fitted temperature must be 2 (Guo et al. 2017's use).
        let mut h = Vec::new();
        let mut y = Vec::new();
        for i in 0..9 {
            let s = -4.0 + i as f64;
            let k = (sigmoid(s / 2.0) * 100.0).round() as usize;
            for j in 0..100 {
                h.push(s);
                y.push(if j < k { 1.0 } else { 0.0 });
            }
        }
        let Calibration::Temperature { t } = fit_temperature(&h, &y).unwrap() else {
            panic!()
        };
        assert!((t - 2.0).abs() < 0.02, "{t}");
    }

    #[test]
    fn sign_agreeing_scores_are_separable_and_reversed_scores_are_refused() {
        let h = [-2.0, -1.0, 1.0, 2.0];
        assert_eq!(
            fit_temperature(&h, &[0.0, 0.0, 1.0, 1.0]),
            Err(FitError::Separable {
                method: Method::Temperature
            })
        );
        assert!(matches!(
            fit_temperature(&h, &[1.0, 0.0, 1.0, 0.0]),
            Err(FitError::NoPositiveRelation { .. })
        ));
    }
}
