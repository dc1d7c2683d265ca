//! From a raw margin to log-odds, calibrated log-odds, base-rate-corrected probability, points and decision.

use crate::decision::{Decision, DecisionRule};
use crate::error::EvalError;
use crate::link::{logit, sigmoid};
use crate::model::Model;

/// What the caller wants on top of the model's own output.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct OutputSpec {
    /// Base rate of the population being scored; when set, the log-odds are shifted by
    /// `logit(target) - logit(model base rate)`.
    pub target_base_rate: Option<f64>,
    /// How to turn the probability into a decision.
    pub decision: Option<DecisionRule>,
}

/// Everything probity says about one row.
#[derive(Debug, Clone, PartialEq)]
pub struct Scored {
    /// The body's raw output.
    pub margin: f64,
    /// The margin on the log-odds scale (twice the margin for half log-odds).
    pub log_odds: f64,
    /// After the calibration map (equal to `log_odds` without one).
    pub calibrated_log_odds: f64,
    /// After the base-rate shift; the final probability is `sigmoid(adjusted_log_odds)`.
    pub adjusted_log_odds: f64,
    /// The calibrated, base-rate-corrected probability of the positive class.
    pub probability: f64,
    /// The points score, when the model has a scale.
    pub score: Option<f64>,
    /// The decision, when a rule was given.
    pub decision: Option<Decision>,
}

/// The prior shift `logit(target) - logit(source)` (Elkan 2001, Theorem 2; Saerens, Latinne and Decaestecker 2002).
pub fn prior_shift(source_base_rate: f64, target_base_rate: f64) -> f64 {
    logit(target_base_rate) - logit(source_base_rate)
}

impl Model {
    /// Scores one dense row: margin, log-odds, calibration, base-rate correction, probability, points, decision.
    pub fn score(&self, row: &[f64], spec: &OutputSpec) -> Result<Scored, EvalError> {
        let margin = self.margin(row)?;
        Ok(self.finish(margin, spec))
    }

    /// Everything after the margin, for callers that computed margins in a batch.
    pub fn finish(&self, margin: f64, spec: &OutputSpec) -> Scored {
        let log_odds = self.margin_scale.to_log_odds(margin);
        let calibrated_log_odds = match &self.calibration {
            Some(c) => c.apply(log_odds),
            None => log_odds,
        };
        let adjusted_log_odds = match spec.target_base_rate {
            Some(target) => calibrated_log_odds + prior_shift(self.base_rate, target),
            None => calibrated_log_odds,
        };
        let probability = sigmoid(adjusted_log_odds);
        Scored {
            margin,
            log_odds,
            calibrated_log_odds,
            adjusted_log_odds,
            probability,
            score: self.score_scale.map(|s| s.score(adjusted_log_odds)),
            decision: spec.decision.as_ref().map(|d| d.decide(probability)),
        }
    }
}
