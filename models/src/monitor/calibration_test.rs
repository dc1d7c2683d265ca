//! Tests of calibration on matured outcomes.
//!
//! - **Spiegelhalter's z** (Spiegelhalter 1986, "Probabilistic prediction in patient management and clinical
//!   trials", Statistics in Medicine 5): under the hypothesis that every `p_i` is the true probability of its case,
//!   `sum (y_i - p_i)(1 - 2 p_i)` has mean 0 and variance `sum (1 - 2 p_i)^2 p_i (1 - p_i)`; their ratio is
//!   approximately standard normal. It is the Brier score's departure from its expectation, standardised.
//! - **Logistic recalibration** (Cox 1958, "Two further applications of a model for binary regression", Biometrika
//!   45): fit `logit P(y = 1) = a + b h` on the served log-odds `h`. A calibrated model has `a = 0, b = 1`; `b < 1`
//!   means the scores are too extreme (overfitting), `b > 1` too timid. **Calibration-in-the-large** is `a` in the
//!   model with the slope held at 1 (`h` as an offset): positive when the model under-predicts overall. Both fits
//!   are maximum likelihood by Newton's method (iteratively reweighted least squares; [`crate::fit::newton`] for the
//!   two-parameter fit, a safeguarded one-dimensional Newton search for the offset fit), with standard errors from
//!   the inverse Fisher information `(X' W X)^-1`, `W = diag(p_i (1 - p_i))` at the estimate, and Wald intervals
//!   `estimate +- z_{(1+level)/2} se`. Cox's joint test of `a = 0, b = 1` is the likelihood-ratio statistic
//!   against the chi-square with 2 degrees of freedom. References: statsmodels `Logit(y, [1, h])` for `(a, b)`,
//!   `GLM(y, 1, family=Binomial(), offset=h)` for calibration-in-the-large.

use super::{normal_upper_point, MonitorError};
use crate::compare::normal_two_sided_p;
use crate::fit::newton::{fit_logistic_by, NewtonFailure};
use crate::link::sigmoid;
use crate::metrics::{chi2_sf, log_loss_term_pm1, Labels, MetricsError};

/// Spiegelhalter's z-test of calibration.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Spiegelhalter {
    /// Number of cases.
    pub cases: usize,
    /// `sum (y_i - p_i)(1 - 2 p_i)`.
    pub numerator: f64,
    /// `sum (1 - 2 p_i)^2 p_i (1 - p_i)`, its variance under calibration.
    pub variance: f64,
    /// `numerator / sqrt(variance)`; `None` when the variance is 0 (every `p_i` is 0, 1/2 or 1).
    pub z: Option<f64>,
    /// Two-sided p-value from the standard normal; `None` with `z`.
    pub p_value: Option<f64>,
}

/// Spiegelhalter's z from probabilities and labels.
///
/// Errors: no cases, a length mismatch, a probability outside [0, 1] (NaN included), a label other than 0/1.
pub fn spiegelhalter_z<L: Labels + ?Sized>(
    probabilities: &[f64],
    labels: &L,
) -> Result<Spiegelhalter, MonitorError> {
    let y = labels.to_bools()?;
    if probabilities.is_empty() {
        return Err(MetricsError::Empty {
            what: "probabilities",
        }
        .into());
    }
    if probabilities.len() != y.len() {
        return Err(MetricsError::LengthMismatch {
            left: "probabilities",
            left_len: probabilities.len(),
            right: "labels",
            right_len: y.len(),
        }
        .into());
    }
    let y: &[bool] = &y;
    spiegelhalter_z_by(|each| {
        for (&p, &yi) in probabilities.iter().zip(y) {
            each(p, yi);
        }
    })
}

/// [`spiegelhalter_z`] over pairs it does not hold: `pass(each)` calls `each(probability, label)` for every pair
/// (read once). The arithmetic is [`spiegelhalter_z`]'s, which uses it.
pub fn spiegelhalter_z_by(
    pass: impl FnOnce(&mut dyn FnMut(f64, bool)),
) -> Result<Spiegelhalter, MonitorError> {
    let (mut numerator, mut variance) = (0.0, 0.0);
    let mut cases = 0usize;
    let mut outside: Option<(usize, f64)> = None;
    pass(&mut |p, yi| {
        if !(0.0..=1.0).contains(&p) {
            outside.get_or_insert((cases, p));
        }
        let t = f64::from(u8::from(yi));
        let w = 1.0 - 2.0 * p;
        numerator += (t - p) * w;
        variance += w * w * p * (1.0 - p);
        cases += 1;
    });
    if cases == 0 {
        return Err(MetricsError::Empty {
            what: "probabilities",
        }
        .into());
    }
    if let Some((index, value)) = outside {
        return Err(MetricsError::NotProbability {
            what: "probabilities",
            index,
            value,
        }
        .into());
    }
    let (z, p_value) = if variance > 0.0 {
        let z = numerator / variance.sqrt();
        (Some(z), Some(normal_two_sided_p(z)))
    } else {
        (None, None)
    };
    Ok(Spiegelhalter {
        cases,
        numerator,
        variance,
        z,
        p_value,
    })
}

