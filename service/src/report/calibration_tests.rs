//! The calibration tests of a report section (`probity_models::monitor::calibration_test`): Spiegelhalter's z
//! (1986) on the served probabilities, and logistic recalibration (Cox 1958) of the final log-odds, with 95% Wald
//! intervals, on the section's pairs with an outcome.

use std::fmt::Write;

use probity_models::monitor::{
    logistic_recalibration, logistic_recalibration_by, spiegelhalter_z, spiegelhalter_z_by,
    Coefficient,
};
use serde::Serialize;

/// Confidence level of the recalibration intervals.
pub const LEVEL: f64 = 0.95;

/// The calibration tests of one section; each part is `None` when it could not be computed (the reason is in the
/// section's notes).
#[derive(Debug, Clone, Default, Serialize)]
pub struct CalibrationTests {
    /// Spiegelhalter's z-test.
    pub spiegelhalter: Option<Spiegelhalter>,
    /// Logistic recalibration.
    pub recalibration: Option<Recalibration>,
}

/// Spiegelhalter's z-test.
#[derive(Debug, Clone, Serialize)]
pub struct Spiegelhalter {
    /// The statistic (positive: more positives than predicted where `p < 1/2` or fewer where `p > 1/2`).
    pub z: f64,
    /// Two-sided p-value.
    pub p_value: f64,
}

/// One coefficient with its interval and its test against the calibrated value.
#[derive(Debug, Clone, Serialize)]
pub struct Interval {
    /// Estimate.
    pub estimate: f64,
    /// Standard error.
    pub standard_error: f64,
    /// Lower end of the Wald interval.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Value of a calibrated model.
    pub calibrated: f64,
    /// Two-sided Wald p-value against the calibrated value.
    pub p_value: f64,
}

impl From<Coefficient> for Interval {
    fn from(c: Coefficient) -> Self {
        Interval {
            estimate: c.estimate,
            standard_error: c.standard_error,
            lower: c.lower,
            upper: c.upper,
            calibrated: c.calibrated,
            p_value: c.p_value,
        }
    }
}

/// Logistic recalibration `logit P(y) = a + b h`.
#[derive(Debug, Clone, Serialize)]
pub struct Recalibration {
    /// Confidence level of the intervals.
    pub level: f64,
    /// Calibration-in-the-large: `a` with `b` held at 1.
    pub in_the_large: Interval,
    /// Calibration slope `b`.
    pub slope: Interval,
    /// Intercept `a` of the two-parameter fit.
    pub intercept: Interval,
    /// Cox's likelihood-ratio statistic for `a = 0, b = 1` (2 degrees of freedom).
    pub joint_statistic: f64,
    /// Its p-value.
    pub joint_p_value: f64,
}

/// Computes the tests on probabilities `p`, final log-odds `h` and labels `y` of the same pairs; failures are noted.
pub fn compute(p: &[f64], h: &[f64], y: &[bool], notes: &mut Vec<String>) -> CalibrationTests {
    if y.is_empty() {
        return CalibrationTests::default();
    }
    let spiegelhalter = spiegelhalter_of(spiegelhalter_z(p, y), notes);
    let recalibration = recalibration_of(logistic_recalibration(h, y, LEVEL), notes);
    CalibrationTests {
        spiegelhalter,
        recalibration,
    }
}

/// [`compute`] over `n` pairs it does not hold: `pass(each)` calls `each(probability, log_odds, label)` for every
/// pair, in the same order at every call. Spiegelhalter's z reads them once; the recalibration's Newton fits a few
/// dozen times (`monitor::logistic_recalibration_by`).
pub fn compute_by(
    n: usize,
    mut pass: impl FnMut(&mut dyn FnMut(f64, f64, bool)),
    notes: &mut Vec<String>,
) -> CalibrationTests {
    if n == 0 {
        return CalibrationTests::default();
    }
    let spiegelhalter = spiegelhalter_of(
        spiegelhalter_z_by(|each| pass(&mut |p, _, y| each(p, y))),
        notes,
    );
    let recalibration = recalibration_of(
        logistic_recalibration_by(LEVEL, |each| pass(&mut |_, h, y| each(h, y))),
        notes,
    );
    CalibrationTests {
        spiegelhalter,
        recalibration,
    }
}

fn spiegelhalter_of(
    result: Result<probity_models::monitor::Spiegelhalter, probity_models::monitor::MonitorError>,
    notes: &mut Vec<String>,
) -> Option<Spiegelhalter> {
    match result {
        Ok(s) => match (s.z, s.p_value) {
            (Some(z), Some(p_value)) => Some(Spiegelhalter { z, p_value }),
            _ => {
                notes.push("Spiegelhalter z: every probability is 0, 1/2 or 1".into());
                None
            }
        },
        Err(e) => {
            notes.push(format!("Spiegelhalter z: {e}"));
            None
        }
    }
}

fn recalibration_of(
    result: Result<probity_models::monitor::Recalibration, probity_models::monitor::MonitorError>,
    notes: &mut Vec<String>,
) -> Option<Recalibration> {
    match result {
        Ok(r) => Some(Recalibration {
            level: r.level,
            in_the_large: r.in_the_large.into(),
            slope: r.slope.into(),
            intercept: r.intercept.into(),
            joint_statistic: r.joint.statistic,
            joint_p_value: r.joint.p_value,
        }),
        Err(e) => {
            notes.push(format!("recalibration: {e}"));
            None
        }
    }
}

/// The lines of the text report.
pub fn render(s: &mut String, t: &CalibrationTests) {
    if let Some(z) = &t.spiegelhalter {
        let _ = writeln!(
            s,
            "Spiegelhalter z {:+.3}  p {:.4}  (calibrated: z near 0)",
            z.z, z.p_value
        );
    }
    if let Some(r) = &t.recalibration {
        let pct = r.level * 100.0;
        let _ = writeln!(
            s,
            "calibration-in-the-large {:+.4} ({pct:.0}% {:+.4} to {:+.4}; calibrated 0)  slope {:.4} ({pct:.0}% {:.4} to {:.4}; calibrated 1)  joint test p {:.4}",
            r.in_the_large.estimate,
            r.in_the_large.lower,
            r.in_the_large.upper,
            r.slope.estimate,
            r.slope.lower,
            r.slope.upper,
            r.joint_p_value
        );
    }
}
