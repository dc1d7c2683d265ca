//! How much two models agree on the same cases, before any outcome is known.
//!
//! Everything here is computed on the two models' log-odds for the same requests, case by case:
//! - Spearman's rank correlation (Spearman 1904, "The proof and measurement of association between two things",
//!   American Journal of Psychology 15): the Pearson correlation of the two rank vectors, tied values given their
//!   average rank. Reference: `scipy.stats.spearmanr`;
//! - the mean signed, mean absolute and largest absolute log-odds difference (challenger minus champion);
//! - the share of cases whose decision flips at a probability threshold, with the strict rule `p > t` means
//!   positive used by [`DecisionRule::Threshold`](crate::DecisionRule::Threshold);
//! - the population stability index of the challenger's log-odds against the champion's, binned at the champion's
//!   quantiles ([`crate::metrics::drift`]); the empty-bin rule is part of the options and of the result.

use super::delong::midranks;
use super::{check_pair, CompareError};
use crate::link::sigmoid;
use crate::metrics::{psi_from_samples, quantile_edges, EmptyBinRule};

/// Options of [`agreement`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AgreementOptions {
    /// Probability threshold of the route's decision, if it has one (`p > threshold` is positive).
    pub threshold: Option<f64>,
    /// Number of equal-count bins, cut at the champion's log-odds quantiles, for the PSI.
    pub psi_bins: usize,
    /// Empty-bin rule of the PSI.
    pub psi_rule: EmptyBinRule,
}

impl Default for AgreementOptions {
    /// No threshold, 10 bins (deciles; common practice, no single source), `EmptyBinRule::Floor(1e-4)`.
    fn default() -> Self {
        AgreementOptions {
            threshold: None,
            psi_bins: 10,
            psi_rule: EmptyBinRule::default(),
        }
    }
}

/// Decisions that differ between the two models at one threshold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Flips {
    /// The probability threshold.
    pub threshold: f64,
    /// Cases the champion calls positive and the challenger negative.
    pub champion_only: usize,
    /// Cases the challenger calls positive and the champion negative.
    pub challenger_only: usize,
    /// `(champion_only + challenger_only) / cases`.
    pub share: f64,
}

/// Agreement of two models on the same cases.
#[derive(Debug, Clone, PartialEq)]
pub struct Agreement {
    /// Number of paired cases.
    pub cases: usize,
    /// Spearman rank correlation of the log-odds; `None` when either model gives every case the same value (the
    /// correlation is then undefined; `scipy.stats.spearmanr` returns NaN) or with a single case.
    pub spearman: Option<f64>,
    /// Mean of `challenger - champion` log-odds.
    pub mean_difference: f64,
    /// Mean of `|challenger - champion|` log-odds.
    pub mean_absolute_difference: f64,
    /// Largest `|challenger - champion|` log-odds.
    pub max_absolute_difference: f64,
    /// Row of the largest absolute difference (the first one if several).
    pub max_difference_row: usize,
    /// Decision flips, when a threshold was given.
    pub flips: Option<Flips>,
    /// PSI of the challenger's log-odds against the champion's.
    pub psi: f64,
    /// Bins the PSI actually used (tied quantiles merge bins, so this can be below the number asked for).
    pub psi_bins_used: usize,
    /// The empty-bin rule the PSI used.
    pub psi_rule: EmptyBinRule,
}

/// Spearman rank correlation with average ranks for ties; `None` if either vector is constant or shorter than 2.
///
/// Errors: vectors of different lengths or with non-finite values.
pub fn spearman(champion: &[f64], challenger: &[f64]) -> Result<Option<f64>, CompareError> {
    check_pair("Spearman correlation", champion, challenger, 0)?;
    if champion.len() < 2 {
        return Ok(None);
    }
    Ok(pearson(&midranks(champion), &midranks(challenger)))
}

/// Pearson correlation by centred sums; `None` when either side has no spread.
fn pearson(a: &[f64], b: &[f64]) -> Option<f64> {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (&x, &y) in a.iter().zip(b) {
        let (dx, dy) = (x - ma, y - mb);
        sab += dx * dy;
        saa += dx * dx;
        sbb += dy * dy;
    }
    (saa > 0.0 && sbb > 0.0).then(|| (sab / (saa * sbb).sqrt()).clamp(-1.0, 1.0))
}