/// One estimated coefficient with its Wald interval and the Wald test of its calibrated value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Coefficient {
    /// Maximum-likelihood estimate.
    pub estimate: f64,
    /// Standard error from the inverse Fisher information.
    pub standard_error: f64,
    /// Lower end of the Wald interval.
    pub lower: f64,
    /// Upper end of the Wald interval.
    pub upper: f64,
    /// The value a calibrated model has (0 for an intercept, 1 for the slope).
    pub calibrated: f64,
    /// `(estimate - calibrated) / standard_error`.
    pub z: f64,
    /// Two-sided p-value of `z`.
    pub p_value: f64,
}

impl Coefficient {
    fn new(estimate: f64, standard_error: f64, calibrated: f64, z_level: f64) -> Coefficient {
        let z = (estimate - calibrated) / standard_error;
        Coefficient {
            estimate,
            standard_error,
            lower: estimate - z_level * standard_error,
            upper: estimate + z_level * standard_error,
            calibrated,
            z,
            p_value: normal_two_sided_p(z),
        }
    }
}

/// Cox's likelihood-ratio test of `a = 0, b = 1`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LikelihoodRatioTest {
    /// `2 (loglik(a, b) - loglik(0, 1))`.
    pub statistic: f64,
    /// Degrees of freedom (2).
    pub degrees_of_freedom: usize,
    /// Chi-square tail probability.
    pub p_value: f64,
}

/// Logistic recalibration of served log-odds against outcomes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Recalibration {
    /// Number of cases.
    pub cases: usize,
    /// Of which positive.
    pub positives: usize,
    /// Confidence level of the intervals.
    pub level: f64,
    /// Calibration-in-the-large: the intercept with the slope held at 1 (calibrated value 0).
    pub in_the_large: Coefficient,
    /// The calibration slope `b` of the two-parameter fit (calibrated value 1).
    pub slope: Coefficient,
    /// The intercept `a` of the two-parameter fit (calibrated value 0).
    pub intercept: Coefficient,
    /// Cox's joint test of `a = 0, b = 1`.
    pub joint: LikelihoodRatioTest,
}

const STATISTIC: &str = "logistic recalibration";

/// Fits the recalibration models to served log-odds `h` and labels; intervals at `level` (e.g. 0.95).
///
/// Errors: no cases, a length mismatch, non-finite log-odds, a label other than 0/1, one class only, `level` not in
/// (0, 1), constant log-odds (no slope can be fitted), and log-odds that separate the classes perfectly (the
/// maximum-likelihood slope is infinite).
pub fn logistic_recalibration<L: Labels + ?Sized>(
    log_odds: &[f64],
    labels: &L,
    level: f64,
) -> Result<Recalibration, MonitorError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(MonitorError::BadOption {
            name: "confidence level",
            value: level,
            reason: "must lie strictly between 0 and 1",
        });
    }
    let y = labels.to_bools()?;
    if log_odds.is_empty() {
        return Err(MetricsError::Empty { what: "log_odds" }.into());
    }
    if log_odds.len() != y.len() {
        return Err(MetricsError::LengthMismatch {
            left: "log_odds",
            left_len: log_odds.len(),
            right: "labels",
            right_len: y.len(),
        }
        .into());
    }
    if let Some(index) = log_odds.iter().position(|h| !h.is_finite()) {
        return Err(MetricsError::NonFinite {
            what: "log_odds",
            index,
            value: log_odds[index],
        }
        .into());
    }
    let y: &[bool] = &y;
    logistic_recalibration_by(level, |each| {
        for (&h, &yi) in log_odds.iter().zip(y) {
            each(h, yi);
        }
    })
}

