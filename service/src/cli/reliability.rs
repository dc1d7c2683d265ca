//! A reliability diagram as a standalone SVG: observed share of positives against mean predicted probability per
//! bin, before and after calibration, with the diagonal of perfect calibration (DeGroot and Fienberg 1983).
//! Marker area grows with the bin's count.

use std::fmt::Write as _;

use probity::svg::escape;
use probity_models::fit::FitReport;
use probity_models::metrics::CalibrationTable;

const SIZE: f64 = 420.0;
const PAD: f64 = 50.0;

fn px(v: f64) -> f64 {
    PAD + v.clamp(0.0, 1.0) * SIZE
}

fn py(v: f64) -> f64 {
    PAD + (1.0 - v.clamp(0.0, 1.0)) * SIZE
}

fn series(out: &mut String, table: &CalibrationTable, colour: &str) {
    let total: usize = table.bins.iter().map(|b| b.count).sum();
    let points: Vec<String> = table
        .bins
        .iter()
        .map(|b| format!("{:.2},{:.2}", px(b.mean_predicted), py(b.fraction_positive)))
        .collect();
    let _ = writeln!(
        out,
        r#"<polyline fill="none" stroke="{colour}" stroke-width="1.5" points="{}"/>"#,
        points.join(" ")
    );
    for b in &table.bins {
        let r = 2.0 + 10.0 * (b.count as f64 / total.max(1) as f64).sqrt();
        let _ = writeln!(
            out,
            r#"<circle cx="{:.2}" cy="{:.2}" r="{r:.2}" fill="{colour}" fill-opacity="0.6"><title>{:.3}-{:.3}: {} rows, predicted {:.4}, observed {:.4}</title></circle>"#,
            px(b.mean_predicted),
            py(b.fraction_positive),
            b.lower,
            b.upper,
            b.count,
            b.mean_predicted,
            b.fraction_positive
        );
    }
}

/// The diagram of a fit report's before and after tables.
pub fn reliability_svg(title: &str, report: &FitReport) -> String {
    let w = SIZE + 2.0 * PAD;
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" font-family="sans-serif" font-size="12">"#,
        h = w + 40.0
    );
    let _ = writeln!(s, r#"<rect width="100%" height="100%" fill="white"/>"#);
    let _ = writeln!(
        s,
        r#"<text x="{PAD}" y="25" font-size="14">{}</text>"#,
        escape(title)
    );
    let _ = writeln!(
        s,
        r##"<rect x="{PAD}" y="{PAD}" width="{SIZE}" height="{SIZE}" fill="none" stroke="#888"/>"##
    );
    for i in 0..=10 {
        let v = f64::from(i) / 10.0;
        let _ = writeln!(
            s,
            r##"<text x="{:.1}" y="{:.1}" text-anchor="middle" fill="#444">{v:.1}</text><text x="{:.1}" y="{:.1}" text-anchor="end" fill="#444">{v:.1}</text>"##,
            px(v),
            PAD + SIZE + 16.0,
            PAD - 6.0,
            py(v) + 4.0
        );
    }
    let _ = writeln!(
        s,
        r##"<line x1="{}" y1="{}" x2="{}" y2="{}" stroke="#aaa" stroke-dasharray="4 3"/>"##,
        px(0.0),
        py(0.0),
        px(1.0),
        py(1.0)
    );
    series(&mut s, &report.before.table, "#c0392b");
    series(&mut s, &report.after.table, "#2471a3");
    let base = PAD + SIZE + 36.0;
    let _ = writeln!(
        s,
        r##"<text x="{PAD}" y="{base}" fill="#c0392b">before: ECE {:.4}, log-loss {:.4}</text><text x="{:.1}" y="{base}" fill="#2471a3">after ({}-fold): ECE {:.4}, log-loss {:.4}</text>"##,
        report.before.table.ece,
        report.before.log_loss,
        PAD + SIZE / 2.0,
        report.folds,
        report.after.table.ece,
        report.after.log_loss
    );
    let _ = writeln!(
        s,
        r##"<text x="{:.1}" y="{:.1}" text-anchor="middle" fill="#444">mean predicted probability (x), observed share of positives (y)</text>"##,
        PAD + SIZE / 2.0,
        base + 20.0
    );
    s.push_str("</svg>\n");
    s
}
