//! Reliability table: forecasts grouped into probability bins, with the mean forecast and the observed positive
//! rate per bin (reliability diagrams: DeGroot and Fienberg 1983, "The comparison and evaluation of forecasters",
//! The Statistician 32), and the expected and maximum calibration errors (Naeini, Cooper and Hauskrecht 2015,
//! "Obtaining well calibrated probabilities using Bayesian binning", AAAI).
//!
//! Binning follows `sklearn.calibration.calibration_curve` (scikit-learn 1.9) exactly: bins are closed on the
//! right, `(e_{k-1}, e_k]`, with the first bin also taking everything at or below its upper edge; uniform edges
//! are `np.linspace(0, 1, n + 1)` and quantile edges `np.percentile` with linear interpolation; empty bins are
//! dropped from the table (with quantile edges, tied probabilities can leave bins empty).

use super::quantile::{linspace_unit, quantile_edges_sorted, right_closed_bin, sorted_copy};
use super::{all_probabilities, paired, Labels, MetricsError};

/// How bin edges on [0, 1] are chosen.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BinStrategy {
    /// `n` bins of equal width on [0, 1].
    Uniform(usize),
    /// `n` bins holding near-equal numbers of forecasts, cut at the sample quantiles.
    Quantile(usize),
}

impl BinStrategy {
    fn count(self) -> usize {
        match self {
            BinStrategy::Uniform(n) | BinStrategy::Quantile(n) => n,
        }
    }
}

/// One non-empty bin of a [`CalibrationTable`].
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationBin {
    /// Position of the bin among all `n` bins (empty bins included), from 0.
    pub index: usize,
    /// Lower edge (the bin excludes it, except the first bin, which has no lower limit).
    pub lower: f64,
    /// Upper edge (included).
    pub upper: f64,
    /// Number of forecasts in the bin.
    pub count: usize,
    /// Number of positives in the bin.
    pub positives: usize,
    /// Mean forecast probability in the bin.
    pub mean_predicted: f64,
    /// Observed share of positives in the bin.
    pub fraction_positive: f64,
}

/// A reliability table with its summary errors.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationTable {
    /// All `n + 1` edges, including 0 and 1 (uniform) or the sample minimum and maximum (quantile).
    pub edges: Vec<f64>,
    /// The non-empty bins, in increasing probability.
    pub bins: Vec<CalibrationBin>,
    /// Expected calibration error: the sum over bins of `(n_b / N) |mean_predicted - fraction_positive|`.
    pub ece: f64,
    /// Maximum calibration error: the largest `|mean_predicted - fraction_positive|` over non-empty bins.
    pub mce: f64,
}

/// Edges and the bin index of every forecast; `probabilities` must be validated, non-empty and in [0, 1].
pub(crate) fn assign_bins(
    probabilities: &[f64],
    strategy: BinStrategy,
) -> Result<(Vec<f64>, Vec<usize>), MetricsError> {
    let n = strategy.count();
    if n == 0 {
        return Err(MetricsError::BadBinCount {
            what: "number of bins",
            got: n,
            min: 1,
            max: None,
        });
    }
    let edges = match strategy {
        BinStrategy::Uniform(_) => (0..=n).map(|i| linspace_unit(i, n)).collect(),
        BinStrategy::Quantile(_) => quantile_edges_sorted(&sorted_copy(probabilities), n),
    };
    let inner = &edges[1..n];
    let ids = probabilities
        .iter()
        .map(|&p| right_closed_bin(inner, p))
        .collect();
    Ok((edges, ids))
}

