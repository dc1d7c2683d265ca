//! The DeLong test for two correlated ROC AUCs measured on the same cases.
//!
//! DeLong, DeLong and Clarke-Pearson (1988), "Comparing the areas under two or more correlated receiver operating
//! characteristic curves: a nonparametric approach", Biometrics 44. With `m` positives `X_i` and `n` negatives `Y_j`
//! scored by model `r`, and `psi(x, y) = 1` if `x > y`, `1/2` if equal, `0` otherwise:
//! - structural components `V10_r(X_i) = (1/n) sum_j psi(X_i, Y_j)` and `V01_r(Y_j) = (1/m) sum_i psi(X_i, Y_j)`;
//!   each averages to the Mann-Whitney AUC `theta_r`;
//! - `S10` and `S01` are the 2x2 sample covariance matrices (divisors `m - 1` and `n - 1`) of the components over
//!   the positives and over the negatives, and `S = S10 / m + S01 / n` estimates the covariance of the two AUCs;
//! - `z = (theta_b - theta_a) / sqrt(S_aa + S_bb - 2 S_ab)`, two-sided p-value from the standard normal.
//!
//! The components are computed in `O(N log N)` from midranks instead of the `O(m n)` pair sum, following Sun and Xu
//! (2014), "Fast implementation of DeLong's algorithm for comparing the areas under correlated receiver operating
//! characteristic curves", IEEE Signal Processing Letters 21: with `T_z` the midranks of a positive among all cases
//! and `T_x` among the positives only, `V10(X_i) = (T_z - T_x) / n` (the number of negatives below, ties counted one
//! half); likewise `V01(Y_j) = 1 - (T_z - T_y) / m`.

use super::{check_pair, z_and_p, CompareError};
use crate::metrics::{Labels, MetricsError};

/// Average (1-based) ranks: tied values share the mean of the ranks they span, as `scipy.stats.rankdata`
/// (`method="average"`). Values are ordered by `f64::total_cmp`; callers refuse NaN first.
pub fn midranks(xs: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..xs.len()).collect();
    order.sort_by(|&a, &b| xs[a].total_cmp(&xs[b]));
    let mut ranks = vec![0.0; xs.len()];
    let mut start = 0;
    while start < order.len() {
        let value = xs[order[start]];
        let end = start
            + order[start..]
                .iter()
                .take_while(|&&i| xs[i] == value)
                .count();
        // Ranks start + 1 ..= end share their mean.
        let rank = (start + 1 + end) as f64 / 2.0;
        for &i in &order[start..end] {
            ranks[i] = rank;
        }
        start = end;
    }
    ranks
}

/// The DeLong comparison of two AUCs on the same cases.
#[derive(Debug, Clone, PartialEq)]
pub struct DeLongTest {
    /// Number of positives `m`.
    pub positives: usize,
    /// Number of negatives `n`.
    pub negatives: usize,
    /// Champion's AUC.
    pub auc_champion: f64,
    /// Challenger's AUC.
    pub auc_challenger: f64,
    /// DeLong standard error of the champion's AUC, `sqrt(S_aa)`.
    pub se_champion: f64,
    /// DeLong standard error of the challenger's AUC, `sqrt(S_bb)`.
    pub se_challenger: f64,
    /// Estimated covariance of the two AUCs, `S_ab`.
    pub covariance: f64,
    /// `auc_challenger - auc_champion`.
    pub difference: f64,
    /// Standard error of the difference, `sqrt(S_aa + S_bb - 2 S_ab)`.
    pub standard_error: f64,
    /// `difference / standard_error`; `None` when the standard error is zero.
    pub z: Option<f64>,
    /// Two-sided p-value of `z` under the standard normal; `None` with `z`.
    pub p_value: Option<f64>,
}

