//! Every SVG picture probity draws is built here: one palette of our own, scales (0-1, a numeric range, or
//! log-odds with probability labels), axes with labelled ticks on both sides, titles and notes that wrap inside the
//! canvas, and legends laid out in rows below the plots so that they never overlap them or each other.
//!
//! Hand-written rather than a plotting crate: the pictures are few and simple (lines, markers, bars, intervals), the
//! output must be small, deterministic text that tests can parse (elements carry a `class`), and the crates we
//! weighed pull in font loading and rasterising back-ends we do not need for SVG text.
//!
//! Text width is not measured (that needs the reader's font); it is estimated at [`CHAR_EM`] of the font size per
//! character, a bound above the average advance of common sans-serif faces for mixed text, and wrapping uses that
//! estimate. Tests render every picture with librsvg and check that no text ink falls outside the canvas.

use std::fmt::Write as _;

pub mod pictures;

/// Escapes text for SVG element content and attribute values.
pub fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// The palette: our own colours, chosen to stay apart for the common colour-vision deficiencies and in grey.
pub mod palette {
    /// Text, axes and frames.
    pub const INK: &str = "#22303c";
    /// Tick labels and secondary text.
    pub const MUTED: &str = "#5b6773";
    /// Reference lines (the diagonal, zero).
    pub const REFERENCE: &str = "#9aa5b1";
    /// Light grid lines.
    pub const GRID: &str = "#e3e7eb";
    /// The first series: the champion, the negatives, "after".
    pub const TIDE: &str = "#1f6f8b";
    /// The second series: the challenger, "before".
    pub const OCHRE: &str = "#c47f17";
    /// Positives, the gains curve, alarms.
    pub const RUST: &str = "#a8432f";
    /// A fourth series.
    pub const HEATHER: &str = "#6d5a96";
    /// Series colours in order.
    pub const SERIES: [&str; 4] = [TIDE, OCHRE, RUST, HEATHER];
}

/// Estimated advance of one character, as a share of the font size (see the module documentation).
pub const CHAR_EM: f64 = 0.62;
/// Body text size.
const FONT: f64 = 12.0;
/// Title text size.
const TITLE_FONT: f64 = 14.0;
/// Space around everything.
const MARGIN: f64 = 16.0;
/// Room left of a plot for the y tick labels and the y axis name.
const LEFT: f64 = 70.0;
/// Room below a plot for the x tick labels and the x axis name.
const BELOW: f64 = 44.0;
/// Side of a square plot.
pub const PLOT: f64 = 340.0;

/// The estimated width of `text` at `size`.
pub fn text_width(text: &str, size: f64) -> f64 {
    text.chars().count() as f64 * size * CHAR_EM
}

/// Splits `text` into lines no wider than `width` at `size`, at spaces; a word longer than a line is cut.
pub fn wrap(text: &str, width: f64, size: f64) -> Vec<String> {
    let max = ((width / (size * CHAR_EM)).floor() as usize).max(8);
    let mut lines = Vec::new();
    let mut line = String::new();
    for word in text.split_whitespace() {
        let mut word: String = word.to_string();
        while word.chars().count() > max {
            if !line.is_empty() {
                lines.push(std::mem::take(&mut line));
            }
            let head: String = word.chars().take(max).collect();
            word = word.chars().skip(max).collect();
            lines.push(head);
        }
        if line.is_empty() {
            line = word;
        } else if line.chars().count() + 1 + word.chars().count() <= max {
            line.push(' ');
            line.push_str(&word);
        } else {
            lines.push(std::mem::replace(&mut line, word));
        }
    }
    if !line.is_empty() {
        lines.push(line);
    }
    lines
}

/// How values map onto an axis.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Scale {
    /// A probability or share on [0, 1], linear.
    Unit,
    /// A linear range.
    Range {
        /// Value at the start of the axis.
        lo: f64,
        /// Value at the end of the axis.
        hi: f64,
    },
    /// A probability on the log-odds scale between two probabilities, labelled as probabilities: small base
    /// rates (fraud) spread out instead of crowding at 0.
    LogOdds {
        /// Probability at the start of the axis.
        lo: f64,
        /// Probability at the end of the axis.
        hi: f64,
    },
}

fn logit(p: f64) -> f64 {
    (p / (1.0 - p)).ln()
}

