//! The always-valid view of a comparison (`probity_models::monitor::sequential`): normal-mixture confidence
//! sequences for the paired log-loss difference and the AUC difference, with their always-valid p-values. The
//! comparison's verdict is taken from these, so it may be read after every outcome; the fixed-sample verdict is kept
//! beside it.

use std::fmt::Write;

use probity_models::compare::{Minimums, OutcomeComparison, Verdict};
use probity_models::monitor::{
    always_valid_verdict, auc_sequence, loss_sequence, ConfidenceSequence, SequentialOptions,
};
use serde::Serialize;

/// How the always-valid figures were formed.
pub const METHOD: &str = "normal-mixture sequential probability ratio test and confidence sequence (Johari, Pekelis \
and Walsh 2017; Howard, Ramdas, McAuliffe and Sekhon 2021) with the sample standard error plugged in; for the AUC, \
applied to the DeLong estimate and standard error (a normal approximation)";

/// The always-valid figures of a comparison.
#[derive(Debug, Clone, Serialize)]
pub struct AlwaysValid {
    /// Probability of ever excluding the true difference.
    pub alpha: f64,
    /// Paired cases at which the boundary is tightest.
    pub tuned_for: f64,
    /// The mixture parameter (cases).
    pub rho: f64,
    /// The method in words.
    pub method: &'static str,
    /// Paired log-loss difference (challenger minus champion).
    pub log_loss: Option<Sequence>,
    /// AUC difference (challenger minus champion).
    pub auc: Option<Sequence>,
}

/// One confidence sequence at the current look.
#[derive(Debug, Clone, Serialize)]
pub struct Sequence {
    /// Estimated difference.
    pub estimate: f64,
    /// Lower end of the always-valid interval.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Always-valid p-value at this look; `None` when the two models agree on every case.
    pub p_value: Option<f64>,
}

impl From<ConfidenceSequence> for Sequence {
    fn from(s: ConfidenceSequence) -> Self {
        Sequence {
            estimate: s.estimate,
            lower: s.lower,
            upper: s.upper,
            p_value: s.p_value,
        }
    }
}

/// The always-valid figures and verdict of an outcome comparison.
pub fn compute(c: &OutcomeComparison) -> (AlwaysValid, Verdict) {
    let options = SequentialOptions::default();
    let ll = c
        .log_loss
        .as_ref()
        .and_then(|t| loss_sequence(t, &options).ok().map(|s| (t, s)));
    let auc = c
        .delong
        .as_ref()
        .and_then(|t| auc_sequence(t, &options).ok().map(|s| (t, s)));
    let verdict = always_valid_verdict(
        Minimums::default(),
        c.positives,
        c.negatives,
        ll.as_ref().map(|(t, s)| (*t, s)),
        auc.as_ref().map(|(t, s)| (*t, s)),
    );
    (
        AlwaysValid {
            alpha: options.alpha,
            tuned_for: options.tuned_for,
            rho: options.rho(),
            method: METHOD,
            log_loss: ll.map(|(_, s)| s.into()),
            auc: auc.map(|(_, s)| s.into()),
        },
        verdict,
    )
}

/// The lines of the text table.
pub fn render(s: &mut String, a: &AlwaysValid, fixed_sample_verdict: &str) {
    let level = (1.0 - a.alpha) * 100.0;
    let _ = writeln!(
        s,
        "\nalways valid (may be read after every outcome; {level:.0}% confidence sequences):"
    );
    for (name, seq, digits) in [("log-loss", &a.log_loss, 5), ("AUC", &a.auc, 4)] {
        if let Some(q) = seq {
            let _ = writeln!(
                s,
                "  {name:<12} difference {:+.digits$} in [{:+.digits$}, {:+.digits$}], always-valid p {}",
                q.estimate,
                q.lower,
                q.upper,
                q.p_value
                    .map_or_else(|| "-".to_string(), |p| format!("{p:.4}"))
            );
        }
    }
    let _ = writeln!(
        s,
        "fixed-sample verdict (valid at one planned look only): {fixed_sample_verdict}"
    );
}
