//! Offline evaluation of a model on labelled cases: the figures of the live report, the operating point at a
//! threshold, and the paired comparison with a challenger.
//!
//! Every figure comes from [`crate::metrics`] and [`crate::compare`], so it agrees with the references those are
//! tested against. Ranking figures (AUC, KS, gains) are on the final log-odds, the calibration figures on the
//! probability, log-loss from the log-odds, exactly as the live report computes them.
//!
//! The operating point reads the positive class as the outcome a lender or issuer declines for (default, fraud):
//! a case is declined when its probability is above the threshold, approved otherwise, the same strict rule as
//! [`DecisionRule`](crate::DecisionRule). With costs, the threshold is Elkan's `c_fp / (c_fp + c_fn)` and the expected
//! cost per case is `(c_fp FP + c_fn FN) / n`.

use crate::compare::{compare_outcomes, CompareError, OutcomeComparison, OutcomeOptions};
use crate::metrics::{
    brier_decomposition, brier_score, calibration_table, confusion_at_threshold, gains_lift,
    hosmer_lemeshow, ks_p_value, ks_statistic, log_loss_from_log_odds, roc_auc,
    student_t_two_sided_p, BinStrategy, BrierDecomposition, CalibrationTable, ConfusionCounts,
    GainsRow, HlGrouping, HosmerLemeshow, MetricsError,
};

/// The choices a reviewer makes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct EvaluateOptions {
    /// Bins of the calibration table and the Brier decomposition.
    pub bins: BinStrategy,
    /// Hosmer-Lemeshow groups.
    pub hl: HlGrouping,
    /// Gains and lift groups.
    pub gains_groups: usize,
    /// Equal-width bins of the class histograms.
    pub histogram_bins: usize,
}

impl Default for EvaluateOptions {
    /// The live report's choices: ten equal-width bins, ten groups by rank, deciles, twenty histogram bins.
    fn default() -> Self {
        EvaluateOptions {
            bins: BinStrategy::Uniform(10),
            hl: HlGrouping::ByRank(10),
            gains_groups: 10,
            histogram_bins: 20,
        }
    }
}

/// The figures of one model on labelled cases.
#[derive(Debug, Clone, PartialEq)]
pub struct Evaluation {
    /// Cases.
    pub cases: usize,
    /// Of which positive.
    pub positives: usize,
    /// Mean probability.
    pub mean_probability: f64,
    /// Mean log-loss (nats) from the log-odds.
    pub log_loss: f64,
    /// Brier score.
    pub brier: f64,
    /// Murphy's decomposition over the calibration bins.
    pub decomposition: BrierDecomposition,
    /// ROC AUC of the log-odds.
    pub auc: f64,
    /// Two-sample KS statistic between the classes' log-odds.
    pub ks: f64,
    /// Its asymptotic two-sided p-value ([`ks_p_value`]).
    pub ks_p_value: f64,
    /// Calibration table with ECE and MCE.
    pub calibration: CalibrationTable,
    /// Hosmer-Lemeshow test, or why it is undefined.
    pub hosmer_lemeshow: Result<HosmerLemeshow, MetricsError>,
    /// Gains and lift, or why they could not be formed (fewer cases than groups).
    pub gains: Result<Vec<GainsRow>, MetricsError>,
    /// Probability histogram of the negatives, equal-width bins on [0, 1].
    pub histogram_negative: Vec<u64>,
    /// Same for the positives.
    pub histogram_positive: Vec<u64>,
}

/// Evaluates one model from its final log-odds and probabilities on cases with labels `y`.
///
/// Errors: empty or unpaired input, non-finite values, one class only (AUC and KS need both), bad bin counts.
pub fn evaluate(
    log_odds: &[f64],
    probabilities: &[f64],
    y: &[bool],
    options: &EvaluateOptions,
) -> Result<Evaluation, MetricsError> {
    let log_loss = log_loss_from_log_odds(log_odds, y)?;
    let brier = brier_score(probabilities, y)?;
    let decomposition = brier_decomposition(probabilities, y, options.bins)?;
    let auc = roc_auc(log_odds, y)?;
    let ks = ks_statistic(log_odds, y)?;
    let positives = y.iter().filter(|&&b| b).count();
    let ks_p_value = ks_p_value(ks, positives, y.len() - positives)?;
    let calibration = calibration_table(probabilities, y, options.bins)?;
    let bins = options.histogram_bins.max(1);
    let mut histogram_negative = vec![0u64; bins];
    let mut histogram_positive = vec![0u64; bins];
    for (&p, &yi) in probabilities.iter().zip(y) {
        let bin = ((p * bins as f64) as usize).min(bins - 1);
        if yi {
            histogram_positive[bin] += 1;
        } else {
            histogram_negative[bin] += 1;
        }
    }
    Ok(Evaluation {
        cases: y.len(),
        positives,
        mean_probability: probabilities.iter().sum::<f64>() / y.len() as f64,
        log_loss,
        brier,
        decomposition,
        auc,
        ks,
        ks_p_value,
        calibration,
        hosmer_lemeshow: hosmer_lemeshow(probabilities, y, options.hl),
        gains: gains_lift(log_odds, y, options.gains_groups),
        histogram_negative,
        histogram_positive,
    })
}

