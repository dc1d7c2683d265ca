//! Population stability index (PSI) and the binning it uses.
//!
//! `PSI = sum_i (a_i - e_i) ln(a_i / e_i)` over bins, with `e_i` the expected (reference) share and `a_i` the
//! actual share of bin `i` (credit scorecard literature, e.g. Siddiqi 2006, "Credit Risk Scorecards", Wiley).
//! The usual reading, below 0.1 stable, 0.1 to 0.25 worth a look, above 0.25 shifted, is common practice with no
//! single source.
//!
//! A share of 0 makes a term infinite, so an empty-bin rule is always applied, and it is explicit
//! ([`EmptyBinRule`]): flooring the shares and adding a count to every bin give noticeably different values on
//! the same data, so a PSI should be reported with its rule.
//!
//! Bins follow the model file's reference distribution: interior edges `e_0 < ... < e_{m-1}`, bin `i` is
//! `(e_{i-1}, e_i]`, the first bin open below and the last open above, `m + 1` bins in all.

use super::quantile::{quantile_edges_sorted, right_closed_bin, sorted_copy};
use super::{all_finite, non_empty, MetricsError};

/// How empty (or nearly empty) bins are kept from making the PSI infinite.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum EmptyBinRule {
    /// Replace every share below `eps` (expected and actual) by `eps`; the shares are not renormalised.
    Floor(f64),
    /// Add this count (e.g. 0.5) to every bin's count, on each side that is given as counts, before normalising.
    /// Expected shares given as fractions are used as they are and must then all be positive.
    AddCount(f64),
}

impl Default for EmptyBinRule {
    /// `Floor(1e-4)`.
    fn default() -> Self {
        EmptyBinRule::Floor(1e-4)
    }
}

impl EmptyBinRule {
    fn validate(self) -> Result<(), MetricsError> {
        match self {
            EmptyBinRule::Floor(eps) if !(eps > 0.0 && eps < 1.0) => {
                Err(MetricsError::BadParameter {
                    name: "floor",
                    value: eps,
                    reason: "must lie in (0, 1)",
                })
            }
            EmptyBinRule::AddCount(k) if !(k > 0.0 && k.is_finite()) => {
                Err(MetricsError::BadParameter {
                    name: "added count",
                    value: k,
                    reason: "must be finite and positive",
                })
            }
            _ => Ok(()),
        }
    }

    /// Shares from counts under this rule.
    fn shares(self, counts: &[u64]) -> Vec<f64> {
        let total: f64 = counts.iter().map(|&c| c as f64).sum();
        match self {
            EmptyBinRule::Floor(eps) => counts
                .iter()
                .map(|&c| (c as f64 / total).max(eps))
                .collect(),
            EmptyBinRule::AddCount(k) => {
                let denom = total + k * counts.len() as f64;
                counts.iter().map(|&c| (c as f64 + k) / denom).collect()
            }
        }
    }
}

/// Index of the bin of `value` for interior `edges` (see the module overview): the number of edges strictly
/// below `value`.
pub fn bin_index(value: f64, edges: &[f64]) -> usize {
    right_closed_bin(edges, value)
}

fn check_edges(edges: &[f64]) -> Result<(), MetricsError> {
    for (index, &value) in edges.iter().enumerate() {
        if !value.is_finite() || (index > 0 && value <= edges[index - 1]) {
            return Err(MetricsError::BadEdges { index, value });
        }
    }
    Ok(())
}

/// Counts of `values` in the `edges.len() + 1` bins. Errors: non-finite values, bad edges.
pub fn bin_counts(values: &[f64], edges: &[f64]) -> Result<Vec<u64>, MetricsError> {
    check_edges(edges)?;
    all_finite("values", values)?;
    let mut counts = vec![0u64; edges.len() + 1];
    for &v in values {
        counts[bin_index(v, edges)] += 1;
    }
    Ok(counts)
}