/// [`logistic_recalibration`] over pairs it does not hold: `pass(each)` calls `each(log_odds, label)` for every
/// pair, in the same order at every call (a pass over a file or a database cursor). The arithmetic is
/// [`logistic_recalibration`]'s, which uses it. The pairs are read a bounded number of times per Newton step of
/// each fit (about 2 to 4 passes per step, a few dozen in all), never held.
///
/// Errors: as [`logistic_recalibration`] (no cases, non-finite log-odds, one class, constant log-odds, `level`,
/// separation).
pub fn logistic_recalibration_by(
    level: f64,
    mut pass: impl FnMut(&mut dyn FnMut(f64, bool)),
) -> Result<Recalibration, MonitorError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(MonitorError::BadOption {
            name: "confidence level",
            value: level,
            reason: "must lie strictly between 0 and 1",
        });
    }
    let (mut cases, mut positives) = (0usize, 0usize);
    let mut non_finite: Option<(usize, f64)> = None;
    let mut first: Option<f64> = None;
    let mut constant = true;
    pass(&mut |h, yi| {
        if non_finite.is_none() && !h.is_finite() {
            non_finite = Some((cases, h));
        }
        match first {
            None => first = Some(h),
            Some(f) => constant &= h == f,
        }
        cases += 1;
        positives += usize::from(yi);
    });
    if cases == 0 {
        return Err(MetricsError::Empty { what: "log_odds" }.into());
    }
    if let Some((index, value)) = non_finite {
        return Err(MetricsError::NonFinite {
            what: "log_odds",
            index,
            value,
        }
        .into());
    }
    if positives == 0 || positives == cases {
        return Err(MetricsError::OneClass {
            statistic: STATISTIC,
            present: u8::from(positives > 0),
        }
        .into());
    }
    if constant {
        return Err(MonitorError::NoFit {
            statistic: STATISTIC,
            reason: "every log-odds is the same, so no slope can be fitted",
        });
    }
    let z_level = normal_upper_point((1.0 - level) / 2.0)?;

    // Two-parameter fit, then its Fisher information [[sum w h^2, sum w h], [sum w h, sum w]].
    let start = (positives as f64 / (cases - positives) as f64).ln();
    let w = fit_logistic_by(1, start, |each| {
        pass(&mut |h, yi| each(&[h], f64::from(u8::from(yi))))
    })
    .map_err(|e| MonitorError::NoFit {
        statistic: STATISTIC,
        reason: match e {
            NewtonFailure::Singular => "the information matrix is singular",
            NewtonFailure::NotConverged(_) => {
                "the fit did not converge; the log-odds separate the classes perfectly or nearly"
            }
        },
    })?;
    let (b, a) = (w[0], w[1]);
    let (mut shh, mut sh, mut s1) = (0.0, 0.0, 0.0);
    pass(&mut |h, _| {
        let p = sigmoid(a + b * h);
        let v = p * (1.0 - p);
        shh += v * h * h;
        sh += v * h;
        s1 += v;
    });
    let det = shh * s1 - sh * sh;
    if !(det > 0.0 && det.is_finite()) {
        return Err(MonitorError::NoFit {
            statistic: STATISTIC,
            reason: "the information matrix is singular at the estimate (separated classes)",
        });
    }
    let slope = Coefficient::new(b, (s1 / det).sqrt(), 1.0, z_level);
    let intercept = Coefficient::new(a, (shh / det).sqrt(), 0.0, z_level);

    let large = offset_intercept(&mut pass)?;
    let mut info = 0.0f64;
    pass(&mut |h, _| {
        let p = sigmoid(large + h);
        info += p * (1.0 - p);
    });
    let in_the_large = Coefficient::new(large, 1.0 / info.sqrt(), 0.0, z_level);

    // Log-likelihood at (a, b) and at (0, 1); -log-loss per case, summed.
    let mut loglik = |a: f64, b: f64| -> f64 {
        let mut total = 0.0f64;
        pass(&mut |h, yi| total += log_loss_term_pm1(a + b * h, yi));
        -total
    };
    let statistic = (2.0 * (loglik(a, b) - loglik(0.0, 1.0))).max(0.0);
    let joint = LikelihoodRatioTest {
        statistic,
        degrees_of_freedom: 2,
        p_value: chi2_sf(statistic, 2.0)?,
    };
    Ok(Recalibration {
        cases,
        positives,
        level,
        in_the_large,
        slope,
        intercept,
        joint,
    })
}

