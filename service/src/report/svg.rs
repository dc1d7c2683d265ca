//! The report's pictures as standalone SVG: the reliability diagram with the diagonal of perfect calibration
//! (DeGroot and Fienberg 1983), the probability histograms of the two classes, and the cumulative gains curve.
//! Elements carry a `class` (`axis`, `diagonal`, `bin`, `bar-negative`, `bar-positive`, `gains`) so that tests and
//! style sheets can find them.

use std::fmt::Write as _;

use super::SeriesReport;
use crate::svg::escape;

const SIZE: f64 = 400.0;
const PAD: f64 = 50.0;

fn px(v: f64) -> f64 {
    PAD + v.clamp(0.0, 1.0) * SIZE
}

fn py(v: f64) -> f64 {
    PAD + (1.0 - v.clamp(0.0, 1.0)) * SIZE
}

/// Frame, axes with ticks at tenths, title and axis names.
fn frame(title: &str, x_name: &str, y_name: &str, y_max_label: &str) -> String {
    let w = SIZE + 2.0 * PAD;
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" viewBox="0 0 {w} {h}" font-family="sans-serif" font-size="12">"#,
        h = w + 30.0
    );
    let _ = writeln!(s, r#"<rect width="100%" height="100%" fill="white"/>"#);
    let _ = writeln!(
        s,
        r#"<text x="{PAD}" y="25" font-size="14">{}</text>"#,
        escape(title)
    );
    let _ = writeln!(
        s,
        r##"<line class="axis" x1="{x0}" y1="{y0}" x2="{x1}" y2="{y0}" stroke="#222"/><line class="axis" x1="{x0}" y1="{y0}" x2="{x0}" y2="{y1}" stroke="#222"/>"##,
        x0 = px(0.0),
        y0 = py(0.0),
        x1 = px(1.0),
        y1 = py(1.0)
    );
    for i in 0..=10 {
        let v = f64::from(i) / 10.0;
        let _ = writeln!(
            s,
            r##"<text x="{:.1}" y="{:.1}" text-anchor="middle" fill="#444">{v:.1}</text>"##,
            px(v),
            PAD + SIZE + 16.0
        );
    }
    let _ = writeln!(
        s,
        r##"<text x="{:.1}" y="{:.1}" text-anchor="end" fill="#444">0</text><text x="{:.1}" y="{:.1}" text-anchor="end" fill="#444">{}</text>"##,
        PAD - 6.0,
        py(0.0),
        PAD - 6.0,
        py(1.0) + 4.0,
        escape(y_max_label)
    );
    let _ = writeln!(
        s,
        r##"<text x="{:.1}" y="{:.1}" text-anchor="middle" fill="#444">{}</text><text x="14" y="{:.1}" text-anchor="middle" fill="#444" transform="rotate(-90 14 {:.1})">{}</text>"##,
        PAD + SIZE / 2.0,
        PAD + SIZE + 36.0,
        escape(x_name),
        PAD + SIZE / 2.0,
        PAD + SIZE / 2.0,
        escape(y_name)
    );
    s
}

fn title(r: &SeriesReport, what: &str) -> String {
    format!("{what}: route {}, {} {}", r.route, r.model, r.version)
}

/// Reliability diagram: one marker per non-empty calibration bin (area by count), joined, and the diagonal.
pub fn reliability(r: &SeriesReport) -> String {
    let mut s = frame(
        &title(r, "Reliability"),
        "mean predicted probability",
        "observed share of positives",
        "1",
    );
    let _ = writeln!(
        s,
        r##"<line class="diagonal" x1="{}" y1="{}" x2="{}" y2="{}" stroke="#999" stroke-dasharray="4 3"/>"##,
        px(0.0),
        py(0.0),
        px(1.0),
        py(1.0)
    );
    if let Some(c) = &r.calibration {
        let total: usize = c.bins.iter().map(|b| b.count).sum();
        let points: Vec<String> = c
            .bins
            .iter()
            .map(|b| format!("{:.2},{:.2}", px(b.mean_predicted), py(b.fraction_positive)))
            .collect();
        let _ = writeln!(
            s,
            r##"<polyline fill="none" stroke="#2471a3" stroke-width="1.5" points="{}"/>"##,
            points.join(" ")
        );
        for b in &c.bins {
            let radius = 2.5 + 10.0 * (b.count as f64 / total.max(1) as f64).sqrt();
            let _ = writeln!(
                s,
                r##"<circle class="bin" cx="{:.2}" cy="{:.2}" r="{radius:.2}" fill="#2471a3" fill-opacity="0.6"><title>({:.2}, {:.2}]: {} pairs, predicted {:.4}, observed {:.4}</title></circle>"##,
                px(b.mean_predicted),
                py(b.fraction_positive),
                b.lower,
                b.upper,
                b.count,
                b.mean_predicted,
                b.fraction_positive
            );
        }
        let _ = writeln!(
            s,
            r##"<text x="{PAD}" y="{:.1}" fill="#2471a3">ECE {:.4}, {} pairs</text>"##,
            PAD + SIZE + 60.0,
            c.ece,
            total
        );
    }
    s.push_str("</svg>\n");
    s
}

