//! The EM estimate of a new base rate from unlabelled calibrated scores (Saerens, Latinne and Decaestecker 2002,
//! "Adjusting the outputs of a classifier to new a priori probabilities: a simple procedure", Neural Computation
//! 14, section 2.2).
//!
//! With posteriors `p_i` that are calibrated under the training prior `pi_t`, and a current guess `pi_k` of the new
//! prior, the E-step adjusts each posterior to the new prior,
//! `p_i' = (pi_k/pi_t) p_i / [(pi_k/pi_t) p_i + ((1 - pi_k)/(1 - pi_t))(1 - p_i)]`, and the M-step sets
//! `pi_{k+1} = mean_i p_i'`. We compute the E-step on the log-odds scale, `logit(p_i') = logit(p_i) + logit(pi_k)
//! - logit(pi_t)`, which is the same expression without cancellation near 0 and 1. The iteration stops when the
//! prior moves by less than `tolerance`.
//!
//! The estimate is a monitoring signal: nothing here changes a served probability.

use super::FitError;
use crate::link::{logit, sigmoid};

/// Stopping rules and starting point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EmOptions {
    /// Iteration cap.
    pub max_iterations: usize,
    /// Stop when `|pi_{k+1} - pi_k|` is at most this.
    pub tolerance: f64,
    /// Starting prior; `None` starts from the training prior, as Saerens et al. do.
    pub start: Option<f64>,
}

impl Default for EmOptions {
    fn default() -> Self {
        EmOptions {
            max_iterations: 1000,
            tolerance: 1e-10,
            start: None,
        }
    }
}

/// The result of [`estimate_prior`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PriorEstimate {
    /// The estimated base rate of the scored population.
    pub prior: f64,
    /// Iterations used.
    pub iterations: usize,
    /// Whether the tolerance was met within the cap (if not, `prior` is the last iterate).
    pub converged: bool,
}

/// Estimates the base rate of the population that produced calibrated probabilities `p` (fitted under training
/// prior `training_prior`).
///
/// Probabilities of exactly 0 or 1 are allowed (they stay 0 or 1 under any prior). Errors: no scores; a probability
/// that is NaN or outside [0, 1] (naming its row); a training prior or start outside (0, 1); a tolerance that is not
/// positive.
pub fn estimate_prior(
    p: &[f64],
    training_prior: f64,
    options: EmOptions,
) -> Result<PriorEstimate, FitError> {
    if p.is_empty() {
        return Err(FitError::Empty);
    }
    if let Some(row) = p.iter().position(|v| !(0.0..=1.0).contains(v)) {
        return Err(FitError::BadScore {
            row,
            what: "probability",
            value: p[row],
            rule: "probabilities must lie in [0, 1]",
        });
    }
    let h: Vec<f64> = p.iter().map(|&v| logit(v)).collect();
    estimate_prior_by(training_prior, options, |shift| {
        h.iter().map(|&hi| sigmoid(hi + shift)).sum::<f64>() / h.len() as f64
    })
}

/// The EM of [`estimate_prior`] over scores it does not hold: `mean_posterior(shift)` returns the mean of
/// `sigmoid(logit(p_i) + shift)` over the scores, summed in one fixed order (a pass over a file or a database
/// cursor), so that the result equals [`estimate_prior`]'s on the same scores in that order. The scores must have
/// been checked to lie in [0, 1] and be non-empty.
pub fn estimate_prior_by(
    training_prior: f64,
    options: EmOptions,
    mut mean_posterior: impl FnMut(f64) -> f64,
) -> Result<PriorEstimate, FitError> {
    let unit = |name: &'static str, v: f64| {
        if v > 0.0 && v < 1.0 {
            Ok(v)
        } else {
            Err(FitError::BadParameter {
                name,
                value: v,
                rule: "must lie strictly between 0 and 1",
            })
        }
    };
    let pi_t = unit("training prior", training_prior)?;
    let mut pi = unit("starting prior", options.start.unwrap_or(pi_t))?;
    if options.tolerance.is_nan() || options.tolerance <= 0.0 {
        return Err(FitError::BadParameter {
            name: "tolerance",
            value: options.tolerance,
            rule: "must be positive",
        });
    }
    let base = logit(pi_t);
    for iteration in 1..=options.max_iterations {
        let shift = logit(pi) - base;
        let next = mean_posterior(shift);
        let moved = (next - pi).abs();
        // Every posterior 0 (or 1) drives the mean to the boundary, where logit is infinite; stop there.
        if !(next > 0.0 && next < 1.0) {
            return Ok(PriorEstimate {
                prior: next,
                iterations: iteration,
                converged: true,
            });
        }
        pi = next;
        if moved <= options.tolerance {
            return Ok(PriorEstimate {
                prior: pi,
                iterations: iteration,
                converged: true,
            });
        }
    }
    Ok(PriorEstimate {
        prior: pi,
        iterations: options.max_iterations,
        converged: false,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unchanged_population_keeps_the_training_prior_when_posteriors_average_to_it() {
        // If the posteriors already average to pi_t, pi_t is a fixed point (the M-step returns their mean).
        let p = [0.1, 0.3, 0.2, 0.2];
        let est = estimate_prior(&p, 0.2, EmOptions::default()).unwrap();
        assert!((est.prior - 0.2).abs() < 1e-12 && est.iterations == 1);
    }

    #[test]
    fn bad_input_is_refused() {
        let o = EmOptions::default();
        assert_eq!(estimate_prior(&[], 0.2, o), Err(FitError::Empty));
        assert!(matches!(
            estimate_prior(&[0.1, f64::NAN], 0.2, o),
            Err(FitError::BadScore { row: 1, .. })
        ));
        assert!(matches!(
            estimate_prior(&[0.1, 1.5], 0.2, o),
            Err(FitError::BadScore { row: 1, .. })
        ));
        assert!(estimate_prior(&[0.1], 0.0, o).is_err());
        assert!(estimate_prior(
            &[0.1],
            0.2,
            EmOptions {
                start: Some(1.0),
                ..o
            }
        )
        .is_err());
        assert!(estimate_prior(
            &[0.1],
            0.2,
            EmOptions {
                tolerance: 0.0,
                ..o
            }
        )
        .is_err());
    }
}