/// Agreement of the champion's and challenger's log-odds on the same cases (row `i` of each is the same request).
///
/// Errors: no case, different lengths, non-finite log-odds, a threshold outside [0, 1], zero PSI bins or a bad
/// empty-bin rule.
pub fn agreement(
    champion: &[f64],
    challenger: &[f64],
    options: &AgreementOptions,
) -> Result<Agreement, CompareError> {
    check_pair("agreement", champion, challenger, 1)?;
    if let Some(t) = options.threshold {
        if !(0.0..=1.0).contains(&t) {
            return Err(CompareError::BadOption {
                name: "threshold",
                value: t,
                reason: "must be a probability in [0, 1]",
            });
        }
    }
    let n = champion.len();
    let (mut sum, mut sum_abs, mut max_abs, mut max_row) = (0.0, 0.0, 0.0f64, 0usize);
    for (row, (&a, &b)) in champion.iter().zip(challenger).enumerate() {
        let d = b - a;
        sum += d;
        sum_abs += d.abs();
        if d.abs() > max_abs {
            max_abs = d.abs();
            max_row = row;
        }
    }
    let flips = options.threshold.map(|threshold| {
        let (mut champion_only, mut challenger_only) = (0usize, 0usize);
        for (&a, &b) in champion.iter().zip(challenger) {
            match (sigmoid(a) > threshold, sigmoid(b) > threshold) {
                (true, false) => champion_only += 1,
                (false, true) => challenger_only += 1,
                _ => {}
            }
        }
        Flips {
            threshold,
            champion_only,
            challenger_only,
            share: (champion_only + challenger_only) as f64 / n as f64,
        }
    });
    let edges = quantile_edges(champion, options.psi_bins)?;
    let psi = psi_from_samples(champion, challenger, &edges, options.psi_rule)?;
    Ok(Agreement {
        cases: n,
        spearman: spearman(champion, challenger)?,
        mean_difference: sum / n as f64,
        mean_absolute_difference: sum_abs / n as f64,
        max_absolute_difference: max_abs,
        max_difference_row: max_row,
        flips,
        psi,
        psi_bins_used: edges.len() + 1,
        psi_rule: options.psi_rule,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spearman_hand_computed_with_ties() {
        // a = [1, 2, 2, 4] -> ranks [1, 2.5, 2.5, 4]; b = [10, 30, 20, 40] -> ranks [1, 3, 2, 4].
        // Centred (mean 2.5): a' = [-1.5, 0, 0, 1.5], b' = [-1.5, 0.5, -0.5, 1.5];
        // sum a'b' = 4.5, sum a'^2 = 4.5, sum b'^2 = 5 -> rho = 4.5 / sqrt(22.5) = 0.9486832980505138.
        let rho = spearman(&[1.0, 2.0, 2.0, 4.0], &[10.0, 30.0, 20.0, 40.0])
            .unwrap()
            .unwrap();
        assert!((rho - 4.5 / 22.5f64.sqrt()).abs() < 1e-15);
        assert_eq!(spearman(&[1.0, 1.0], &[1.0, 2.0]).unwrap(), None);
        assert_eq!(spearman(&[1.0], &[2.0]).unwrap(), None);
        let reversed = spearman(&[1.0, 2.0, 3.0], &[3.0, 2.0, 1.0])
            .unwrap()
            .unwrap();
        assert!((reversed + 1.0).abs() < 1e-15);
    }

    #[test]
    fn differences_flips_and_psi_by_hand() {
        // Log-odds: champion [-2, 0, 1, 3], challenger [-1, 0.5, -1, 3].
        // Differences [1, 0.5, -2, 0]: mean -0.125, mean abs 0.875, max abs 2 at row 2.
        // Threshold 0.5 (log-odds 0, strict): champion [-, -, +, +], challenger [-, +, -, +] -> one flip each way.
        let a = [-2.0, 0.0, 1.0, 3.0];
        let b = [-1.0, 0.5, -1.0, 3.0];
        let opts = AgreementOptions {
            threshold: Some(0.5),
            psi_bins: 2,
            psi_rule: EmptyBinRule::AddCount(0.5),
        };
        let g = agreement(&a, &b, &opts).unwrap();
        assert_eq!(g.cases, 4);
        assert!((g.mean_difference + 0.125).abs() < 1e-15);
        assert!((g.mean_absolute_difference - 0.875).abs() < 1e-15);
        assert_eq!((g.max_absolute_difference, g.max_difference_row), (2.0, 2));
        let f = g.flips.unwrap();
        assert_eq!((f.champion_only, f.challenger_only, f.share), (1, 1, 0.5));
        // Median of the champion 0.5 -> bins (-inf, 0.5], (0.5, inf). Champion counts [2, 2], challenger [3, 1].
        // Add 0.5: e = [0.5, 0.5], a = [3.5/5, 1.5/5] = [0.7, 0.3]; PSI = 0.2 ln 1.4 - 0.2 ln 0.6 = 0.2 ln(7/3).
        assert_eq!(g.psi_bins_used, 2);
        assert!((g.psi - 0.2 * (7.0f64 / 3.0).ln()).abs() < 1e-15);
    }

    #[test]
    fn identical_models_agree_fully() {
        let a = [-1.0, 0.2, 0.3, 2.0, 5.0];
        let g = agreement(&a, &a, &AgreementOptions::default()).unwrap();
        assert_eq!(g.spearman, Some(1.0));
        assert_eq!(g.max_absolute_difference, 0.0);
        assert_eq!(g.psi, 0.0);
        assert!(g.flips.is_none());
    }

    #[test]
    fn bad_inputs_are_named() {
        let opts = AgreementOptions {
            threshold: Some(1.5),
            ..AgreementOptions::default()
        };
        assert!(matches!(
            agreement(&[0.0], &[0.0], &opts),
            Err(CompareError::BadOption {
                name: "threshold",
                ..
            })
        ));
        assert!(matches!(
            agreement(&[], &[], &AgreementOptions::default()),
            Err(CompareError::TooFew { .. })
        ));
        assert!(matches!(
            agreement(&[0.0, f64::NAN], &[0.0, 1.0], &AgreementOptions::default()),
            Err(CompareError::NonFinite {
                what: "champion",
                index: 1,
                ..
            })
        ));
    }
}
