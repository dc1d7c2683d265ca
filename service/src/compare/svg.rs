//! The comparison as one standalone SVG (drawn by [`crate::charts`]): both models' reliability curves on the
//! paired cases with outcomes (left, with the diagonal of perfect calibration, DeGroot and Fienberg 1983, and
//! Wilson intervals per bin), and the distribution of the paired per-case differences (right, a histogram with a
//! line at zero). Elements carry a `class` (`champion`, `challenger`, `diagonal`, `bar`, `zero`) so that tests
//! can find them.

use crate::charts::pictures::{self, bins_of, Curve, ProbabilityAxis};
use crate::charts::{palette, Picture};

use super::CompareReport;

/// Renders the picture.
pub fn render(r: &CompareReport) -> String {
    let mut picture = Picture::new(&format!(
        "Route {}: champion {} against challenger {}",
        r.route, r.champion, r.challenger
    ));
    let curves: Vec<Curve<'_>> = match &r.reliability {
        Some((a, b)) => vec![
            Curve {
                label: format!("champion {}", r.champion),
                colour: palette::TIDE,
                class: "champion",
                bins: bins_of(a),
            },
            Curve {
                label: format!("challenger {}", r.challenger),
                colour: palette::OCHRE,
                class: "challenger",
                bins: bins_of(b),
            },
        ],
        None => Vec::new(),
    };
    let mut left = pictures::reliability_plot(&curves, ProbabilityAxis::Auto);
    if curves.is_empty() {
        left.empty_note("no outcomes yet");
    }
    picture.plot(left);
    picture.plot(pictures::histogram_plot(
        &r.differences,
        &format!("{} per paired case", r.differences_kind),
    ));
    for c in &curves {
        picture.legend(c.colour, &c.label);
    }
    picture.legend(palette::MUTED, "paired differences");
    picture.legend(palette::RUST, "no difference");
    picture.note(palette::INK, &format!("Verdict: {}", r.verdict));
    picture.note(
        palette::MUTED,
        "Bars on the left: 95% Wilson intervals of the observed share.",
    );
    picture.render()
}