/// Interior edges cutting `sample` into `n_bins` near-equal-count bins: the sample quantiles at `k / n_bins`,
/// `k = 1..n_bins-1` (linear interpolation, as `np.percentile`). Repeated edges, which ties produce, are merged,
/// so fewer than `n_bins` bins may result. Errors: empty or non-finite sample, `n_bins` of zero.
pub fn quantile_edges(sample: &[f64], n_bins: usize) -> Result<Vec<f64>, MetricsError> {
    non_empty("sample", sample)?;
    all_finite("sample", sample)?;
    if n_bins == 0 {
        return Err(MetricsError::BadBinCount {
            what: "number of bins",
            got: 0,
            min: 1,
            max: None,
        });
    }
    let all = quantile_edges_sorted(&sorted_copy(sample), n_bins);
    let mut inner: Vec<f64> = all[1..n_bins].to_vec();
    inner.dedup();
    Ok(inner)
}

fn psi_of_shares(expected: &[f64], actual: &[f64]) -> f64 {
    expected
        .iter()
        .zip(actual)
        .map(|(&e, &a)| (a - e) * (a / e).ln())
        .sum()
}

fn check_counts(what: &'static str, counts: &[u64]) -> Result<(), MetricsError> {
    non_empty(what, counts)?;
    if counts.iter().all(|&c| c == 0) {
        return Err(MetricsError::Empty { what });
    }
    Ok(())
}

fn check_same_bins(expected: usize, actual: usize) -> Result<(), MetricsError> {
    if expected == actual {
        Ok(())
    } else {
        Err(MetricsError::LengthMismatch {
            left: "expected bins",
            left_len: expected,
            right: "actual bins",
            right_len: actual,
        })
    }
}

/// PSI of actual counts against expected counts in the same bins.
///
/// Errors: no bins, either side with no count at all, different numbers of bins, a bad rule parameter.
pub fn psi_from_counts(
    expected: &[u64],
    actual: &[u64],
    rule: EmptyBinRule,
) -> Result<f64, MetricsError> {
    rule.validate()?;
    check_counts("expected counts", expected)?;
    check_counts("actual counts", actual)?;
    check_same_bins(expected.len(), actual.len())?;
    Ok(psi_of_shares(&rule.shares(expected), &rule.shares(actual)))
}

/// PSI of actual counts against expected fractions (e.g. a model file's reference distribution).
///
/// The fractions must be finite, in [0, 1] and sum to 1 within 1e-6. Under [`EmptyBinRule::Floor`] they are
/// floored like the actual shares; under [`EmptyBinRule::AddCount`] only the actual counts get the added count and
/// a zero expected fraction is an error (supply counts with [`psi_from_counts`] instead).
pub fn psi_from_fractions(
    expected: &[f64],
    actual: &[u64],
    rule: EmptyBinRule,
) -> Result<f64, MetricsError> {
    rule.validate()?;
    non_empty("expected fractions", expected)?;
    check_counts("actual counts", actual)?;
    check_same_bins(expected.len(), actual.len())?;
    if let Some(i) = expected.iter().position(|f| !(0.0..=1.0).contains(f)) {
        return Err(MetricsError::BadFractions {
            reason: format!("fraction {i} is {}, not in [0, 1]", expected[i]),
        });
    }
    let sum: f64 = expected.iter().sum();
    if (sum - 1.0).abs() > 1e-6 {
        return Err(MetricsError::BadFractions {
            reason: format!("they sum to {sum}, not 1 (within 1e-6)"),
        });
    }
    let e: Vec<f64> = match rule {
        EmptyBinRule::Floor(eps) => expected.iter().map(|&f| f.max(eps)).collect(),
        EmptyBinRule::AddCount(_) => {
            if let Some(i) = expected.iter().position(|&f| f == 0.0) {
                return Err(MetricsError::BadFractions {
                    reason: format!(
                        "fraction {i} is 0, which the added-count rule cannot repair; use a floor or expected counts"
                    ),
                });
            }
            expected.to_vec()
        }
    };
    Ok(psi_of_shares(&e, &rule.shares(actual)))
}

