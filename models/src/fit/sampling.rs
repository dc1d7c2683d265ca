//! Base-rate corrections for training or holdout data that was re-sampled, and the base rate to record.
//!
//! When the rows a model (or its calibration) was fitted on over-represent positives, its probabilities are those
//! of the sample. Changing the prior from the sample's share `pi_s` to the population's `pi` shifts the log-odds by
//! `logit(pi) - logit(pi_s)` and leaves everything else alone (Elkan 2001, "The foundations of cost-sensitive
//! learning", IJCAI, Theorem 2; Saerens, Latinne and Decaestecker 2002, Neural Computation 14). Two common designs:
//!
//! - [`Sampling::NegativeRate`]: every positive kept and a fraction `beta` of the negatives. Then
//!   `p = beta p_s / (beta p_s - p_s + 1)` (Dal Pozzolo, Caelen, Johnson and Bontempi 2015, "Calibrating
//!   probability with undersampling for unbalanced classification", IEEE SSCI), which is the shift `ln beta` on the
//!   log-odds, and the population base rate follows from the sample's by the same formula.
//! - [`Sampling::PositiveShare`]: the sample was drawn to hold a fixed share `s` of positives from a population
//!   whose share `tau` is known. King and Zeng (2001), "Logistic regression in rare events data", Political
//!   Analysis 9, correct the intercept of a logistic regression fitted on such a sample:
//!   `beta0 - ln[((1 - tau)/tau)(ybar/(1 - ybar))]` with `ybar` the sample share; this is the shift
//!   `logit(tau) - logit(ybar)` again.
//!
//! [`Sampling::correction`] returns the shift and the population base rate; [`shift_calibration`] folds the shift
//! into a calibration map, so a model file can carry the population base rate with a map that already produces
//! population probabilities (probity applies further shifts relative to that base rate).

use super::FitError;
use crate::calibration::Calibration;
use crate::link::{logit, sigmoid};

/// How the rows were re-sampled from the population.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Sampling {
    /// All positives kept, a fraction `beta` in (0, 1] of negatives kept.
    NegativeRate {
        /// The fraction of negatives kept.
        beta: f64,
    },
    /// A sample with positive share `share`, from a population with positive share `population`.
    PositiveShare {
        /// The sample's share of positives, in (0, 1).
        share: f64,
        /// The population's share of positives, in (0, 1).
        population: f64,
    },
}

/// What a sampling design does to the base rate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BaseRateCorrection {
    /// Add this to sample log-odds to get population log-odds.
    pub log_odds_shift: f64,
    /// The population base rate, the value to record in the model file.
    pub population_base_rate: f64,
}

fn open_unit(name: &'static str, v: f64) -> Result<f64, FitError> {
    if v > 0.0 && v < 1.0 {
        Ok(v)
    } else {
        Err(FitError::BadParameter {
            name,
            value: v,
            rule: "must lie strictly between 0 and 1",
        })
    }
}

impl Sampling {
    /// The correction for a sample whose observed positive share is `sample_base_rate`.
    ///
    /// For [`Sampling::NegativeRate`] the population rate is Dal Pozzolo et al.'s formula applied to the sample
    /// share, `beta pi_s / (beta pi_s - pi_s + 1)` (with `N+` positives and `N-` kept negatives the population has
    /// `N-/beta` negatives, which gives the same expression). For [`Sampling::PositiveShare`] the population rate
    /// is given, and `ybar` is the design share `share` (King and Zeng's `ybar`), not the observed one.
    ///
    /// Errors: [`FitError::BadParameter`] for `beta` outside (0, 1] or a share outside (0, 1).
    pub fn correction(&self, sample_base_rate: f64) -> Result<BaseRateCorrection, FitError> {
        match *self {
            Sampling::NegativeRate { beta } => {
                if !(beta > 0.0 && beta <= 1.0) {
                    return Err(FitError::BadParameter {
                        name: "negative sampling rate",
                        value: beta,
                        rule: "must lie in (0, 1]",
                    });
                }
                let ps = open_unit("sample base rate", sample_base_rate)?;
                Ok(BaseRateCorrection {
                    log_odds_shift: beta.ln(),
                    population_base_rate: dal_pozzolo(ps, beta),
                })
            }
            Sampling::PositiveShare { share, population } => {
                let s = open_unit("positive share", share)?;
                let tau = open_unit("population base rate", population)?;
                Ok(BaseRateCorrection {
                    log_odds_shift: logit(tau) - logit(s),
                    population_base_rate: tau,
                })
            }
        }
    }
}

/// Dal Pozzolo et al. (2015): the population probability `beta p_s / (beta p_s - p_s + 1)` of a sample probability
/// `p_s` under negative under-sampling with rate `beta`.
pub fn dal_pozzolo(p_s: f64, beta: f64) -> f64 {
    beta * p_s / (beta * p_s - p_s + 1.0)
}