impl Scale {
    /// A log-odds scale spanning `values` (probabilities), widened to whole decades of the odds.
    pub fn log_odds_for(values: impl IntoIterator<Item = f64>) -> Scale {
        let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
        for v in values.into_iter().filter(|v| *v > 0.0 && *v < 1.0) {
            lo = lo.min(v);
            hi = hi.max(v);
        }
        if !(lo.is_finite() && hi.is_finite()) {
            return Scale::LogOdds {
                lo: 0.001,
                hi: 0.999,
            };
        }
        let down = |p: f64| 10f64.powf((p / (1.0 - p)).log10().floor());
        let to_p = |odds: f64| odds / (1.0 + odds);
        let lo = to_p(down(lo)).clamp(1e-6, 0.5);
        let hi = 1.0 - to_p(down(1.0 - hi)).clamp(1e-6, 0.5);
        Scale::LogOdds {
            lo,
            hi: if hi > lo { hi } else { 1.0 - lo },
        }
    }

    /// A value's position along the axis, from 0 to 1 (clamped).
    pub fn frac(&self, v: f64) -> f64 {
        let f = match *self {
            Scale::Unit => v,
            Scale::Range { lo, hi } => (v - lo) / (hi - lo),
            Scale::LogOdds { lo, hi } => {
                let v = v.clamp(lo, hi);
                (logit(v) - logit(lo)) / (logit(hi) - logit(lo))
            }
        };
        if f.is_finite() {
            f.clamp(0.0, 1.0)
        } else {
            0.0
        }
    }

    /// Tick values and their labels.
    pub fn ticks(&self) -> Vec<(f64, String)> {
        match *self {
            Scale::Unit => (0..=5)
                .map(|i| {
                    let v = f64::from(i) / 5.0;
                    (v, trim_number(v, 1))
                })
                .collect(),
            Scale::Range { lo, hi } => nice_ticks(lo, hi),
            Scale::LogOdds { lo, hi } => {
                let candidates = [
                    1e-6, 1e-5, 1e-4, 0.001, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999, 0.9999, 0.99999,
                    0.999999,
                ];
                candidates
                    .iter()
                    .copied()
                    .filter(|p| *p >= lo * (1.0 - 1e-9) && *p <= hi * (1.0 + 1e-9))
                    .map(|p| (p, percent(p)))
                    .collect()
            }
        }
    }
}

/// `0.1%`, `1%`, `50%`, `99.9%`.
fn percent(p: f64) -> String {
    let v = p * 100.0;
    let digits = if (1.0..=99.0).contains(&v) {
        0
    } else {
        let gap = v.min(100.0 - v);
        (-gap.log10()).ceil().max(0.0) as usize
    };
    format!("{}%", trim_number(v, digits))
}