/// PSI between two samples binned with the same interior `edges` (for instance [`quantile_edges`] of the
/// expected sample). Errors: as [`bin_counts`] and [`psi_from_counts`].
pub fn psi_from_samples(
    expected_sample: &[f64],
    actual_sample: &[f64],
    edges: &[f64],
    rule: EmptyBinRule,
) -> Result<f64, MetricsError> {
    non_empty("expected sample", expected_sample)?;
    non_empty("actual sample", actual_sample)?;
    let e = bin_counts(expected_sample, edges)?;
    let a = bin_counts(actual_sample, edges)?;
    psi_from_counts(&e, &a, rule)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn psi_hand_computed() {
        // Expected shares 0.5, 0.5; actual counts 3, 1 -> 0.75, 0.25.
        // PSI = 0.25 ln 1.5 + (-0.25) ln 0.5 = 0.25 ln 3 = 0.27465307216702745 (0.25 * ln 3).
        let psi = psi_from_fractions(&[0.5, 0.5], &[3, 1], EmptyBinRule::default()).unwrap();
        assert!((psi - 0.25 * 3f64.ln()).abs() < 1e-15);
        assert_eq!(
            psi_from_counts(&[5, 5], &[5, 5], EmptyBinRule::default()).unwrap(),
            0.0
        );
    }

    #[test]
    fn empty_bin_rules_differ_and_are_both_finite() {
        // Actual bin 1 empty. Floor(1e-4): a = (1, 1e-4), e = (0.5, 0.5):
        //   0.5 ln 2 + (1e-4 - 0.5) ln(2e-4).
        // AddCount(0.5): a = (4.5/5, 0.5/5) = (0.9, 0.1): 0.4 ln 1.8 - 0.4 ln 0.2 = 0.4 ln 9.
        let floor = psi_from_fractions(&[0.5, 0.5], &[4, 0], EmptyBinRule::Floor(1e-4)).unwrap();
        let want_floor = 0.5 * 2f64.ln() + (1e-4 - 0.5) * (2e-4f64).ln();
        assert!((floor - want_floor).abs() < 1e-14);
        let add = psi_from_fractions(&[0.5, 0.5], &[4, 0], EmptyBinRule::AddCount(0.5)).unwrap();
        assert!((add - 0.4 * 9f64.ln()).abs() < 1e-14);
        assert!((floor - add).abs() > 1.0);
    }

    #[test]
    fn bins_are_closed_on_the_right() {
        let edges = [1.0, 2.0];
        assert_eq!(
            bin_counts(&[0.0, 1.0, 1.5, 2.0, 2.5, 9.0], &edges).unwrap(),
            vec![2, 2, 2]
        );
        assert_eq!(bin_counts(&[3.0], &[]).unwrap(), vec![1]);
        assert_eq!(
            bin_counts(&[3.0], &[2.0, 2.0]),
            Err(MetricsError::BadEdges {
                index: 1,
                value: 2.0
            })
        );
    }

    #[test]
    fn quantile_edges_merge_ties() {
        // Quartiles of 1..=8 (linear): virtual indexes 1.75, 3.5, 5.25 -> 2.75, 4.5, 6.25.
        let s: Vec<f64> = (1..=8).map(f64::from).collect();
        assert_eq!(quantile_edges(&s, 4).unwrap(), vec![2.75, 4.5, 6.25]);
        assert_eq!(
            quantile_edges(&[1.0, 1.0, 1.0, 2.0], 4).unwrap(),
            vec![1.0, 1.25]
        );
    }

    #[test]
    fn bad_inputs() {
        let r = EmptyBinRule::default();
        assert!(matches!(
            psi_from_fractions(&[0.5, 0.6], &[1, 1], r),
            Err(MetricsError::BadFractions { .. })
        ));
        assert!(matches!(
            psi_from_fractions(&[1.0, 0.0], &[1, 1], EmptyBinRule::AddCount(0.5)),
            Err(MetricsError::BadFractions { .. })
        ));
        assert!(matches!(
            psi_from_counts(&[1, 1], &[1], r),
            Err(MetricsError::LengthMismatch { .. })
        ));
        assert_eq!(
            psi_from_counts(&[1, 1], &[0, 0], r),
            Err(MetricsError::Empty {
                what: "actual counts"
            })
        );
        assert!(matches!(
            psi_from_counts(&[1], &[1], EmptyBinRule::Floor(0.0)),
            Err(MetricsError::BadParameter { .. })
        ));
    }
}
