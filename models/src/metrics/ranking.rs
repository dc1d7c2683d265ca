//! Ranking statistics: ROC AUC, the two-sample Kolmogorov-Smirnov statistic, gains and lift by group, and
//! confusion counts at a threshold.
//!
//! Scores may be probabilities or log-odds: every statistic here depends only on their order (or, for
//! [`confusion_at_threshold`], on a threshold on the same scale).

use super::{all_finite, both_classes, paired, split_sizes, Labels, MetricsError};

/// Row order of `scores` sorted ascending; stable, so tied scores keep row order.
fn ascending_order(scores: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    order
}

/// Area under the ROC curve in its Mann-Whitney form: the share of (positive, negative) pairs in which the positive
/// scores higher, ties counted one half (Hanley and McNeil 1982, "The meaning and use of the area under a receiver
/// operating characteristic (ROC) curve", Radiology 143). Reference: `sklearn.metrics.roc_auc_score`.
///
/// O(n log n): one sort, then a sweep over groups of tied scores; the pair count is kept as an exact integer
/// (in half pairs) and divided once. Errors: empty input, length mismatch, non-finite scores, bad labels, one
/// class only.
pub fn roc_auc<L: Labels + ?Sized>(scores: &[f64], labels: &L) -> Result<f64, MetricsError> {
    let y = paired("scores", scores, labels)?;
    all_finite("scores", scores)?;
    let positives = both_classes("ROC AUC", &y)?;
    let negatives = y.len() - positives;
    let order = ascending_order(scores);
    // Twice the Mann-Whitney U: 2 * (pairs won) + (pairs tied).
    let mut twice_u: u128 = 0;
    let mut negatives_below: u128 = 0;
    let mut start = 0;
    while start < order.len() {
        let value = scores[order[start]];
        let end = start
            + order[start..]
                .iter()
                .take_while(|&&i| scores[i] == value)
                .count();
        let pos = order[start..end].iter().filter(|&&i| y[i]).count() as u128;
        let neg = (end - start) as u128 - pos;
        twice_u += 2 * pos * negatives_below + pos * neg;
        negatives_below += neg;
        start = end;
    }
    Ok(twice_u as f64 / (2.0 * positives as f64 * negatives as f64))
}

/// Two-sample Kolmogorov-Smirnov statistic between the score distributions of positives and negatives: the
/// largest absolute gap between their empirical distribution functions, `max_t |F1(t) - F0(t)|`, evaluated at
/// every observed score with `F(t)` counting scores `<= t`. Reference: `scipy.stats.ks_2samp(...).statistic`,
/// whose arithmetic (`count / n` for each class, then the difference) is reproduced. No p-value is given.
///
/// Errors: empty input, length mismatch, non-finite scores, bad labels, one class only.
pub fn ks_statistic<L: Labels + ?Sized>(scores: &[f64], labels: &L) -> Result<f64, MetricsError> {
    let y = paired("scores", scores, labels)?;
    all_finite("scores", scores)?;
    let positives = both_classes("KS statistic", &y)?;
    let (n1, n0) = (positives as f64, (y.len() - positives) as f64);
    let order = ascending_order(scores);
    let (mut k1, mut k0) = (0usize, 0usize);
    let mut best = 0.0f64;
    let mut start = 0;
    while start < order.len() {
        let value = scores[order[start]];
        let end = start
            + order[start..]
                .iter()
                .take_while(|&&i| scores[i] == value)
                .count();
        let pos = order[start..end].iter().filter(|&&i| y[i]).count();
        k1 += pos;
        k0 += end - start - pos;
        best = best.max((k1 as f64 / n1 - k0 as f64 / n0).abs());
        start = end;
    }
    Ok(best)
}

/// One group of a gains and lift table.
#[derive(Debug, Clone, PartialEq)]
pub struct GainsRow {
    /// Group number from 0 (the highest scores).
    pub group: usize,
    /// Cases in the group.
    pub count: usize,
    /// Positives in the group.
    pub positives: usize,
    /// Highest score in the group.
    pub max_score: f64,
    /// Lowest score in the group.
    pub min_score: f64,
    /// Cases in this and all higher-scoring groups.
    pub cumulative_count: usize,
    /// Positives in this and all higher-scoring groups.
    pub cumulative_positives: usize,
    /// Gains: the share of all positives captured by this and the higher groups.
    pub cumulative_gain: f64,
    /// The group's positive rate divided by the overall positive rate.
    pub lift: f64,
    /// The positive rate of this and the higher groups divided by the overall positive rate.
    pub cumulative_lift: f64,
}