/// Builds the reliability table of probability forecasts against 0/1 outcomes.
///
/// Bin means are accumulated in row order, as `np.bincount` does, so they match scikit-learn to the last bit or
/// nearly so. Errors: empty input, length mismatch, a probability outside [0, 1], a label other than 0/1, zero bins.
pub fn calibration_table<L: Labels + ?Sized>(
    probabilities: &[f64],
    labels: &L,
    strategy: BinStrategy,
) -> Result<CalibrationTable, MetricsError> {
    let y = paired("probabilities", probabilities, labels)?;
    all_probabilities("probabilities", probabilities)?;
    let (edges, ids) = assign_bins(probabilities, strategy)?;
    let n = strategy.count();
    let mut count = vec![0usize; n];
    let mut positives = vec![0usize; n];
    let mut sum = vec![0.0f64; n];
    for ((&p, &yi), &k) in probabilities.iter().zip(y.iter()).zip(&ids) {
        count[k] += 1;
        positives[k] += usize::from(yi);
        sum[k] += p;
    }
    let total = probabilities.len() as f64;
    let mut bins = Vec::new();
    let (mut ece, mut mce) = (0.0f64, 0.0f64);
    for k in (0..n).filter(|&k| count[k] > 0) {
        let c = count[k] as f64;
        let mean_predicted = sum[k] / c;
        let fraction_positive = positives[k] as f64 / c;
        let gap = (mean_predicted - fraction_positive).abs();
        ece += c / total * gap;
        mce = mce.max(gap);
        bins.push(CalibrationBin {
            index: k,
            lower: edges[k],
            upper: edges[k + 1],
            count: count[k],
            positives: positives[k],
            mean_predicted,
            fraction_positive,
        });
    }
    Ok(CalibrationTable {
        edges,
        bins,
        ece,
        mce,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hand_computed_uniform_table() {
        // Two bins split at 0.5. Bin 0: 0.1, 0.5 (0.5 is on the closed right edge) with labels 0, 1 -> mean 0.3,
        // rate 0.5. Bin 1: 0.8, 0.9 with labels 1, 1 -> mean 0.85, rate 1.
        // ECE = 0.5 * 0.2 + 0.5 * 0.15 = 0.175, MCE = 0.2.
        let t = calibration_table(
            &[0.1, 0.5, 0.8, 0.9],
            &[0u8, 1, 1, 1],
            BinStrategy::Uniform(2),
        )
        .unwrap();
        assert_eq!(t.edges, vec![0.0, 0.5, 1.0]);
        assert_eq!(t.bins.len(), 2);
        assert_eq!((t.bins[0].count, t.bins[0].positives), (2, 1));
        assert!((t.bins[0].mean_predicted - 0.3).abs() < 1e-15);
        assert!((t.bins[1].mean_predicted - 0.85).abs() < 1e-15);
        assert!((t.ece - 0.175).abs() < 1e-15);
        assert!((t.mce - 0.2).abs() < 1e-15);
    }

    #[test]
    fn empty_bins_are_dropped() {
        let t = calibration_table(&[0.05, 0.95], &[false, true], BinStrategy::Uniform(10)).unwrap();
        assert_eq!(
            t.bins.iter().map(|b| b.index).collect::<Vec<_>>(),
            vec![0, 9]
        );
        assert_eq!(t.edges.len(), 11);
    }

    #[test]
    fn bad_inputs_are_refused() {
        assert_eq!(
            calibration_table(&[0.5, 1.5], &[0u8, 1], BinStrategy::Uniform(2)),
            Err(MetricsError::NotProbability {
                what: "probabilities",
                index: 1,
                value: 1.5
            })
        );
        assert!(matches!(
            calibration_table(&[0.5], &[0u8], BinStrategy::Quantile(0)),
            Err(MetricsError::BadBinCount { .. })
        ));
        assert!(matches!(
            calibration_table(&[0.5], &[0u8, 1], BinStrategy::Uniform(3)),
            Err(MetricsError::LengthMismatch { .. })
        ));
        assert_eq!(
            calibration_table(&[], &[0u8; 0], BinStrategy::Uniform(3)),
            Err(MetricsError::Empty {
                what: "probabilities"
            })
        );
    }
}