/// The maximum-likelihood `a` of `logit P(y = 1) = a + h`: the root of the score `g(a) = sum (y_i - sigmoid(a +
/// h_i))`, which falls strictly from `#positives` to `-#negatives`, so with both classes present it has exactly one
/// root. Newton steps inside a bracket, falling back to bisection when a step leaves it.
fn offset_intercept(pass: &mut impl FnMut(&mut dyn FnMut(f64, bool))) -> Result<f64, MonitorError> {
    let mut score = |a: f64| -> (f64, f64) {
        let (mut g, mut info) = (0.0, 0.0);
        pass(&mut |hi, yi| {
            let p = sigmoid(a + hi);
            g += f64::from(u8::from(yi)) - p;
            info += p * (1.0 - p);
        });
        (g, info)
    };
    let (mut lo, mut hi) = (-1.0f64, 1.0f64);
    for _ in 0..64 {
        if score(lo).0 > 0.0 {
            break;
        }
        lo *= 2.0;
    }
    for _ in 0..64 {
        if score(hi).0 < 0.0 {
            break;
        }
        hi *= 2.0;
    }
    if !(score(lo).0 >= 0.0 && score(hi).0 <= 0.0) {
        return Err(MonitorError::NoFit {
            statistic: "calibration-in-the-large",
            reason: "no root of the score equation within |a| < 2^64",
        });
    }
    let mut a = 0.0f64.clamp(lo, hi);
    for _ in 0..500 {
        let (g, info) = score(a);
        if g == 0.0 {
            return Ok(a);
        }
        if g > 0.0 {
            lo = a;
        } else {
            hi = a;
        }
        let newton = a + g / info;
        let next = if info > 0.0 && newton > lo && newton < hi {
            newton
        } else {
            0.5 * (lo + hi)
        };
        if (next - a).abs() <= 1e-15 * (1.0 + a.abs()) || hi - lo <= 1e-15 * (1.0 + a.abs()) {
            return Ok(next);
        }
        a = next;
    }
    Ok(a)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spiegelhalter_hand_computed() {
        // p = [0.2, 0.7], y = [0, 1]: numerator (0 - 0.2)(0.6) + (0.3)(-0.4) = -0.12 - 0.12 = -0.24;
        // variance 0.36 * 0.16 + 0.16 * 0.21 = 0.0576 + 0.0336 = 0.0912.
        let s = spiegelhalter_z(&[0.2, 0.7], &[0u8, 1]).unwrap();
        assert!((s.numerator + 0.24).abs() < 1e-15);
        assert!((s.variance - 0.0912).abs() < 1e-15);
        assert!((s.z.unwrap() + 0.24 / 0.0912f64.sqrt()).abs() < 1e-14);
        let half = spiegelhalter_z(&[0.5, 0.5], &[0u8, 1]).unwrap();
        assert_eq!((half.z, half.p_value), (None, None));
        assert!(matches!(
            spiegelhalter_z(&[0.2, 1.5], &[0u8, 1]),
            Err(MonitorError::Metric(MetricsError::NotProbability {
                index: 1,
                ..
            }))
        ));
    }

    #[test]
    fn recalibration_recovers_a_known_map_from_expected_counts() {
        // Targets equal to sigmoid(0.3 + 0.6 h) are the expected outcomes of that map; as fractional "labels" are
        // not allowed, each case is replaced by 100 copies with the rounded number of positives. The fit must then
        // come close to (0.3, 0.6); the offset fit must solve its score equation.
        let mut h = Vec::new();
        let mut y = Vec::new();
        for i in 0..41 {
            let hi = (i as f64 - 20.0) / 5.0;
            let k = (100.0 * sigmoid(0.3 + 0.6 * hi)).round() as usize;
            for j in 0..100 {
                h.push(hi);
                y.push(j < k);
            }
        }
        let r = logistic_recalibration(&h, &y, 0.95).unwrap();
        assert!((r.slope.estimate - 0.6).abs() < 0.01, "{r:?}");
        assert!((r.intercept.estimate - 0.3).abs() < 0.01, "{r:?}");
        assert!(r.slope.p_value < 1e-6 && r.joint.p_value < 1e-6);
        assert!(r.slope.lower < r.slope.estimate && r.slope.estimate < r.slope.upper);
        // The offset score equation holds at the estimate: sum (y - sigmoid(a + h)) = 0.
        let g: f64 = h
            .iter()
            .zip(&y)
            .map(|(&hi, &yi)| f64::from(u8::from(yi)) - sigmoid(r.in_the_large.estimate + hi))
            .sum();
        assert!(g.abs() < 1e-8, "{g}");
    }

    #[test]
    fn degenerate_inputs_are_refused() {
        assert!(matches!(
            logistic_recalibration(&[1.0, 1.0, 1.0], &[0u8, 1, 0], 0.95),
            Err(MonitorError::NoFit { .. })
        ));
        assert!(matches!(
            logistic_recalibration(&[-1.0, -2.0, 1.0, 2.0], &[0u8, 0, 1, 1], 0.95),
            Err(MonitorError::NoFit { .. })
        ));
        assert!(matches!(
            logistic_recalibration(&[1.0, 2.0], &[1u8, 1], 0.95),
            Err(MonitorError::Metric(MetricsError::OneClass { .. }))
        ));
        assert!(matches!(
            logistic_recalibration(&[1.0, f64::NAN], &[1u8, 0], 0.95),
            Err(MonitorError::Metric(MetricsError::NonFinite {
                index: 1,
                ..
            }))
        ));
        assert!(matches!(
            logistic_recalibration(&[1.0, 0.0], &[1u8, 0], 1.0),
            Err(MonitorError::BadOption { .. })
        ));
    }
}