/// Gains and lift by group (deciles for `groups = 10`); common practice, no single source.
///
/// Cases are sorted by score descending with a stable sort (tied scores keep row order) and cut into `groups`
/// consecutive groups of near-equal size, the first `n mod groups` groups one case larger (as `numpy.array_split`
/// on that order). Ties at a group boundary are therefore split by row order, not kept together, so every group
/// has its stated size. Errors: empty input, length mismatch, non-finite scores, bad labels, no positive at all
/// (lift is undefined), `groups` outside `1..=n`.
pub fn gains_lift<L: Labels + ?Sized>(
    scores: &[f64],
    labels: &L,
    groups: usize,
) -> Result<Vec<GainsRow>, MetricsError> {
    let y = paired("scores", scores, labels)?;
    all_finite("scores", scores)?;
    let n = y.len();
    if groups == 0 || groups > n {
        return Err(MetricsError::BadBinCount {
            what: "number of groups",
            got: groups,
            min: 1,
            max: Some(n),
        });
    }
    let total_pos = y.iter().filter(|&&b| b).count();
    if total_pos == 0 {
        return Err(MetricsError::OneClass {
            statistic: "lift",
            present: 0,
        });
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    let overall_rate = total_pos as f64 / n as f64;
    let mut rows = Vec::with_capacity(groups);
    let (mut start, mut cum_n, mut cum_pos) = (0usize, 0usize, 0usize);
    for (group, size) in split_sizes(n, groups).into_iter().enumerate() {
        let members = &order[start..start + size];
        start += size;
        let positives = members.iter().filter(|&&i| y[i]).count();
        cum_n += size;
        cum_pos += positives;
        rows.push(GainsRow {
            group,
            count: size,
            positives,
            max_score: scores[members[0]],
            min_score: scores[members[size - 1]],
            cumulative_count: cum_n,
            cumulative_positives: cum_pos,
            cumulative_gain: cum_pos as f64 / total_pos as f64,
            lift: (positives as f64 / size as f64) / overall_rate,
            cumulative_lift: (cum_pos as f64 / cum_n as f64) / overall_rate,
        });
    }
    Ok(rows)
}

/// Counts of the four outcomes when a case is called positive if its score is strictly above the threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ConfusionCounts {
    /// Called positive, is positive.
    pub true_positive: usize,
    /// Called positive, is negative.
    pub false_positive: usize,
    /// Called negative, is negative.
    pub true_negative: usize,
    /// Called negative, is positive.
    pub false_negative: usize,
}

impl ConfusionCounts {
    /// `TP / (TP + FP)`; `None` when nothing is called positive (scikit-learn's `precision_score` reports 0 there,
    /// with a warning).
    pub fn precision(&self) -> Option<f64> {
        let called = self.true_positive + self.false_positive;
        (called > 0).then(|| self.true_positive as f64 / called as f64)
    }

    /// `TP / (TP + FN)`; `None` when there is no positive.
    pub fn recall(&self) -> Option<f64> {
        let actual = self.true_positive + self.false_negative;
        (actual > 0).then(|| self.true_positive as f64 / actual as f64)
    }
}