/// Structural components of one model: AUC, `V10` over the positives, `V01` over the negatives.
fn components(pos: &[f64], neg: &[f64]) -> (f64, Vec<f64>, Vec<f64>) {
    let (m, n) = (pos.len(), neg.len());
    let all: Vec<f64> = pos.iter().chain(neg).copied().collect();
    let tz = midranks(&all);
    let tx = midranks(pos);
    let ty = midranks(neg);
    let v10: Vec<f64> = (0..m).map(|i| (tz[i] - tx[i]) / n as f64).collect();
    let v01: Vec<f64> = (0..n)
        .map(|j| 1.0 - (tz[m + j] - ty[j]) / m as f64)
        .collect();
    // Sun and Xu (2014): theta = sum of the positives' overall ranks, less their own rank sum m(m+1)/2, over m n.
    let rank_sum: f64 = tz[..m].iter().sum();
    let auc = (rank_sum - (m * (m + 1)) as f64 / 2.0) / (m as f64 * n as f64);
    (auc, v10, v01)
}

/// Sample covariance matrix `[[aa, ab], [ab, bb]]` of two equally long vectors, divisor `len - 1`.
fn covariance(a: &[f64], b: &[f64]) -> [f64; 3] {
    let k = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / k, b.iter().sum::<f64>() / k);
    let (mut aa, mut ab, mut bb) = (0.0, 0.0, 0.0);
    for (&x, &y) in a.iter().zip(b) {
        let (dx, dy) = (x - ma, y - mb);
        aa += dx * dx;
        ab += dx * dy;
        bb += dy * dy;
    }
    [aa / (k - 1.0), ab / (k - 1.0), bb / (k - 1.0)]
}

