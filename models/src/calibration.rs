//! Calibration maps, applied to the log-odds. Each returns calibrated log-odds, which may be infinite
//! (an isotonic map that reaches 0 or 1), never NaN for a non-NaN input.
//!
//! Fitting the maps from a holdout set is offline work and lives elsewhere; this module only applies them.

use crate::link::{logit, sigmoid, softplus};

/// Which value an isotonic map takes as its input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IsotonicInput {
    /// The uncalibrated log-odds.
    LogOdds,
    /// The uncalibrated probability, `sigmoid(log_odds)`.
    Probability,
}

/// A validated calibration map.
#[derive(Debug, Clone, PartialEq)]
pub enum Calibration {
    /// Platt (1999) sigmoid: calibrated log-odds `a * h + b`.
    Platt { a: f64, b: f64 },
    /// Isotonic map by linear interpolation between fitted points, clipped outside them (Zadrozny and Elkan 2002;
    /// the interpolation is that of scikit-learn's `IsotonicRegression.predict`). `x` strictly increasing,
    /// `y` non-decreasing in [0, 1].
    Isotonic {
        input: IsotonicInput,
        x: Vec<f64>,
        y: Vec<f64>,
    },
    /// Beta calibration (Kull, Silva Filho and Flach 2017): `a ln p - b ln(1 - p) + c`.
    Beta { a: f64, b: f64, c: f64 },
    /// Temperature scaling (Guo, Pleiss, Sun and Weinberger 2017): `h / t`.
    Temperature { t: f64 },
}

impl Calibration {
    /// Maps uncalibrated log-odds `h` to calibrated log-odds.
    pub fn apply(&self, h: f64) -> f64 {
        match self {
            Calibration::Platt { a, b } => a * h + b,
            Calibration::Temperature { t } => h / t,
            Calibration::Beta { a, b, c } => {
                // ln p = -softplus(-h), ln(1 - p) = -softplus(h): exact at any h.
                // Guard the 0 * inf case: a zero coefficient removes its term entirely.
                let lp = if *a == 0.0 { 0.0 } else { -a * softplus(-h) };
                let lq = if *b == 0.0 { 0.0 } else { b * softplus(h) };
                lp + lq + c
            }
            Calibration::Isotonic { input, x, y } => {
                let v = match input {
                    IsotonicInput::LogOdds => h,
                    IsotonicInput::Probability => sigmoid(h),
                };
                logit(interpolate(x, y, v))
            }
        }
    }
}

/// Linear interpolation through `(x, y)`, clipped to the end values outside `[x[0], x[last]]`.
/// `x` must be strictly increasing and non-empty (the loader guarantees it).
fn interpolate(x: &[f64], y: &[f64], v: f64) -> f64 {
    let (Some(&x0), Some(&xn), Some(&y0), Some(&yn)) = (x.first(), x.last(), y.first(), y.last())
    else {
        return f64::NAN;
    };
    if v.is_nan() {
        return f64::NAN;
    }
    if v <= x0 {
        return y0;
    }
    if v >= xn {
        return yn;
    }
    // First index with x[i] > v; 1 <= i <= len - 1 here.
    let i = x.partition_point(|&xi| xi <= v);
    let (xa, xb, ya, yb) = (x[i - 1], x[i], y[i - 1], y[i]);
    if v == xa {
        return ya;
    }
    ya + (yb - ya) * ((v - xa) / (xb - xa))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn interpolation_matches_hand_values() {
        let x = [0.0, 1.0, 3.0];
        let y = [0.1, 0.3, 0.9];
        assert_eq!(interpolate(&x, &y, -5.0), 0.1);
        assert_eq!(interpolate(&x, &y, 9.0), 0.9);
        assert_eq!(interpolate(&x, &y, 1.0), 0.3);
        assert!((interpolate(&x, &y, 2.0) - 0.6).abs() < 1e-15);
        assert!((interpolate(&x, &y, 0.5) - 0.2).abs() < 1e-15);
    }

    #[test]
    fn beta_with_a_equal_b_equal_one_is_identity() {
        // a = b = 1, c = 0: ln p - ln(1-p) = logit(p) = h (Kull et al. 2017, the map contains the identity).
        let m = Calibration::Beta {
            a: 1.0,
            b: 1.0,
            c: 0.0,
        };
        for h in [-800.0, -30.0, -1.5, 0.0, 2.0, 40.0, 800.0] {
            let got = m.apply(h);
            assert!(
                (got - h).abs() <= 1e-12 * h.abs().max(1.0),
                "h={h} got={got}"
            );
        }
    }
}
