//! The verdict of a champion-challenger comparison, in words a reviewer can act on.
//!
//! The rule (our choice, stated here because there is no single standard; common practice, no single source):
//! 1. Until the paired cases hold at least [`Minimums`] positives and negatives (30 of each by default, so that the
//!    normal approximations of the Diebold-Mariano and DeLong statistics are reasonable), the verdict is
//!    "not enough outcomes yet", whatever the numbers say.
//! 2. The paired log-loss test is the primary criterion: log-loss is a proper scoring rule and judges ranking and
//!    calibration together. If its two-sided p-value is below `alpha`, the model with the lower log-loss is
//!    better, unless the DeLong test is also below `alpha` in the opposite direction, which is reported as mixed
//!    (one model ranks better, the other is better calibrated).
//! 3. If only the DeLong test is below `alpha`, the verdict says that one model ranks better while the log-loss
//!    shows no clear difference.
//! 4. Otherwise there is no clear difference.
//!
//! Both tests run at the same `alpha` (0.05 by default) without a multiplicity correction; the wording always
//! carries the p-values, so a reader can apply a stricter level.

use std::fmt;

use super::delong::DeLongTest;
use super::paired_loss::PairedTest;

/// Least numbers of paired positives and negatives before a verdict is given.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Minimums {
    /// Paired cases with a positive outcome.
    pub positives: usize,
    /// Paired cases with a negative outcome.
    pub negatives: usize,
}

impl Default for Minimums {
    /// 30 positives and 30 negatives (common practice for a normal approximation, no single source).
    fn default() -> Self {
        Minimums {
            positives: 30,
            negatives: 30,
        }
    }
}

/// Which model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Side {
    /// The model currently answering.
    Champion,
    /// The model under trial.
    Challenger,
}

impl Side {
    /// `champion` or `challenger`.
    pub fn as_str(self) -> &'static str {
        match self {
            Side::Champion => "champion",
            Side::Challenger => "challenger",
        }
    }
}

/// The numbers a verdict rests on (differences are challenger minus champion).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Evidence {
    /// Mean paired log-loss difference.
    pub log_loss_difference: Option<f64>,
    /// Its two-sided p-value.
    pub log_loss_p: Option<f64>,
    /// AUC difference.
    pub auc_difference: Option<f64>,
    /// Its two-sided DeLong p-value.
    pub auc_p: Option<f64>,
}

/// What the comparison says.
#[derive(Debug, Clone, PartialEq)]
pub enum Verdict {
    /// Too few paired outcomes to judge.
    NotEnoughOutcomes {
        /// Paired positives so far.
        positives: usize,
        /// Paired negatives so far.
        negatives: usize,
        /// What is needed.
        minimums: Minimums,
    },
    /// One model has a clearly lower log-loss and the AUC does not clearly point the other way.
    Better {
        /// The better model.
        side: Side,
        /// The numbers.
        evidence: Evidence,
    },
    /// The log-loss and the AUC clearly favour different models.
    Mixed {
        /// The model with the lower log-loss (the other ranks better).
        lower_log_loss: Side,
        /// The numbers.
        evidence: Evidence,
    },
    /// Only the AUC differs clearly.
    RanksBetter {
        /// The model with the higher AUC.
        side: Side,
        /// The numbers.
        evidence: Evidence,
    },
    /// Neither test finds a clear difference.
    NoClearDifference {
        /// The numbers.
        evidence: Evidence,
    },
}

impl Verdict {
    /// A stable machine-readable code: `not_enough_outcomes`, `challenger_better`, `champion_better`, `mixed`,
    /// `challenger_ranks_better`, `champion_ranks_better` or `no_clear_difference`.
    pub fn code(&self) -> &'static str {
        match self {
            Verdict::NotEnoughOutcomes { .. } => "not_enough_outcomes",
            Verdict::Better {
                side: Side::Challenger,
                ..
            } => "challenger_better",
            Verdict::Better {
                side: Side::Champion,
                ..
            } => "champion_better",
            Verdict::Mixed { .. } => "mixed",
            Verdict::RanksBetter {
                side: Side::Challenger,
                ..
            } => "challenger_ranks_better",
            Verdict::RanksBetter {
                side: Side::Champion,
                ..
            } => "champion_ranks_better",
            Verdict::NoClearDifference { .. } => "no_clear_difference",
        }
    }
}

fn p_text(p: Option<f64>) -> String {
    match p {
        Some(p) if p < 1e-4 => "p < 0.0001".to_string(),
        Some(p) => format!("p = {p:.4}"),
        None => "no test: the two models agree on every case".to_string(),
    }
}

fn evidence_text(e: &Evidence) -> String {
    let ll = match e.log_loss_difference {
        Some(d) => format!(
            "log-loss difference {d:+.5} per case ({})",
            p_text(e.log_loss_p)
        ),
        None => "log-loss difference not available".to_string(),
    };
    let auc = match e.auc_difference {
        Some(d) => format!("AUC difference {d:+.4} ({})", p_text(e.auc_p)),
        None => "AUC difference not available".to_string(),
    };
    format!("{ll}; {auc}; differences are challenger minus champion")
}