/// DeLong test of `AUC(challenger) - AUC(champion)` on the same cases (row `i` of each vector is one case).
///
/// Scores may be log-odds or probabilities (only their order matters). Errors: different lengths, non-finite
/// scores, a label other than 0/1, fewer than two positives or two negatives (the covariances need two of each).
pub fn delong_test<L: Labels + ?Sized>(
    champion: &[f64],
    challenger: &[f64],
    labels: &L,
) -> Result<DeLongTest, CompareError> {
    let y = labels.to_bools()?;
    check_pair("DeLong test", champion, challenger, 0)?;
    if y.len() != champion.len() {
        return Err(CompareError::LengthMismatch {
            left: "scores",
            left_len: champion.len(),
            right: "labels",
            right_len: y.len(),
        });
    }
    let m = y.iter().filter(|&&b| b).count();
    let n = y.len() - m;
    if m == 0 || n == 0 {
        return Err(MetricsError::OneClass {
            statistic: "DeLong test",
            present: u8::from(m > 0),
        }
        .into());
    }
    for (statistic, got) in [
        ("DeLong test (positives)", m),
        ("DeLong test (negatives)", n),
    ] {
        if got < 2 {
            return Err(CompareError::TooFew {
                statistic,
                need: 2,
                got,
            });
        }
    }
    let split = |s: &[f64]| -> (Vec<f64>, Vec<f64>) {
        let pos = s.iter().zip(y.iter()).filter(|p| *p.1).map(|p| *p.0);
        let neg = s.iter().zip(y.iter()).filter(|p| !*p.1).map(|p| *p.0);
        (pos.collect(), neg.collect())
    };
    let (pa, na) = split(champion);
    let (pb, nb) = split(challenger);
    let (auc_a, v10_a, v01_a) = components(&pa, &na);
    let (auc_b, v10_b, v01_b) = components(&pb, &nb);
    let s10 = covariance(&v10_a, &v10_b);
    let s01 = covariance(&v01_a, &v01_b);
    let s: [f64; 3] = std::array::from_fn(|k| s10[k] / m as f64 + s01[k] / n as f64);
    let var_diff = (s[0] + s[2] - 2.0 * s[1]).max(0.0);
    let difference = auc_b - auc_a;
    let standard_error = var_diff.sqrt();
    let (z, p_value) = z_and_p(difference, standard_error);
    Ok(DeLongTest {
        positives: m,
        negatives: n,
        auc_champion: auc_a,
        auc_challenger: auc_b,
        se_champion: s[0].max(0.0).sqrt(),
        se_challenger: s[2].max(0.0).sqrt(),
        covariance: s[1],
        difference,
        standard_error,
        z,
        p_value,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::metrics::roc_auc;

    /// The pair-sum definition of the 1988 paper, O(m n), to check the midrank form against.
    fn by_pairs(a: &[f64], b: &[f64], y: &[bool]) -> (f64, f64, f64) {
        let psi = |x: f64, z: f64| {
            if x > z {
                1.0
            } else if x == z {
                0.5
            } else {
                0.0
            }
        };
        let pos: Vec<usize> = (0..y.len()).filter(|&i| y[i]).collect();
        let neg: Vec<usize> = (0..y.len()).filter(|&i| !y[i]).collect();
        let comp = |s: &[f64]| {
            let v10: Vec<f64> = pos
                .iter()
                .map(|&i| neg.iter().map(|&j| psi(s[i], s[j])).sum::<f64>() / neg.len() as f64)
                .collect();
            let v01: Vec<f64> = neg
                .iter()
                .map(|&j| pos.iter().map(|&i| psi(s[i], s[j])).sum::<f64>() / pos.len() as f64)
                .collect();
            (v10, v01)
        };
        let (a10, a01) = comp(a);
        let (b10, b01) = comp(b);
        let c10 = covariance(&a10, &b10);
        let c01 = covariance(&a01, &b01);
        let (m, n) = (pos.len() as f64, neg.len() as f64);
        let auc = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
        let var = (c10[0] + c10[2] - 2.0 * c10[1]) / m + (c01[0] + c01[2] - 2.0 * c01[1]) / n;
        (auc(&a10), auc(&b10), var.sqrt())
    }

    #[test]
    fn midranks_average_ties() {
        // Hand-computed: [3, 1, 3, 2, 3] -> 1 is rank 1, 2 is rank 2, the three 3s share ranks 3..5 -> 4.
        assert_eq!(
            midranks(&[3.0, 1.0, 3.0, 2.0, 3.0]),
            vec![4.0, 1.0, 4.0, 2.0, 4.0]
        );
        assert!(midranks(&[]).is_empty());
    }

    #[test]
    fn midrank_form_equals_the_pair_definition_with_ties() {
        // Small made-up scores with ties within and across classes.
        let y = [
            true, false, true, true, false, false, true, false, false, true,
        ];
        let a = [0.9, 0.1, 0.4, 0.4, 0.4, 0.2, 0.8, 0.3, 0.3, 0.7];
        let b = [2.0, -1.0, 0.5, 1.5, 0.5, 0.0, 0.0, 1.0, -2.0, 3.0];
        let t = delong_test(&a, &b, &y).unwrap();
        let (auc_a, auc_b, se) = by_pairs(&a, &b, &y);
        assert!((t.auc_champion - auc_a).abs() < 1e-15);
        assert!((t.auc_challenger - auc_b).abs() < 1e-15);
        assert!((t.standard_error - se).abs() < 1e-15);
        // The AUCs are the Mann-Whitney ones of metrics::roc_auc (Hanley and McNeil 1982).
        assert!((t.auc_champion - roc_auc(&a, &y).unwrap()).abs() < 1e-15);
        assert!((t.auc_challenger - roc_auc(&b, &y).unwrap()).abs() < 1e-15);
        let z = t.z.unwrap();
        assert!((z - t.difference / t.standard_error).abs() < 1e-15);
    }

    #[test]
    fn identical_models_have_no_statistic() {
        let y = [true, false, true, false];
        let a = [0.9, 0.1, 0.4, 0.5];
        let t = delong_test(&a, &a, &y).unwrap();
        assert_eq!((t.difference, t.standard_error, t.z), (0.0, 0.0, None));
        assert!(t.se_champion > 0.0);
    }

    #[test]
    fn too_few_of_a_class() {
        assert!(matches!(
            delong_test(&[0.1, 0.2, 0.3], &[0.1, 0.2, 0.3], &[true, false, false]),
            Err(CompareError::TooFew {
                need: 2,
                got: 1,
                ..
            })
        ));
        assert!(matches!(
            delong_test(&[0.1, 0.2], &[0.1, 0.2], &[false, false]),
            Err(CompareError::Metric(MetricsError::OneClass { .. }))
        ));
        assert!(matches!(
            delong_test(&[0.1, 0.2], &[0.1, 0.2], &[false]),
            Err(CompareError::LengthMismatch { .. })
        ));
    }
}
