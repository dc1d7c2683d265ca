//! Decisions from a probability: one threshold, a threshold from a cost matrix, or bands.

/// How a probability becomes a decision.
#[derive(Debug, Clone, PartialEq)]
pub enum DecisionRule {
    /// Positive when `probability > threshold` (strict, as `h > 0` is in common classifiers' `predict`).
    Threshold { threshold: f64 },
    /// Bayes-optimal threshold from misclassification costs with zero cost for correct decisions:
    /// `p* = c_fp / (c_fp + c_fn)` (Elkan 2001, "The foundations of cost-sensitive learning").
    Costs {
        false_positive: f64,
        false_negative: f64,
    },
    /// Bands: `edges` strictly increasing in (0, 1), `labels` one more than `edges`; a probability `p` falls in band
    /// `i` where `edges[i-1] < p <= edges[i]`.
    Bands {
        edges: Vec<f64>,
        labels: Vec<String>,
    },
}

/// The decision a rule gives for one probability.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Decision {
    /// Above the threshold.
    Positive,
    /// At or below the threshold.
    Negative,
    /// The label of the band the probability falls in.
    Band(String),
}

impl Decision {
    /// A short text form: `positive`, `negative` or the band label.
    pub fn as_str(&self) -> &str {
        match self {
            Decision::Positive => "positive",
            Decision::Negative => "negative",
            Decision::Band(label) => label,
        }
    }
}

/// Why a decision rule is not usable.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DecisionRuleError {
    #[error("threshold must be in [0, 1], got {0}")]
    Threshold(f64),
    #[error("costs must be finite and >= 0 with a positive sum, got false_positive={0}, false_negative={1}")]
    Costs(f64, f64),
    #[error("bands need strictly increasing edges in (0, 1) and one more label than edges")]
    Bands,
}

impl DecisionRule {
    /// Checks the rule's numbers.
    pub fn validate(&self) -> Result<(), DecisionRuleError> {
        match self {
            DecisionRule::Threshold { threshold } => {
                if !(0.0..=1.0).contains(threshold) {
                    return Err(DecisionRuleError::Threshold(*threshold));
                }
            }
            DecisionRule::Costs {
                false_positive,
                false_negative,
            } => {
                let ok = false_positive.is_finite()
                    && false_negative.is_finite()
                    && *false_positive >= 0.0
                    && *false_negative >= 0.0
                    && false_positive + false_negative > 0.0;
                if !ok {
                    return Err(DecisionRuleError::Costs(*false_positive, *false_negative));
                }
            }
            DecisionRule::Bands { edges, labels } => {
                let increasing = edges.windows(2).all(|w| w[0] < w[1]);
                let inside = edges.iter().all(|e| *e > 0.0 && *e < 1.0);
                if !increasing || !inside || labels.len() != edges.len() + 1 {
                    return Err(DecisionRuleError::Bands);
                }
            }
        }
        Ok(())
    }

    /// The probability threshold above which the decision is positive, for the two-way rules.
    pub fn threshold(&self) -> Option<f64> {
        match self {
            DecisionRule::Threshold { threshold } => Some(*threshold),
            DecisionRule::Costs {
                false_positive,
                false_negative,
            } => Some(false_positive / (false_positive + false_negative)),
            DecisionRule::Bands { .. } => None,
        }
    }

    /// The decision for probability `p`.
    pub fn decide(&self, p: f64) -> Decision {
        match self {
            DecisionRule::Bands { edges, labels } => {
                let i = edges.partition_point(|&e| e < p);
                Decision::Band(labels.get(i).cloned().unwrap_or_default())
            }
            _ => {
                let t = self.threshold().unwrap_or(0.5);
                if p > t {
                    Decision::Positive
                } else {
                    Decision::Negative
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cost_threshold_is_elkans() {
        // Elkan (2001), section 2: with c10 = cost of a false positive and c01 = cost of a false negative and
        // correct decisions free, the optimal threshold is p* = c10 / (c10 + c01). Fraud example: a missed fraud
        // costs 20 times a needless decline -> p* = 1/21.
        let rule = DecisionRule::Costs {
            false_positive: 1.0,
            false_negative: 20.0,
        };
        assert!((rule.threshold().unwrap_or(f64::NAN) - 1.0 / 21.0).abs() < 1e-15);
        assert_eq!(rule.decide(0.05), Decision::Positive);
        assert_eq!(rule.decide(0.04), Decision::Negative);
    }

    #[test]
    fn bands_are_closed_on_the_right() {
        let rule = DecisionRule::Bands {
            edges: vec![0.1, 0.5],
            labels: vec!["approve".into(), "review".into(), "decline".into()],
        };
        assert!(rule.validate().is_ok());
        assert_eq!(rule.decide(0.1).as_str(), "approve");
        assert_eq!(rule.decide(0.1000001).as_str(), "review");
        assert_eq!(rule.decide(0.5).as_str(), "review");
        assert_eq!(rule.decide(0.9).as_str(), "decline");
    }
}
