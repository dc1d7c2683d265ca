//! The report's pictures as standalone SVG (drawn by [`crate::charts`]): the reliability diagram with the diagonal
//! of perfect calibration (DeGroot and Fienberg 1983) and Wilson intervals per bin, the probability histograms of
//! the two classes, and the cumulative gains curve. Elements carry a `class` (`axis`, `diagonal`, `bin`,
//! `interval`, `bar-negative`, `bar-positive`, `gains`) so that tests and style sheets can find them.

use super::SeriesReport;
use crate::charts::palette;
use crate::charts::pictures::{self, Bin, Curve, ProbabilityAxis};

fn title(r: &SeriesReport, what: &str) -> String {
    format!(
        "{what}: route {}, {} {} ({})",
        r.route, r.model, r.version, r.role
    )
}

/// Reliability diagram: one marker per non-empty calibration bin (area by count) with its Wilson interval, joined,
/// and the diagonal; log-odds axes when the scores crowd near 0 (`ProbabilityAxis::Auto`).
pub fn reliability(r: &SeriesReport) -> String {
    reliability_on(r, ProbabilityAxis::Auto)
}

/// [`reliability`] on a chosen probability axis.
pub fn reliability_on(r: &SeriesReport, axis: ProbabilityAxis) -> String {
    let title = title(r, "Reliability");
    match &r.calibration {
        Some(c) => {
            let total: usize = c.bins.iter().map(|b| b.count).sum();
            pictures::reliability(
                &title,
                &[Curve {
                    label: format!("{} {}", r.model, r.version),
                    colour: palette::TIDE,
                    class: "",
                    bins: c
                        .bins
                        .iter()
                        .map(|b| Bin {
                            lower: b.lower,
                            upper: b.upper,
                            count: b.count,
                            positives: b.positives,
                            mean_predicted: b.mean_predicted,
                            fraction_positive: b.fraction_positive,
                        })
                        .collect(),
                }],
                axis,
                &[(
                    palette::INK,
                    format!("ECE {:.4} over {total} cases with an outcome", c.ece),
                )],
            )
        }
        None => pictures::reliability(
            &title,
            &[],
            axis,
            &[(palette::MUTED, "no outcomes yet".to_string())],
        ),
    }
}

/// Probability histograms of negatives and positives, each scaled to its own total (share per bin).
pub fn histograms(r: &SeriesReport) -> String {
    pictures::class_histograms(
        &title(r, "Scores by class"),
        &r.histogram_negative,
        &r.histogram_positive,
    )
}

/// Cumulative gains by group against the share of cases, with the diagonal of a random ordering.
pub fn gains(r: &SeriesReport) -> String {
    let total: usize = r.gains.iter().map(|g| g.count).sum();
    let mut cumulative = 0usize;
    let points: Vec<(f64, f64)> = r
        .gains
        .iter()
        .map(|g| {
            cumulative += g.count;
            (cumulative as f64 / total.max(1) as f64, g.cumulative_gain)
        })
        .collect();
    pictures::gains(&title(r, "Cumulative gains"), &points)
}
