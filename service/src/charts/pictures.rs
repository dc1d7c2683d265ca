//! The pictures: reliability diagrams (DeGroot and Fienberg 1983) with Wilson (1927) intervals per bin, score
//! histograms by class, cumulative gains, and a distribution of paired differences. Report, comparison and
//! calibration fit all draw through these.

use probity_models::metrics::{wilson_interval, CalibrationTable, Z_95};

use super::{palette, Picture, Plot, Scale};

/// The probability axis of a reliability diagram.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ProbabilityAxis {
    /// Log-odds when nine in ten predictions are below 0.1 (fraud and response base rates), 0-1 otherwise.
    #[default]
    Auto,
    /// Linear from 0 to 1.
    Linear,
    /// Log-odds, labelled as probabilities.
    LogOdds,
}

/// One calibration bin as a picture needs it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bin {
    /// Lower edge.
    pub lower: f64,
    /// Upper edge.
    pub upper: f64,
    /// Cases.
    pub count: usize,
    /// Positives among them.
    pub positives: usize,
    /// Mean predicted probability.
    pub mean_predicted: f64,
    /// Observed share of positives.
    pub fraction_positive: f64,
    /// An interval of the share computed elsewhere (an estimate's); `None`: the Wilson interval of the counts.
    pub interval: Option<(f64, f64)>,
    /// Whether `fraction_positive` is an estimate (of an eventual share) rather than observed.
    pub estimated: bool,
}

impl Bin {
    /// The interval drawn: the given one, else the 95% Wilson interval of the counts.
    pub fn drawn_interval(&self) -> Option<(f64, f64)> {
        self.interval
            .or_else(|| wilson_interval(self.positives as u64, self.count as u64, Z_95))
    }
}

/// The bins of a calibration table.
pub fn bins_of(table: &CalibrationTable) -> Vec<Bin> {
    table
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
        .collect()
}

/// One reliability curve: its label, colour, `class` for its line, and bins.
pub struct Curve<'a> {
    /// Legend text.
    pub label: String,
    /// Palette colour.
    pub colour: &'static str,
    /// The `class` of its line (`curve` when empty); markers are `bin`, intervals `interval`.
    pub class: &'a str,
    /// The bins.
    pub bins: Vec<Bin>,
}

