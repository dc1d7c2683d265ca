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
                            interval: None,
                            estimated: false,
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

/// The immature window's reliability picture: the matured predictions' bins (observed shares, Wilson intervals)
/// and the window's estimated eventual shares with their delta-method intervals; `None` when the window is
/// unknown.
pub fn immature(r: &SeriesReport, axis: ProbabilityAxis) -> Option<String> {
    let super::immature::ImmatureWindow::Estimated(w) = &r.immature_window else {
        return None;
    };
    let matured = w
        .bins
        .iter()
        .filter(|b| b.matured_count > 0)
        .map(|b| Bin {
            lower: b.lower,
            upper: b.upper,
            count: b.matured_count,
            positives: b.matured_positives,
            mean_predicted: b.matured_mean_predicted.unwrap_or(b.mean_predicted),
            fraction_positive: b.matured_observed.unwrap_or(0.0),
            interval: None,
            estimated: false,
        })
        .collect();
    let estimated = w
        .bins
        .iter()
        .filter_map(|b| {
            let e = b.eventual?;
            Some(Bin {
                lower: b.lower,
                upper: b.upper,
                count: b.count,
                positives: b.positives_so_far,
                mean_predicted: b.mean_predicted,
                fraction_positive: e.estimate,
                interval: e.lower.zip(e.upper),
                estimated: true,
            })
        })
        .collect();
    let days = w.horizon_ms as f64 / 86_400_000.0;
    Some(pictures::reliability(
        &title(r, "Immature window, estimated"),
        &[
            Curve {
                label: format!(
                    "matured: {} predictions followed for {days:.1} days",
                    w.matured.predictions
                ),
                colour: palette::TIDE,
                class: "matured",
                bins: matured,
            },
            Curve {
                label: format!("ESTIMATED eventual: {} younger predictions", w.predictions),
                colour: palette::OCHRE,
                class: "estimated",
                bins: estimated,
            },
        ],
        axis,
        &[(
            palette::INK,
            format!(
                "ESTIMATED: the share the younger predictions will show once their outcomes are in, with {:.0}% \
                 delta-method intervals; about {:.0}% of their positives are in so far (Lawless 1994 delay \
                 correction; assumes the delay does not depend on the score).",
                100.0 * w.level,
                100.0 * w.arrived_share
            ),
        )],
    ))
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