/// Misclassification costs: a needless decline and a missed positive.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Costs {
    /// Cost of declining a case that turns out negative.
    pub false_positive: f64,
    /// Cost of approving a case that turns out positive.
    pub false_negative: f64,
}

/// Approvals and declines at one probability threshold.
#[derive(Debug, Clone, PartialEq)]
pub struct OperatingPoint {
    /// Declined when the probability is above this.
    pub threshold: f64,
    /// The four counts (declined = called positive).
    pub counts: ConfusionCounts,
    /// Share of cases approved.
    pub approval_rate: f64,
    /// Share of cases declined.
    pub decline_rate: f64,
    /// Share of the declined that are positive; `None` when nothing is declined.
    pub precision: Option<f64>,
    /// Share of the positives that are declined; `None` without positives.
    pub recall: Option<f64>,
    /// `(c_fp FP + c_fn FN) / n` when costs are given.
    pub expected_cost: Option<f64>,
}

/// The operating point at `threshold` on `probabilities`.
///
/// Errors: empty or unpaired input, a threshold outside [0, 1], costs not finite and non-negative.
pub fn operating_point(
    probabilities: &[f64],
    y: &[bool],
    threshold: f64,
    costs: Option<Costs>,
) -> Result<OperatingPoint, MetricsError> {
    check_point(threshold, costs)?;
    let counts = confusion_at_threshold(probabilities, y, threshold)?;
    Ok(point_from_counts(threshold, counts, costs))
}

/// [`operating_point`] from the four counts at `threshold` (declined = above it), counted by the caller over cases
/// it does not hold (a pass over a database cursor): the same figures from the same counts.
///
/// Errors: a threshold outside [0, 1], costs not finite and non-negative, no case counted.
pub fn operating_point_from_counts(
    threshold: f64,
    counts: ConfusionCounts,
    costs: Option<Costs>,
) -> Result<OperatingPoint, MetricsError> {
    check_point(threshold, costs)?;
    if counts.true_positive + counts.false_positive + counts.true_negative + counts.false_negative
        == 0
    {
        return Err(MetricsError::Empty {
            what: "probabilities",
        });
    }
    Ok(point_from_counts(threshold, counts, costs))
}

fn check_point(threshold: f64, costs: Option<Costs>) -> Result<(), MetricsError> {
    if !(0.0..=1.0).contains(&threshold) {
        return Err(MetricsError::BadParameter {
            name: "threshold",
            value: threshold,
            reason: "must lie in [0, 1]",
        });
    }
    if let Some(c) = costs {
        for (name, v) in [
            ("false-positive cost", c.false_positive),
            ("false-negative cost", c.false_negative),
        ] {
            if !(v.is_finite() && v >= 0.0) {
                return Err(MetricsError::BadParameter {
                    name,
                    value: v,
                    reason: "must be finite and at least 0",
                });
            }
        }
    }
    Ok(())
}

/// One score band: its cases, and the operating point of declining it and every band above.
#[derive(Debug, Clone, PartialEq)]
pub struct BandPoint {
    /// The band's label.
    pub label: String,
    /// Lower probability edge (excluded; 0 for the first band, included there).
    pub lower: f64,
    /// Upper probability edge (included).
    pub upper: f64,
    /// Cases in the band.
    pub cases: usize,
    /// Positives in the band.
    pub positives: usize,
    /// Declining this band and every band above it: the operating point at the band's lower edge.
    pub from_here: OperatingPoint,
}

/// Bands cut at `edges` (strictly increasing in (0, 1), `labels` one more), as
/// [`DecisionRule::Bands`](crate::DecisionRule::Bands) assigns them.
pub fn band_points(
    probabilities: &[f64],
    y: &[bool],
    edges: &[f64],
    labels: &[String],
    costs: Option<Costs>,
) -> Result<Vec<BandPoint>, MetricsError> {
    if labels.len() != edges.len() + 1 {
        return Err(MetricsError::BadParameter {
            name: "band labels",
            value: labels.len() as f64,
            reason: "must be one more than the band edges",
        });
    }
    let mut cases = vec![0usize; labels.len()];
    let mut positives = vec![0usize; labels.len()];
    for (&p, &yi) in probabilities.iter().zip(y) {
        let i = edges.partition_point(|&e| e < p);
        cases[i] += 1;
        positives[i] += usize::from(yi);
    }
    (0..labels.len())
        .map(|i| {
            let lower = if i == 0 { 0.0 } else { edges[i - 1] };
            let upper = edges.get(i).copied().unwrap_or(1.0);
            // The first band starts at 0, included: declining from it declines every case.
            let from_here = if i == 0 {
                let mut all = operating_point(probabilities, y, 0.0, costs)?;
                let zero = probabilities.iter().zip(y).filter(|(&p, _)| p <= 0.0);
                let (mut zero_neg, mut zero_pos) = (0usize, 0usize);
                for (_, &yi) in zero {
                    if yi {
                        zero_pos += 1;
                    } else {
                        zero_neg += 1;
                    }
                }
                if zero_neg + zero_pos > 0 {
                    all = point_from_counts(
                        0.0,
                        ConfusionCounts {
                            true_positive: all.counts.true_positive + zero_pos,
                            false_positive: all.counts.false_positive + zero_neg,
                            true_negative: 0,
                            false_negative: 0,
                        },
                        costs,
                    );
                }
                all
            } else {
                operating_point(probabilities, y, lower, costs)?
            };
            Ok(BandPoint {
                label: labels[i].clone(),
                lower,
                upper,
                cases: cases[i],
                positives: positives[i],
                from_here,
            })
        })
        .collect()
}

