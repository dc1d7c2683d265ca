//! The report as a terminal table.

use std::fmt::Write as _;

use super::{Report, SeriesReport};

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.6}"))
}

/// The whole report as text.
pub fn render(report: &Report) -> String {
    let mut s = String::new();
    if report.series.is_empty() {
        s.push_str("no predictions in the store match the range and filters\n");
    }
    for series in &report.series {
        section(&mut s, series);
    }
    let _ = writeln!(
        s,
        "outcomes waiting for their prediction: {}; never matched: {}",
        report.outcomes.pending, report.outcomes.unmatched
    );
    s
}

fn section(s: &mut String, r: &SeriesReport) {
    let _ = writeln!(
        s,
        "== route {}  model {} {}  ({})",
        r.route, r.model, r.version, r.role
    );
    let _ = writeln!(
        s,
        "predictions {}  with outcome {}  immature (no outcome yet) {}  settled at maturity {}  corrected {}",
        r.predictions, r.with_outcome, r.immature, r.settled_by_maturity, r.corrected
    );
    let _ = writeln!(
        s,
        "base rate: observed {}  predicted {}  (mean probability of all predictions {:.6})",
        opt(r.observed_base_rate),
        opt(r.predicted_base_rate),
        r.mean_probability
    );
    let _ = writeln!(
        s,
        "base rate: estimate (Saerens EM over all predictions, served under {}) {}  configured {}  observed {}",
        opt(r.served_base_rate),
        opt(r.base_rate_estimate),
        opt(r.configured_base_rate),
        opt(r.observed_base_rate)
    );
    let _ = writeln!(
        s,
        "log-loss {}  Brier {}  AUC {}  KS {}",
        opt(r.log_loss),
        opt(r.brier),
        opt(r.roc_auc),
        opt(r.ks)
    );
    if let Some(d) = &r.brier_decomposition {
        let _ = writeln!(
            s,
            "Brier = reliability {:.6} - resolution {:.6} + uncertainty {:.6} + within-bin variance {:.6} - covariance {:.6}",
            d.reliability, d.resolution, d.uncertainty, d.within_bin_variance, d.within_bin_covariance
        );
    }
    if let Some(c) = &r.calibration {
        let _ = writeln!(
            s,
            "calibration (10 equal-width bins): ECE {:.6}  MCE {:.6}",
            c.ece, c.mce
        );
        let _ = writeln!(
            s,
            "  {:>13} {:>8} {:>9} {:>10} {:>10}",
            "bin", "count", "positives", "predicted", "observed"
        );
        for b in &c.bins {
            let _ = writeln!(
                s,
                "  ({:.2}, {:.2}] {:>8} {:>9} {:>10.4} {:>10.4}",
                b.lower, b.upper, b.count, b.positives, b.mean_predicted, b.fraction_positive
            );
        }
    }
    if let Some(hl) = &r.hosmer_lemeshow {
        let _ = writeln!(
            s,
            "Hosmer-Lemeshow (10 groups by rank): C {:.4}  df {}  p {:.4}",
            hl.statistic, hl.degrees_of_freedom, hl.p_value
        );
    }
    super::calibration_tests::render(s, &r.calibration_tests);
    super::immature::render(s, &r.eventual_positive_rate);
    super::immature::render_window(s, &r.immature_window);
    super::operating::render(s, &r.operating_points);
    if !r.gains.is_empty() {
        let _ = writeln!(
            s,
            "  {:>6} {:>8} {:>9} {:>8} {:>7} {:>8}",
            "decile", "count", "positives", "gain", "lift", "cum.lift"
        );
        for g in &r.gains {
            let _ = writeln!(
                s,
                "  {:>6} {:>8} {:>9} {:>8.4} {:>7.3} {:>8.3}",
                g.group + 1,
                g.count,
                g.positives,
                g.cumulative_gain,
                g.lift,
                g.cumulative_lift
            );
        }
    }
    if let Some(p) = &r.psi {
        let _ = writeln!(s, "PSI {:.6} on {} ({})", p.value, p.on, p.rule);
    }
    super::features::render(s, &r.features);
    for n in &r.notes {
        let _ = writeln!(s, "note: {n}");
    }
    s.push('\n');
}