/// Probability histograms of negatives and positives, each scaled to its own total (share per bin).
pub fn histograms(r: &SeriesReport) -> String {
    let neg_total: u64 = r.histogram_negative.iter().sum();
    let pos_total: u64 = r.histogram_positive.iter().sum();
    let share = |c: u64, t: u64| if t == 0 { 0.0 } else { c as f64 / t as f64 };
    let top = r
        .histogram_negative
        .iter()
        .map(|&c| share(c, neg_total))
        .chain(r.histogram_positive.iter().map(|&c| share(c, pos_total)))
        .fold(0.0f64, f64::max)
        .max(1e-9);
    let mut s = frame(
        &title(r, "Scores by class"),
        "probability",
        "share of the class",
        &format!("{top:.2}"),
    );
    let bins = r.histogram_negative.len().max(1);
    let width = SIZE / bins as f64;
    for (class, counts, total, colour, offset) in [
        (
            "bar-negative",
            &r.histogram_negative,
            neg_total,
            "#2471a3",
            0.0,
        ),
        (
            "bar-positive",
            &r.histogram_positive,
            pos_total,
            "#c0392b",
            0.5,
        ),
    ] {
        for (i, &c) in counts.iter().enumerate() {
            let h = share(c, total) / top * SIZE;
            let _ = writeln!(
                s,
                r#"<rect class="{class}" x="{:.2}" y="{:.2}" width="{:.2}" height="{h:.2}" fill="{colour}" fill-opacity="0.7"><title>{c}</title></rect>"#,
                PAD + (i as f64 + offset * 0.5) * width + 1.0,
                PAD + SIZE - h,
                width * 0.5 - 1.0,
            );
        }
    }
    let _ = writeln!(
        s,
        r##"<text x="{PAD}" y="{:.1}"><tspan fill="#2471a3">negatives ({neg_total})</tspan> <tspan fill="#c0392b">positives ({pos_total})</tspan></text>"##,
        PAD + SIZE + 60.0
    );
    s.push_str("</svg>\n");
    s
}

/// Cumulative gains by decile against the share of cases, with the diagonal of a random ordering.
pub fn gains(r: &SeriesReport) -> String {
    let mut s = frame(
        &title(r, "Cumulative gains"),
        "share of cases, highest scores first",
        "share of positives found",
        "1",
    );
    let _ = writeln!(
        s,
        r##"<line class="diagonal" x1="{}" y1="{}" x2="{}" y2="{}" stroke="#999" stroke-dasharray="4 3"/>"##,
        px(0.0),
        py(0.0),
        px(1.0),
        py(1.0)
    );
    let total: usize = r.gains.iter().map(|g| g.count).sum();
    let mut points = vec![format!("{:.2},{:.2}", px(0.0), py(0.0))];
    let mut cumulative = 0usize;
    for g in &r.gains {
        cumulative += g.count;
        let x = cumulative as f64 / total.max(1) as f64;
        points.push(format!("{:.2},{:.2}", px(x), py(g.cumulative_gain)));
    }
    let _ = writeln!(
        s,
        r##"<polyline class="gains" fill="none" stroke="#c0392b" stroke-width="2" points="{}"/>"##,
        points.join(" ")
    );
    for p in points.iter().skip(1) {
        if let Some((x, y)) = p.split_once(',') {
            let _ = writeln!(
                s,
                r##"<circle class="bin" cx="{x}" cy="{y}" r="3" fill="#c0392b"/>"##
            );
        }
    }
    s.push_str("</svg>\n");
    s
}
