//! A reliability diagram of a calibration fit (drawn by [`probity::charts`]): observed share of positives against
//! mean predicted probability per bin, before and after calibration, with the diagonal of perfect calibration
//! (DeGroot and Fienberg 1983) and Wilson intervals per bin. Marker area grows with the bin's count.

use probity::charts::palette;
use probity::charts::pictures::{self, bins_of, Curve, ProbabilityAxis};
use probity_models::fit::FitReport;

/// The diagram of a fit report's before and after tables.
pub fn reliability_svg(title: &str, report: &FitReport) -> String {
    pictures::reliability(
        title,
        &[
            Curve {
                label: format!(
                    "before: ECE {:.4}, log-loss {:.4}",
                    report.before.table.ece, report.before.log_loss
                ),
                colour: palette::OCHRE,
                class: "before",
                bins: bins_of(&report.before.table),
            },
            Curve {
                label: format!(
                    "after ({}-fold): ECE {:.4}, log-loss {:.4}",
                    report.folds, report.after.table.ece, report.after.log_loss
                ),
                colour: palette::TIDE,
                class: "after",
                bins: bins_of(&report.after.table),
            },
        ],
        ProbabilityAxis::Auto,
        &[],
    )
}