fn point_from_counts(
    threshold: f64,
    counts: ConfusionCounts,
    costs: Option<Costs>,
) -> OperatingPoint {
    let n = (counts.true_positive
        + counts.false_positive
        + counts.true_negative
        + counts.false_negative) as f64;
    let declined = (counts.true_positive + counts.false_positive) as f64;
    OperatingPoint {
        threshold,
        counts,
        approval_rate: 1.0 - declined / n,
        decline_rate: declined / n,
        precision: counts.precision(),
        recall: counts.recall(),
        expected_cost: costs.map(|c| {
            (c.false_positive * counts.false_positive as f64
                + c.false_negative * counts.false_negative as f64)
                / n
        }),
    }
}

/// The paired comparison of a challenger with the champion on the same labelled cases, with Student t p-values of
/// the paired tests beside the normal ones.
#[derive(Debug, Clone, PartialEq)]
pub struct PairedComparison {
    /// Log-loss, Brier and ECE of each, the Diebold-Mariano tests with independent cases, the DeLong test, the
    /// verdict.
    pub outcomes: OutcomeComparison,
    /// Two-sided p-value of the paired log-loss statistic under Student's t with `n - 1` degrees of freedom (with
    /// independent cases the statistic is the paired t statistic, `scipy.stats.ttest_rel`).
    pub log_loss_t_p_value: Option<f64>,
    /// The same for the paired Brier statistic.
    pub brier_t_p_value: Option<f64>,
}

/// Compares the challenger's log-odds with the champion's on the same cases.
pub fn compare_on_labels(
    champion: &[f64],
    challenger: &[f64],
    y: &[bool],
    options: &EvaluateOptions,
) -> Result<PairedComparison, CompareError> {
    let outcomes = compare_outcomes(
        champion,
        challenger,
        y,
        &OutcomeOptions {
            ece_bins: options.bins,
            ..OutcomeOptions::default()
        },
    )?;
    let t_p = |test: &Option<crate::compare::PairedTest>| {
        test.as_ref().and_then(|t| {
            t.statistic
                .and_then(|s| student_t_two_sided_p(s, (t.cases - 1) as f64).ok())
        })
    };
    Ok(PairedComparison {
        log_loss_t_p_value: t_p(&outcomes.log_loss),
        brier_t_p_value: t_p(&outcomes.brier),
        outcomes,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn operating_point_hand_computed() {
        // Five cases, threshold 0.5: declined are 0.6 (positive) and 0.9 (negative).
        let p = [0.1, 0.6, 0.5, 0.9, 0.3];
        let y = [false, true, true, false, false];
        let c = Costs {
            false_positive: 1.0,
            false_negative: 10.0,
        };
        let o = operating_point(&p, &y, 0.5, Some(c)).unwrap();
        assert_eq!(o.decline_rate, 0.4);
        assert_eq!(o.approval_rate, 0.6);
        assert_eq!(o.precision, Some(0.5));
        assert_eq!(o.recall, Some(0.5));
        // One false positive (0.9) and one false negative (0.5): (1 + 10) / 5.
        assert_eq!(o.expected_cost, Some(11.0 / 5.0));
        assert!(operating_point(&p, &y, 1.5, None).is_err());
    }

    #[test]
    fn bands_partition_the_cases() {
        let p = [0.0, 0.1, 0.25, 0.5, 0.9];
        let y = [false, false, true, false, true];
        let labels: Vec<String> = ["low", "mid", "high"].map(String::from).to_vec();
        let b = band_points(&p, &y, &[0.2, 0.5], &labels, None).unwrap();
        assert_eq!(b.iter().map(|x| x.cases).collect::<Vec<_>>(), vec![2, 2, 1]);
        assert_eq!(b[0].from_here.decline_rate, 1.0);
        assert_eq!(b[1].from_here.decline_rate, 3.0 / 5.0);
        assert_eq!(b[2].from_here.decline_rate, 1.0 / 5.0);
    }
}