/// `v` with at most `digits` decimals and no trailing zeros.
fn trim_number(v: f64, digits: usize) -> String {
    let s = format!("{v:.digits$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

/// About five ticks at 1, 2 or 5 times a power of ten.
fn nice_ticks(lo: f64, hi: f64) -> Vec<(f64, String)> {
    let span = hi - lo;
    if !(span.is_finite() && span > 0.0) {
        return vec![(lo, trim_number(lo, 3))];
    }
    let raw = span / 5.0;
    let power = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .into_iter()
        .map(|m| m * power)
        .find(|s| span / s <= 6.0)
        .unwrap_or(10.0 * power);
    let digits = (-step.log10()).ceil().max(0.0) as usize;
    let mut ticks = Vec::new();
    let mut k = (lo / step).ceil();
    while k * step <= hi + step * 1e-9 {
        let v = k * step;
        ticks.push((
            v,
            trim_number(if v.abs() < step * 1e-9 { 0.0 } else { v }, digits),
        ));
        k += 1.0;
    }
    ticks
}

/// One plot: two scales, axis names and its marks, drawn in a [`PLOT`]-sided square.
pub struct Plot {
    x: Scale,
    y: Scale,
    x_name: String,
    y_name: String,
    marks: String,
    /// Top-left corner of the plotting square, set when the picture lays it out (marks are written against
    /// (0, 0) and moved with a transform).
    origin: (f64, f64),
    /// Text in the middle of an empty plot.
    note: Option<String>,
}

impl Plot {
    /// An empty plot.
    pub fn new(x: Scale, y: Scale, x_name: &str, y_name: &str) -> Plot {
        Plot {
            x,
            y,
            x_name: x_name.into(),
            y_name: y_name.into(),
            marks: String::new(),
            origin: (0.0, 0.0),
            note: None,
        }
    }

    fn px(&self, v: f64) -> f64 {
        self.x.frac(v) * PLOT
    }

    fn py(&self, v: f64) -> f64 {
        (1.0 - self.y.frac(v)) * PLOT
    }

    /// Text shown in the middle of an empty plot ("no outcomes yet").
    pub fn empty_note(&mut self, text: &str) {
        self.note = Some(text.into());
    }

    /// The line y = x (perfect calibration, a random ordering).
    pub fn diagonal(&mut self) {
        let _ = writeln!(
            self.marks,
            r#"<line class="diagonal" x1="0" y1="{PLOT}" x2="{PLOT}" y2="0" stroke="{}" stroke-dasharray="4 3"/>"#,
            palette::REFERENCE
        );
    }

    /// A vertical reference line at x = `v`.
    pub fn vertical(&mut self, class: &str, v: f64, colour: &str) {
        let x = self.px(v);
        let _ = writeln!(
            self.marks,
            r#"<line class="{class}" x1="{x:.2}" y1="0" x2="{x:.2}" y2="{PLOT}" stroke="{colour}" stroke-width="1.5"/>"#
        );
    }

    /// A polyline through `points`.
    pub fn line(&mut self, class: &str, colour: &str, points: &[(f64, f64)]) {
        if points.is_empty() {
            return;
        }
        let list: Vec<String> = points
            .iter()
            .map(|&(x, y)| format!("{:.2},{:.2}", self.px(x), self.py(y)))
            .collect();
        let _ = writeln!(
            self.marks,
            r#"<polyline class="{class}" fill="none" stroke="{colour}" stroke-width="2" points="{}"/>"#,
            list.join(" ")
        );
    }

    /// A marker at (x, y) with radius `r` and a tooltip.
    pub fn marker(&mut self, class: &str, colour: &str, x: f64, y: f64, r: f64, tip: &str) {
        let _ = writeln!(
            self.marks,
            r#"<circle class="{class}" cx="{:.2}" cy="{:.2}" r="{r:.2}" fill="{colour}" fill-opacity="0.7"><title>{}</title></circle>"#,
            self.px(x),
            self.py(y),
            escape(tip)
        );
    }

    /// A vertical interval at x from `lo` to `hi`, with short caps.
    pub fn interval(&mut self, class: &str, colour: &str, x: f64, lo: f64, hi: f64) {
        let (x, y0, y1) = (self.px(x), self.py(lo), self.py(hi));
        let _ = writeln!(
            self.marks,
            r#"<path class="{class}" d="M{x:.2},{y0:.2}V{y1:.2}M{:.2},{y0:.2}H{:.2}M{:.2},{y1:.2}H{:.2}" stroke="{colour}" stroke-width="1" fill="none"/>"#,
            x - 3.0,
            x + 3.0,
            x - 3.0,
            x + 3.0
        );
    }

    /// A bar from y = 0 to `y` over x in [`x0`, `x1`], inset by a pixel each side.
    pub fn bar(&mut self, class: &str, colour: &str, x0: f64, x1: f64, y: f64, tip: &str) {
        let (a, b) = (self.px(x0), self.px(x1));
        let (top, bottom) = (self.py(y), self.py(0.0));
        let _ = writeln!(
            self.marks,
            r#"<rect class="{class}" x="{:.2}" y="{top:.2}" width="{:.2}" height="{:.2}" fill="{colour}" fill-opacity="0.75"><title>{}</title></rect>"#,
            a + 0.5,
            (b - a - 1.0).max(0.5),
            (bottom - top).max(0.0),
            escape(tip)
        );
    }

    fn render(&self, out: &mut String) {
        let (ox, oy) = self.origin;
        let _ = writeln!(out, r#"<g transform="translate({ox:.2},{oy:.2})">"#);
        for (v, label) in self.y.ticks() {
            let y = self.py(v);
            let _ = writeln!(
                out,
                r#"<line x1="0" y1="{y:.2}" x2="{PLOT}" y2="{y:.2}" stroke="{}"/><text class="tick" x="-6" y="{:.2}" text-anchor="end" fill="{}">{}</text>"#,
                palette::GRID,
                y + 4.0,
                palette::MUTED,
                escape(&label)
            );
        }
        for (v, label) in self.x.ticks() {
            let x = self.px(v);
            let _ = writeln!(
                out,
                r#"<line x1="{x:.2}" y1="0" x2="{x:.2}" y2="{PLOT}" stroke="{}"/><text class="tick" x="{x:.2}" y="{:.2}" text-anchor="middle" fill="{}">{}</text>"#,
                palette::GRID,
                PLOT + 16.0,
                palette::MUTED,
                escape(&label)
            );
        }
        let _ = writeln!(
            out,
            r#"<rect class="axis" x="0" y="0" width="{PLOT}" height="{PLOT}" fill="none" stroke="{}"/>"#,
            palette::INK
        );
        out.push_str(&self.marks);
        if let Some(note) = &self.note {
            let _ = writeln!(
                out,
                r#"<text x="{:.2}" y="{:.2}" text-anchor="middle" fill="{}">{}</text>"#,
                PLOT / 2.0,
                PLOT / 2.0,
                palette::MUTED,
                escape(note)
            );
        }
        let _ = writeln!(
            out,
            r#"<text class="axis-name" x="{:.2}" y="{:.2}" text-anchor="middle" fill="{}">{}</text>"#,
            PLOT / 2.0,
            PLOT + 34.0,
            palette::INK,
            escape(&fit(&self.x_name, PLOT, FONT))
        );
        let _ = writeln!(
            out,
            r#"<text class="axis-name" x="0" y="0" text-anchor="middle" fill="{}" transform="translate({:.2},{:.2}) rotate(-90)">{}</text>"#,
            palette::INK,
            -LEFT + 14.0,
            PLOT / 2.0,
            escape(&fit(&self.y_name, PLOT, FONT))
        );
        out.push_str("</g>\n");
    }
}

/// `text` cut with an ellipsis to fit `width` at `size`.
fn fit(text: &str, width: f64, size: f64) -> String {
    let max = (width / (size * CHAR_EM)).floor() as usize;
    if text.chars().count() <= max {
        text.to_string()
    } else {
        let mut s: String = text.chars().take(max.saturating_sub(1)).collect();
        s.push('…');
        s
    }
}

/// A picture: a title, plots side by side, a legend and notes.
pub struct Picture {
    title: String,
    plots: Vec<Plot>,
    legend: Vec<(String, String)>,
    notes: Vec<(String, String)>,
}

impl Picture {
    /// A picture with a title.
    pub fn new(title: &str) -> Picture {
        Picture {
            title: title.into(),
            plots: Vec::new(),
            legend: Vec::new(),
            notes: Vec::new(),
        }
    }

    /// Adds a plot to the right of the others.
    pub fn plot(&mut self, plot: Plot) {
        self.plots.push(plot);
    }

    /// A legend entry: a colour swatch and its label.
    pub fn legend(&mut self, colour: &str, label: &str) {
        self.legend.push((colour.into(), label.into()));
    }

    /// A note below the legend, in `colour`, wrapped to the picture's width.
    pub fn note(&mut self, colour: &str, text: &str) {
        self.notes.push((colour.into(), text.into()));
    }

    /// The SVG document.
    pub fn render(mut self) -> String {
        let panels = self.plots.len().max(1) as f64;
        let width = 2.0 * MARGIN + panels * (LEFT + PLOT) + (panels - 1.0) * 10.0;
        let inner = width - 2.0 * MARGIN;
        let title = wrap(&self.title, inner, TITLE_FONT);
        let mut y = MARGIN + TITLE_FONT;
        let mut body = String::new();
        for line in &title {
            let _ = writeln!(
                body,
                r#"<text class="title" x="{MARGIN}" y="{y:.2}" font-size="{TITLE_FONT}" fill="{}">{}</text>"#,
                palette::INK,
                escape(line)
            );
            y += TITLE_FONT * 1.3;
        }
        y += 10.0;
        let mut x = MARGIN + LEFT;
        for plot in &mut self.plots {
            plot.origin = (x, y);
            plot.render(&mut body);
            x += LEFT + PLOT + 10.0;
        }
        y += PLOT + BELOW + 8.0;
        // Legend entries flow left to right and wrap to a new row rather than overlap.
        let mut lx = MARGIN;
        for (colour, label) in &self.legend {
            let label = fit(label, inner - 20.0, FONT);
            let w = 18.0 + text_width(&label, FONT) + 16.0;
            if lx > MARGIN && lx + w > width - MARGIN {
                lx = MARGIN;
                y += FONT * 1.6;
            }
            let _ = writeln!(
                body,
                r#"<g class="legend"><rect x="{lx:.2}" y="{:.2}" width="12" height="12" fill="{colour}"/><text x="{:.2}" y="{y:.2}" fill="{}">{}</text></g>"#,
                y - 10.0,
                lx + 18.0,
                palette::INK,
                escape(&label)
            );
            lx += w;
        }
        if !self.legend.is_empty() {
            y += FONT * 1.8;
        }
        for (colour, note) in &self.notes {
            for line in wrap(note, inner, FONT) {
                let _ = writeln!(
                    body,
                    r#"<text class="note" x="{MARGIN}" y="{y:.2}" fill="{colour}">{}</text>"#,
                    escape(&line)
                );
                y += FONT * 1.4;
            }
        }
        let height = y + MARGIN - FONT * 0.4;
        let mut out = String::new();
        let _ = writeln!(
            out,
            r#"<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0}" height="{height:.0}" viewBox="0 0 {width:.0} {height:.0}" font-family="sans-serif" font-size="{FONT}">"#
        );
        let _ = writeln!(
            out,
            r#"<rect class="background" width="100%" height="100%" fill="white"/>"#
        );
        out.push_str(&body);
        out.push_str("</svg>\n");
        out
    }
}

#[cfg(test)]
mod tests;