/// King and Zeng (2001), eq. (7): the intercept `beta0 - ln[((1 - tau)/tau)(ybar/(1 - ybar))]` of a logistic
/// regression fitted on a sample with positive share `ybar` from a population with share `tau`.
pub fn king_zeng_intercept(beta0: f64, tau: f64, ybar: f64) -> f64 {
    beta0 - (((1.0 - tau) / tau) * (ybar / (1.0 - ybar))).ln()
}

/// The map followed by a log-odds shift, as a single map of the same kind where possible.
///
/// Platt and beta maps take the shift in their intercept. A temperature map has none, so it becomes the Platt map
/// `h/t + shift`. An isotonic map's values `y` become `sigmoid(logit(y) + shift)`, which is monotone and keeps 0
/// and 1, so the interpolated map is shifted at its points (between points, interpolation on the probability
/// scale makes it differ slightly from shifting afterwards).
pub fn shift_calibration(map: &Calibration, shift: f64) -> Calibration {
    match map {
        Calibration::Platt { a, b } => Calibration::Platt {
            a: *a,
            b: b + shift,
        },
        Calibration::Beta { a, b, c } => Calibration::Beta {
            a: *a,
            b: *b,
            c: c + shift,
        },
        Calibration::Temperature { t } => Calibration::Platt {
            a: 1.0 / t,
            b: shift,
        },
        Calibration::Isotonic { input, x, y } => Calibration::Isotonic {
            input: *input,
            x: x.clone(),
            y: y.iter().map(|&v| sigmoid(logit(v) + shift)).collect(),
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn negative_rate_shift_is_dal_pozzolo_formula() {
        // Dal Pozzolo et al. (2015), eq. for p from p_s: checked against sigmoid(logit(p_s) + ln beta).
        for &(ps, beta) in &[(0.5, 0.1), (0.9, 0.01), (0.02, 0.5), (0.3, 1.0)] {
            let c = Sampling::NegativeRate { beta }.correction(0.25).unwrap();
            let via_shift = sigmoid(logit(ps) + c.log_odds_shift);
            assert!(
                (via_shift - dal_pozzolo(ps, beta)).abs() < 1e-15,
                "{ps} {beta}"
            );
        }
        // 1000 positives and 1000 kept negatives at beta = 0.1: the population has 10000 negatives.
        let c = Sampling::NegativeRate { beta: 0.1 }
            .correction(0.5)
            .unwrap();
        assert!((c.population_base_rate - 1000.0 / 11000.0).abs() < 1e-15);
    }

    #[test]
    fn positive_share_shift_is_king_and_zeng_and_elkan() {
        // King and Zeng (2001) eq. (7): corrected intercept minus fitted intercept equals our shift.
        let (tau, s) = (0.03, 0.5);
        let c = Sampling::PositiveShare {
            share: s,
            population: tau,
        }
        .correction(0.5)
        .unwrap();
        assert!((king_zeng_intercept(1.7, tau, s) - 1.7 - c.log_odds_shift).abs() < 1e-15);
        // Elkan (2001), Theorem 2, probability form: p' = b'(p - p b) / (b - p b + b' p - b b').
        for p in [0.01, 0.2, 0.5, 0.93] {
            let (b, b2) = (s, tau);
            let elkan = b2 * (p - p * b) / (b - p * b + b2 * p - b * b2);
            assert!(
                (sigmoid(logit(p) + c.log_odds_shift) - elkan).abs() < 1e-15,
                "{p}"
            );
        }
    }

    #[test]
    fn bad_parameters_are_refused() {
        assert!(Sampling::NegativeRate { beta: 0.0 }
            .correction(0.5)
            .is_err());
        assert!(Sampling::NegativeRate { beta: f64::NAN }
            .correction(0.5)
            .is_err());
        assert!(Sampling::NegativeRate { beta: 0.5 }
            .correction(1.0)
            .is_err());
        assert!(Sampling::PositiveShare {
            share: 1.0,
            population: 0.1
        }
        .correction(0.5)
        .is_err());
    }

    #[test]
    fn shifted_maps_equal_shift_after_the_map() {
        let shift = 0.1f64.ln();
        for map in [
            Calibration::Platt { a: 1.3, b: -0.2 },
            Calibration::Beta {
                a: 1.1,
                b: 0.7,
                c: 0.3,
            },
            Calibration::Temperature { t: 1.7 },
        ] {
            let shifted = shift_calibration(&map, shift);
            for h in [-6.0, -1.0, 0.0, 2.5] {
                assert!((shifted.apply(h) - (map.apply(h) + shift)).abs() < 1e-12);
            }
        }
        let iso = Calibration::Isotonic {
            input: crate::calibration::IsotonicInput::LogOdds,
            x: vec![-1.0, 0.0, 1.0],
            y: vec![0.0, 0.4, 1.0],
        };
        let shifted = shift_calibration(&iso, shift);
        assert!((shifted.apply(0.0) - (iso.apply(0.0) + shift)).abs() < 1e-12);
        assert_eq!(shifted.apply(-5.0), f64::NEG_INFINITY);
    }
}