impl fmt::Display for Verdict {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Verdict::NotEnoughOutcomes {
                positives,
                negatives,
                minimums,
            } => write!(
                f,
                "not enough outcomes yet: {positives} positive and {negatives} negative outcomes are matched to \
                 both models; a verdict needs at least {} and {}",
                minimums.positives, minimums.negatives
            ),
            Verdict::Better { side, evidence } => write!(
                f,
                "{} better: lower log-loss on the same cases; {}",
                side.as_str(),
                evidence_text(evidence)
            ),
            Verdict::Mixed {
                lower_log_loss,
                evidence,
            } => {
                let other = match lower_log_loss {
                    Side::Champion => Side::Challenger,
                    Side::Challenger => Side::Champion,
                };
                write!(
                    f,
                    "mixed: the {} has the lower log-loss but the {} ranks cases better; {}",
                    lower_log_loss.as_str(),
                    other.as_str(),
                    evidence_text(evidence)
                )
            }
            Verdict::RanksBetter { side, evidence } => write!(
                f,
                "{} ranks cases better, but the log-loss shows no clear difference; {}",
                side.as_str(),
                evidence_text(evidence)
            ),
            Verdict::NoClearDifference { evidence } => write!(
                f,
                "no clear difference between champion and challenger; {}",
                evidence_text(evidence)
            ),
        }
    }
}

/// The rule that turns test results into a [`Verdict`] (see the module overview).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VerdictRule {
    /// Significance level of each two-sided test.
    pub alpha: f64,
    /// Least paired outcomes of each class.
    pub minimums: Minimums,
}

impl Default for VerdictRule {
    /// `alpha = 0.05` (common practice, no single source) and [`Minimums::default`].
    fn default() -> Self {
        VerdictRule {
            alpha: 0.05,
            minimums: Minimums::default(),
        }
    }
}

impl VerdictRule {
    /// Judges the paired log-loss test and the DeLong test (either may be missing when it could not be computed).
    pub fn judge(
        &self,
        positives: usize,
        negatives: usize,
        log_loss: Option<&PairedTest>,
        delong: Option<&DeLongTest>,
    ) -> Verdict {
        if positives < self.minimums.positives || negatives < self.minimums.negatives {
            return Verdict::NotEnoughOutcomes {
                positives,
                negatives,
                minimums: self.minimums,
            };
        }
        let evidence = Evidence {
            log_loss_difference: log_loss.map(|t| t.mean),
            log_loss_p: log_loss.and_then(|t| t.p_value),
            auc_difference: delong.map(|t| t.difference),
            auc_p: delong.and_then(|t| t.p_value),
        };
        let significant = |p: Option<f64>| p.is_some_and(|p| p < self.alpha);
        // Lower log-loss (negative difference) and higher AUC (positive difference) favour the challenger.
        let ll_side = significant(evidence.log_loss_p).then(|| {
            if evidence.log_loss_difference.unwrap_or(0.0) < 0.0 {
                Side::Challenger
            } else {
                Side::Champion
            }
        });
        let auc_side = significant(evidence.auc_p).then(|| {
            if evidence.auc_difference.unwrap_or(0.0) > 0.0 {
                Side::Challenger
            } else {
                Side::Champion
            }
        });
        match (ll_side, auc_side) {
            (Some(a), Some(b)) if a != b => Verdict::Mixed {
                lower_log_loss: a,
                evidence,
            },
            (Some(side), _) => Verdict::Better { side, evidence },
            (None, Some(side)) => Verdict::RanksBetter { side, evidence },
            (None, None) => Verdict::NoClearDifference { evidence },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::compare::VarianceEstimator;

    fn ll(mean: f64, p: f64) -> PairedTest {
        PairedTest {
            cases: 100,
            mean,
            standard_error: 0.01,
            statistic: Some(mean / 0.01),
            p_value: Some(p),
            estimator: VarianceEstimator::Independent,
        }
    }

    fn auc(difference: f64, p: f64) -> DeLongTest {
        DeLongTest {
            positives: 50,
            negatives: 50,
            auc_champion: 0.8,
            auc_challenger: 0.8 + difference,
            se_champion: 0.02,
            se_challenger: 0.02,
            covariance: 0.0002,
            difference,
            standard_error: 0.02,
            z: Some(difference / 0.02),
            p_value: Some(p),
        }
    }

    #[test]
    fn rule_cases() {
        let r = VerdictRule::default();
        let v = r.judge(29, 500, Some(&ll(-0.1, 0.001)), Some(&auc(0.1, 0.001)));
        assert_eq!(v.code(), "not_enough_outcomes");
        assert!(v
            .to_string()
            .starts_with("not enough outcomes yet: 29 positive"));
        let v = r.judge(30, 30, Some(&ll(-0.1, 0.001)), Some(&auc(0.01, 0.5)));
        assert_eq!(v.code(), "challenger_better");
        assert!(v.to_string().contains("p = 0.0010"));
        let v = r.judge(30, 30, Some(&ll(0.1, 0.001)), Some(&auc(0.05, 0.01)));
        assert_eq!(v.code(), "mixed");
        assert!(v
            .to_string()
            .starts_with("mixed: the champion has the lower log-loss"));
        let v = r.judge(30, 30, Some(&ll(0.1, 0.2)), Some(&auc(-0.05, 0.01)));
        assert_eq!(v.code(), "champion_ranks_better");
        let v = r.judge(30, 30, Some(&ll(0.1, 0.05)), None);
        assert_eq!(v.code(), "no_clear_difference");
        assert!(v.to_string().contains("AUC difference not available"));
    }
}