fn is_low_rate(curves: &[Curve<'_>]) -> bool {
    let (mut low, mut all) = (0usize, 0usize);
    for c in curves {
        for b in &c.bins {
            all += b.count;
            if b.mean_predicted < 0.1 {
                low += b.count;
            }
        }
    }
    all > 0 && low * 10 >= all * 9
}

/// The reliability plot of `curves`: one marker per non-empty bin (area by count), its 95% Wilson interval for the
/// observed share, the bins joined, and the diagonal.
pub fn reliability_plot(curves: &[Curve<'_>], axis: ProbabilityAxis) -> Plot {
    let log_odds = match axis {
        ProbabilityAxis::Auto => is_low_rate(curves),
        ProbabilityAxis::Linear => false,
        ProbabilityAxis::LogOdds => true,
    };
    let scale = if log_odds {
        Scale::log_odds_for(curves.iter().flat_map(|c| {
            c.bins.iter().flat_map(|b| {
                let (lo, hi) = b
                    .drawn_interval()
                    .unwrap_or((b.fraction_positive, b.fraction_positive));
                [b.mean_predicted, lo.max(b.mean_predicted / 10.0), hi]
            })
        }))
    } else {
        Scale::Unit
    };
    let names = if log_odds {
        (
            "mean predicted probability (log-odds scale)",
            "observed share of positives (log-odds scale)",
        )
    } else {
        ("mean predicted probability", "observed share of positives")
    };
    let mut plot = Plot::new(scale, scale, names.0, names.1);
    plot.diagonal();
    for c in curves {
        let total: usize = c.bins.iter().map(|b| b.count).sum();
        let points: Vec<(f64, f64)> = c
            .bins
            .iter()
            .filter(|b| b.count > 0)
            .map(|b| (b.mean_predicted, b.fraction_positive))
            .collect();
        let class = if c.class.is_empty() { "curve" } else { c.class };
        plot.line(class, c.colour, &points);
        for b in c.bins.iter().filter(|b| b.count > 0) {
            if let Some((lo, hi)) = b.drawn_interval() {
                plot.interval("interval", c.colour, b.mean_predicted, lo, hi);
            }
            let radius = 2.5 + 8.0 * (b.count as f64 / total.max(1) as f64).sqrt();
            let tip = if b.estimated {
                format!(
                    "({:.4}, {:.4}]: {} cases, {} positives so far, predicted {:.4}, estimated eventual {:.4}",
                    b.lower, b.upper, b.count, b.positives, b.mean_predicted, b.fraction_positive
                )
            } else {
                format!(
                    "({:.4}, {:.4}]: {} cases, {} positives, predicted {:.4}, observed {:.4}",
                    b.lower, b.upper, b.count, b.positives, b.mean_predicted, b.fraction_positive
                )
            };
            plot.marker(
                "bin",
                c.colour,
                b.mean_predicted,
                b.fraction_positive,
                radius,
                &tip,
            );
        }
    }
    plot
}

/// A whole reliability picture: the plot, a legend entry per curve, and notes (each with its colour).
pub fn reliability(
    title: &str,
    curves: &[Curve<'_>],
    axis: ProbabilityAxis,
    notes: &[(&str, String)],
) -> String {
    let mut picture = Picture::new(title);
    picture.plot(reliability_plot(curves, axis));
    for c in curves {
        picture.legend(c.colour, &c.label);
    }
    picture.legend(palette::REFERENCE, "perfect calibration");
    for (colour, text) in notes {
        picture.note(colour, text);
    }
    picture.note(
        palette::MUTED,
        "Bars: 95% Wilson intervals of the observed share; marker area grows with the bin's count.",
    );
    picture.render()
}

/// Histograms of the probability for negatives and positives, each as a share of its class, on equal-width bins
/// of [0, 1].
pub fn class_histograms(title: &str, negative: &[u64], positive: &[u64]) -> String {
    let neg_total: u64 = negative.iter().sum();
    let pos_total: u64 = positive.iter().sum();
    let share = |c: u64, t: u64| if t == 0 { 0.0 } else { c as f64 / t as f64 };
    let top = negative
        .iter()
        .map(|&c| share(c, neg_total))
        .chain(positive.iter().map(|&c| share(c, pos_total)))
        .fold(0.0f64, f64::max)
        .max(1e-9);
    let mut plot = Plot::new(
        Scale::Unit,
        Scale::Range { lo: 0.0, hi: top },
        "probability",
        "share of the class",
    );
    let bins = negative.len().max(positive.len()).max(1) as f64;
    for (class, counts, total, colour, offset) in [
        ("bar-negative", negative, neg_total, palette::TIDE, 0.0),
        ("bar-positive", positive, pos_total, palette::RUST, 0.5),
    ] {
        for (i, &c) in counts.iter().enumerate() {
            let x0 = (i as f64 + offset) / bins;
            plot.bar(
                class,
                colour,
                x0,
                x0 + 0.5 / bins,
                share(c, total),
                &format!("{c} cases"),
            );
        }
    }
    let mut picture = Picture::new(title);
    picture.plot(plot);
    picture.legend(palette::TIDE, &format!("negatives ({neg_total})"));
    picture.legend(palette::RUST, &format!("positives ({pos_total})"));
    picture.render()
}

/// Cumulative gains: (share of cases, share of positives found) points after each group, from (0, 0), and the
/// diagonal of a random ordering.
pub fn gains(title: &str, points: &[(f64, f64)]) -> String {
    let mut plot = Plot::new(
        Scale::Unit,
        Scale::Unit,
        "share of cases, highest scores first",
        "share of positives found",
    );
    plot.diagonal();
    let mut line = vec![(0.0, 0.0)];
    line.extend_from_slice(points);
    plot.line("gains", palette::RUST, &line);
    for &(x, y) in points {
        plot.marker(
            "bin",
            palette::RUST,
            x,
            y,
            3.0,
            &format!("{:.1}% of cases: {:.1}% of positives", x * 100.0, y * 100.0),
        );
    }
    let mut picture = Picture::new(title);
    picture.plot(plot);
    picture.legend(palette::RUST, "model");
    picture.legend(palette::REFERENCE, "random ordering");
    picture.render()
}

/// A histogram of paired differences in `bars` equal bins spanning the data and zero, with a line at zero.
pub fn differences_plot(differences: &[f64], bars: usize, x_name: &str) -> Plot {
    histogram_plot(&DifferencesHistogram::of(differences, bars), x_name)
}

/// The bars of [`differences_plot`]: `counts.len()` equal bins over `[lo, hi]`, a range that always holds 0.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct DifferencesHistogram {
    /// Left end.
    pub lo: f64,
    /// Right end.
    pub hi: f64,
    /// Cases per bar (the last bar takes its right end).
    pub counts: Vec<usize>,
}

impl DifferencesHistogram {
    /// The range of a sample whose smallest and largest values are `min` and `max` (infinite when empty).
    pub fn range(min: f64, max: f64) -> (f64, f64) {
        let (lo, hi) = (min.min(0.0), max.max(0.0));
        if hi > lo {
            (lo, hi)
        } else {
            (-1.0, 1.0)
        }
    }

    /// An empty histogram of `bars` bars over `[lo, hi]`.
    pub fn new(lo: f64, hi: f64, bars: usize) -> DifferencesHistogram {
        DifferencesHistogram {
            lo,
            hi,
            counts: vec![0; bars.max(1)],
        }
    }

    /// Counts one value.
    pub fn add(&mut self, v: f64) {
        let span = self.hi - self.lo;
        let k = (((v - self.lo) / span) * self.counts.len() as f64).floor() as usize;
        let last = self.counts.len() - 1;
        self.counts[k.min(last)] += 1;
    }

    /// The histogram of a sample.
    pub fn of(differences: &[f64], bars: usize) -> DifferencesHistogram {
        let min = differences.iter().copied().fold(f64::INFINITY, f64::min);
        let max = differences
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        let (lo, hi) = DifferencesHistogram::range(min, max);
        let mut h = DifferencesHistogram::new(lo, hi, bars);
        for &v in differences {
            h.add(v);
        }
        h
    }
}

/// The picture of a [`DifferencesHistogram`].
pub fn histogram_plot(histogram: &DifferencesHistogram, x_name: &str) -> Plot {
    let (lo, hi, counts) = (histogram.lo, histogram.hi, &histogram.counts);
    let span = hi - lo;
    let top = counts.iter().copied().max().unwrap_or(1).max(1) as f64;
    let mut plot = Plot::new(
        Scale::Range { lo, hi },
        Scale::Range { lo: 0.0, hi: top },
        x_name,
        "paired cases",
    );
    if counts.iter().all(|&c| c == 0) {
        plot.empty_note("no paired cases yet");
        return plot;
    }
    let width = span / counts.len() as f64;
    for (k, &c) in counts.iter().enumerate() {
        let x0 = lo + k as f64 * width;
        plot.bar(
            "bar",
            palette::MUTED,
            x0,
            x0 + width,
            c as f64,
            &format!("[{:.4}, {:.4}): {c}", x0, x0 + width),
        );
    }
    plot.vertical("zero", 0.0, palette::RUST);
    plot
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fraud_rates_get_the_log_odds_axis() {
        let low = probity_models::metrics::calibration_table(
            &[0.001, 0.002, 0.003, 0.004, 0.2],
            &[false, false, true, false, true][..],
            probity_models::metrics::BinStrategy::Uniform(10),
        )
        .unwrap();
        let curve = |t: &CalibrationTable| Curve {
            label: "m".into(),
            colour: palette::TIDE,
            class: "",
            bins: bins_of(t),
        };
        // Four of five below 0.1 is not nine in ten.
        assert!(!is_low_rate(&[curve(&low)]));
        let svg = reliability("t", &[curve(&low)], ProbabilityAxis::LogOdds, &[]);
        assert!(svg.contains("log-odds scale"));
        assert!(svg.contains(">1%<") || svg.contains(">0.1%<"), "{svg}");
    }
}