/// Confusion counts with the rule `score > threshold` means positive, the same strict rule as the decision path
/// elsewhere in this crate (and as `LogisticRegression.predict`'s `h > 0`). Precision and recall from these counts
/// match `sklearn.metrics.precision_score` and `recall_score` on labels predicted by the same rule.
///
/// Errors: empty input, length mismatch, non-finite scores or threshold, bad labels.
pub fn confusion_at_threshold<L: Labels + ?Sized>(
    scores: &[f64],
    labels: &L,
    threshold: f64,
) -> Result<ConfusionCounts, MetricsError> {
    let y = paired("scores", scores, labels)?;
    all_finite("scores", scores)?;
    if !threshold.is_finite() {
        return Err(MetricsError::BadParameter {
            name: "threshold",
            value: threshold,
            reason: "must be finite",
        });
    }
    let mut c = ConfusionCounts {
        true_positive: 0,
        false_positive: 0,
        true_negative: 0,
        false_negative: 0,
    };
    for (&s, &yi) in scores.iter().zip(y.iter()) {
        match (s > threshold, yi) {
            (true, true) => c.true_positive += 1,
            (true, false) => c.false_positive += 1,
            (false, false) => c.true_negative += 1,
            (false, true) => c.false_negative += 1,
        }
    }
    Ok(c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auc_hand_computed_with_a_tie() {
        // Positives at 0.8, 0.4; negatives at 0.4, 0.1. Pairs: (0.8,0.4) win, (0.8,0.1) win, (0.4,0.4) tie,
        // (0.4,0.1) win -> (3 + 0.5) / 4 = 0.875.
        let auc = roc_auc(&[0.8, 0.4, 0.4, 0.1], &[1u8, 1, 0, 0]).unwrap();
        assert_eq!(auc, 0.875);
        assert_eq!(roc_auc(&[0.3, 0.3], &[1u8, 0]).unwrap(), 0.5);
        assert_eq!(
            roc_auc(&[0.1, 0.9], &[1u8, 1]),
            Err(MetricsError::OneClass {
                statistic: "ROC AUC",
                present: 1
            })
        );
    }

    #[test]
    fn ks_hand_computed() {
        // Positives {0.6, 0.9}, negatives {0.1, 0.6, 0.7}. At t = 0.1: |0 - 1/3| = 1/3; t = 0.6: |1/2 - 2/3| = 1/6;
        // t = 0.7: |1/2 - 1| = 1/2; t = 0.9: 0. Statistic 1/2.
        let d = ks_statistic(&[0.6, 0.9, 0.1, 0.6, 0.7], &[1u8, 1, 0, 0, 0]).unwrap();
        assert_eq!(d, 0.5);
    }

    #[test]
    fn gains_hand_computed() {
        // Scores descending 0.9 (1), 0.8 (1), 0.5 (0), 0.4 (1), 0.2 (0); 2 groups of 3 and 2.
        // Overall rate 3/5. Group 0: 2 of 3 -> lift (2/3)/(3/5) = 10/9, gain 2/3. Group 1: 1 of 2 -> lift 5/6,
        // cumulative lift 1, gain 1.
        let rows = gains_lift(&[0.5, 0.9, 0.2, 0.8, 0.4], &[0u8, 1, 0, 1, 1], 2).unwrap();
        assert_eq!(
            (
                rows[0].count,
                rows[0].positives,
                rows[1].count,
                rows[1].positives
            ),
            (3, 2, 2, 1)
        );
        assert!((rows[0].lift - 10.0 / 9.0).abs() < 1e-15);
        assert!((rows[0].cumulative_gain - 2.0 / 3.0).abs() < 1e-15);
        assert!((rows[1].lift - 5.0 / 6.0).abs() < 1e-15);
        assert!((rows[1].cumulative_lift - 1.0).abs() < 1e-15);
        assert_eq!((rows[0].max_score, rows[0].min_score), (0.9, 0.5));
        assert!(matches!(
            gains_lift(&[0.5], &[0u8], 1),
            Err(MetricsError::OneClass { .. })
        ));
        assert!(matches!(
            gains_lift(&[0.5], &[1u8], 2),
            Err(MetricsError::BadBinCount { .. })
        ));
    }

    #[test]
    fn threshold_is_strict() {
        let c = confusion_at_threshold(&[0.5, 0.7, 0.2, 0.5], &[1u8, 1, 0, 0], 0.5).unwrap();
        assert_eq!(
            c,
            ConfusionCounts {
                true_positive: 1,
                false_positive: 0,
                true_negative: 2,
                false_negative: 1
            }
        );
        assert_eq!(c.precision(), Some(1.0));
        assert_eq!(c.recall(), Some(0.5));
        let none = confusion_at_threshold(&[0.1], &[0u8], 0.5).unwrap();
        assert_eq!((none.precision(), none.recall()), (None, None));
    }
}
