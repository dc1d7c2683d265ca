//! The comparison as one standalone SVG: both models' reliability curves on the paired cases with outcomes (left,
//! with the diagonal of perfect calibration; DeGroot and Fienberg 1983), and the distribution of the paired
//! per-case differences (right, a histogram with a line at zero). Elements carry a `class` (`champion`,
//! `challenger`, `diagonal`, `bar`, `zero`) so that tests can find them.

use std::fmt::Write as _;

use crate::svg::escape;
use probity_models::metrics::CalibrationTable;

use super::CompareReport;

const SIZE: f64 = 360.0;
const PAD: f64 = 50.0;
const BARS: usize = 30;

fn curve(s: &mut String, table: &CalibrationTable, class: &str, colour: &str, x0: f64) {
    let points: Vec<String> = table
        .bins
        .iter()
        .map(|b| {
            format!(
                "{:.1},{:.1}",
                x0 + b.mean_predicted.clamp(0.0, 1.0) * SIZE,
                PAD + (1.0 - b.fraction_positive.clamp(0.0, 1.0)) * SIZE
            )
        })
        .collect();
    let _ = writeln!(
        s,
        r#"<polyline class="{class}" fill="none" stroke="{colour}" stroke-width="2" points="{}"/>"#,
        points.join(" ")
    );
}

/// Renders the picture.
pub fn render(r: &CompareReport) -> String {
    let width = 3.0 * PAD + 2.0 * SIZE;
    let height = 2.0 * PAD + SIZE + 40.0;
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" viewBox="0 0 {width} {height}" font-family="sans-serif" font-size="12">"#
    );
    let _ = writeln!(s, r#"<rect width="100%" height="100%" fill="white"/>"#);
    let _ = writeln!(
        s,
        r#"<text x="{PAD}" y="25" font-size="14">{}: {} (blue) against {} (orange)</text>"#,
        escape(&r.route),
        escape(&r.champion),
        escape(&r.challenger)
    );
    // Left: reliability.
    let (x0, y1) = (PAD, PAD + SIZE);
    let _ = writeln!(
        s,
        r##"<rect x="{x0}" y="{PAD}" width="{SIZE}" height="{SIZE}" fill="none" stroke="#222"/><line class="diagonal" x1="{x0}" y1="{y1}" x2="{}" y2="{PAD}" stroke="#999" stroke-dasharray="4 4"/>"##,
        x0 + SIZE
    );
    let _ = writeln!(
        s,
        r#"<text x="{x0}" y="{}">mean predicted probability (x) against observed rate (y)</text>"#,
        y1 + 20.0
    );
    match &r.reliability {
        Some((a, b)) => {
            curve(&mut s, a, "champion", "#1f77b4", x0);
            curve(&mut s, b, "challenger", "#ff7f0e", x0);
        }
        None => {
            let _ = writeln!(
                s,
                r#"<text x="{}" y="{}">no outcomes yet</text>"#,
                x0 + 20.0,
                PAD + 30.0
            );
        }
    }
    // Right: histogram of the paired differences.
    let hx = 2.0 * PAD + SIZE;
    let _ = writeln!(
        s,
        r##"<rect x="{hx}" y="{PAD}" width="{SIZE}" height="{SIZE}" fill="none" stroke="#222"/>"##
    );
    let _ = writeln!(
        s,
        r#"<text x="{hx}" y="{}">{} per paired case</text>"#,
        y1 + 20.0,
        escape(&r.differences_kind)
    );
    let d = &r.differences;
    if !d.is_empty() {
        let lo = d.iter().copied().fold(f64::INFINITY, f64::min).min(0.0);
        let hi = d.iter().copied().fold(f64::NEG_INFINITY, f64::max).max(0.0);
        let span = if hi > lo { hi - lo } else { 1.0 };
        let mut counts = [0usize; BARS];
        for &v in d {
            let k = (((v - lo) / span) * BARS as f64).floor() as usize;
            counts[k.min(BARS - 1)] += 1;
        }
        let top = counts.iter().copied().max().unwrap_or(1).max(1) as f64;
        let w = SIZE / BARS as f64;
        for (k, &c) in counts.iter().enumerate() {
            let h = c as f64 / top * (SIZE - 10.0);
            let _ = writeln!(
                s,
                r##"<rect class="bar" x="{:.1}" y="{:.1}" width="{:.1}" height="{h:.1}" fill="#888"/>"##,
                hx + k as f64 * w,
                y1 - h,
                w - 1.0
            );
        }
        let zx = hx + (0.0 - lo) / span * SIZE;
        let _ = writeln!(
            s,
            r##"<line class="zero" x1="{zx:.1}" y1="{PAD}" x2="{zx:.1}" y2="{y1}" stroke="#d62728"/>"##
        );
        let _ = writeln!(
            s,
            r#"<text x="{hx}" y="{}">{lo:.3}</text><text x="{}" y="{}" text-anchor="end">{hi:.3}</text>"#,
            y1 + 36.0,
            hx + SIZE,
            y1 + 36.0
        );
    }
    let _ = writeln!(
        s,
        r#"<text x="{PAD}" y="{}">{}</text>"#,
        height - 8.0,
        escape(&r.verdict)
    );
    s.push_str("</svg>\n");
    s
}
