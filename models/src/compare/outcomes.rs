//! The comparison once outcomes are known, on the cases both models scored.
//!
//! Row `i` of the champion's log-odds, the challenger's log-odds and the labels is one case (the caller pairs them by
//! prediction id). Computed whenever possible, even with few outcomes; the [`Verdict`] stays "not enough outcomes
//! yet" until the [`Minimums`](super::Minimums) are met:
//! - mean log-loss of each model and the Diebold-Mariano test of their paired difference ([`super::paired_loss`]);
//! - Brier score of each (Brier 1950) and the same paired test on the squared-error differences;
//! - expected calibration error of each (Naeini, Cooper and Hauskrecht 2015) on the bins of the options;
//! - AUC of each with the DeLong test ([`super::delong`]).

use super::delong::{delong_test, DeLongTest};
use super::paired_loss::{diebold_mariano, log_loss_differences, PairedTest, VarianceEstimator};
use super::verdict::{Verdict, VerdictRule};
use super::CompareError;
use crate::link::sigmoid;
use crate::metrics::{calibration_table, BinStrategy, Labels};

/// Options of [`compare_outcomes`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OutcomeOptions {
    /// Variance estimator of the paired tests.
    pub estimator: VarianceEstimator,
    /// Bins of the expected calibration error.
    pub ece_bins: BinStrategy,
    /// How the tests become a verdict.
    pub rule: VerdictRule,
}

impl Default for OutcomeOptions {
    /// Independent cases, ten equal-width bins (common practice, no single source), [`VerdictRule::default`].
    fn default() -> Self {
        OutcomeOptions {
            estimator: VarianceEstimator::Independent,
            ece_bins: BinStrategy::Uniform(10),
            rule: VerdictRule::default(),
        }
    }
}

/// Summary of one model on the paired cases.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ModelScores {
    /// Mean log-loss (natural log), from log-odds.
    pub log_loss: f64,
    /// Brier score.
    pub brier: f64,
    /// Expected calibration error.
    pub ece: f64,
}

/// Champion against challenger on cases with known outcomes.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeComparison {
    /// Paired cases with an outcome.
    pub cases: usize,
    /// Of which positive.
    pub positives: usize,
    /// Of which negative.
    pub negatives: usize,
    /// The champion's scores; `None` without cases.
    pub champion: Option<ModelScores>,
    /// The challenger's scores; `None` without cases.
    pub challenger: Option<ModelScores>,
    /// Paired log-loss difference test; `None` below two cases.
    pub log_loss: Option<PairedTest>,
    /// Paired Brier (squared error) difference test; `None` below two cases.
    pub brier: Option<PairedTest>,
    /// DeLong test; `None` below two positives or two negatives.
    pub delong: Option<DeLongTest>,
    /// The verdict.
    pub verdict: Verdict,
}

fn scores(h: &[f64], y: &[bool], bins: BinStrategy) -> Result<ModelScores, CompareError> {
    let p: Vec<f64> = h.iter().map(|&v| sigmoid(v)).collect();
    Ok(ModelScores {
        log_loss: crate::metrics::log_loss_from_log_odds(h, y)?,
        brier: crate::metrics::brier_score(&p, y)?,
        ece: calibration_table(&p, y, bins)?.ece,
    })
}

/// Compares the two models' log-odds on the same cases against their outcomes.
///
/// Errors: different lengths, non-finite log-odds, a label other than 0/1, bad ECE bins or a Newey-West lag not
/// below the number of cases. Too few cases is not an error: the parts that cannot be computed are `None` and the
/// verdict says so.
pub fn compare_outcomes<L: Labels + ?Sized>(
    champion: &[f64],
    challenger: &[f64],
    labels: &L,
    options: &OutcomeOptions,
) -> Result<OutcomeComparison, CompareError> {
    let y = labels.to_bools()?;
    super::check_pair("outcome comparison", champion, challenger, 0)?;
    if y.len() != champion.len() {
        return Err(CompareError::LengthMismatch {
            left: "log-odds",
            left_len: champion.len(),
            right: "labels",
            right_len: y.len(),
        });
    }
    let n = y.len();
    let positives = y.iter().filter(|&&b| b).count();
    let negatives = n - positives;
    let (champ, chall) = if n > 0 {
        (
            Some(scores(champion, &y, options.ece_bins)?),
            Some(scores(challenger, &y, options.ece_bins)?),
        )
    } else {
        (None, None)
    };
    let (log_loss, brier) = if n >= 2 {
        let d = log_loss_differences(champion, challenger, y.as_ref())?;
        let sq: Vec<f64> = champion
            .iter()
            .zip(challenger)
            .zip(y.iter())
            .map(|((&a, &b), &yi)| {
                let t = f64::from(u8::from(yi));
                (sigmoid(b) - t).powi(2) - (sigmoid(a) - t).powi(2)
            })
            .collect();
        (
            Some(diebold_mariano(&d, options.estimator)?),
            Some(diebold_mariano(&sq, options.estimator)?),
        )
    } else {
        (None, None)
    };
    let delong = if positives >= 2 && negatives >= 2 {
        Some(delong_test(champion, challenger, y.as_ref())?)
    } else {
        None
    };
    let verdict = options
        .rule
        .judge(positives, negatives, log_loss.as_ref(), delong.as_ref());
    Ok(OutcomeComparison {
        cases: n,
        positives,
        negatives,
        champion: champ,
        challenger: chall,
        log_loss,
        brier,
        delong,
        verdict,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn few_outcomes_give_partial_results_and_no_verdict() {
        let opts = OutcomeOptions::default();
        let c = compare_outcomes(&[], &[], &[] as &[bool], &opts).unwrap();
        assert_eq!((c.cases, c.champion, c.log_loss), (0, None, None));
        assert_eq!(c.verdict.code(), "not_enough_outcomes");
        let c =
            compare_outcomes(&[0.1, -0.3, 2.0], &[0.2, -0.1, 1.0], &[1u8, 0, 0], &opts).unwrap();
        assert!(c.log_loss.is_some() && c.delong.is_none());
        assert_eq!(c.verdict.code(), "not_enough_outcomes");
    }

    #[test]
    fn a_clearly_better_challenger_wins() {
        // Made-up scores: the challenger separates the classes by 3 log-odds, the champion is nearly random.
        let n = 200;
        let y: Vec<bool> = (0..n).map(|i| i % 2 == 0).collect();
        let noise = |i: usize| ((i * 37) % 11) as f64 / 11.0 - 0.5;
        let champion: Vec<f64> = (0..n)
            .map(|i| noise(i) + if y[i] { 0.05 } else { 0.0 })
            .collect();
        let challenger: Vec<f64> = (0..n)
            .map(|i| noise(i) + if y[i] { 1.5 } else { -1.5 })
            .collect();
        let c = compare_outcomes(&champion, &challenger, &y, &OutcomeOptions::default()).unwrap();
        assert_eq!(c.verdict.code(), "challenger_better");
        let (a, b) = (c.champion.unwrap(), c.challenger.unwrap());
        assert!(b.log_loss < a.log_loss && b.brier < a.brier);
        let t = c.log_loss.unwrap();
        assert!((t.mean - (b.log_loss - a.log_loss)).abs() < 1e-12);
    }

    #[test]
    fn mismatched_labels_are_refused() {
        assert!(matches!(
            compare_outcomes(&[0.0], &[0.0], &[1u8, 0], &OutcomeOptions::default()),
            Err(CompareError::LengthMismatch { .. })
        ));
    }
}
