//! Always-valid comparisons: a champion-challenger difference that may be looked at after every outcome.
//!
//! A fixed-sample test read every morning and stopped at the first "significant" result has a false-alarm rate far
//! above its nominal level. The mixture sequential probability ratio test (Robbins 1970; Johari, Pekelis and Walsh
//! 2017, "Always valid inference: continuous monitoring of A/B tests", Operations Research, 2022 version; first
//! circulated 2015/2017) avoids this: for a running sum `S_n` of independent differences with variance `sigma^2`
//! per case and a normal mixing distribution over the true mean, the mixture likelihood ratio against mean 0,
//!
//! ```text
//! Lambda_n = sqrt(rho / (n + rho)) * exp( (S_n / sigma)^2 / (2 (n + rho)) ),
//! ```
//!
//! is a nonnegative martingale under the null, so by Ville's inequality `P(Lambda_n >= 1/alpha for some n) <=
//! alpha`. Inverting it gives the two-sided normal-mixture confidence sequence of Howard, Ramdas, McAuliffe and
//! Sekhon (2021), "Time-uniform, nonparametric, nonasymptotic confidence sequences", Annals of Statistics 49,
//! section 3.2 (the normal mixture boundary; intrinsic time `V = n` in units of `sigma^2`):
//!
//! ```text
//! |estimate - theta| <= standard_error * sqrt( (n + rho) / n * ln((n + rho) / (rho alpha^2)) ),
//! ```
//!
//! where `standard_error = sigma / sqrt(n)`; it covers the true difference at every `n` at once with probability at
//! least `1 - alpha`. `rho` sets where the boundary is tightest: minimising the width at `n = m` gives
//! `rho = m / u` with `u` the root of `u = 2 ln(1/alpha) + ln(1 + u)` (derived by setting the derivative of
//! `(1 + r) (ln((1 + r)/r) + 2 ln(1/alpha))` in `r = rho/m` to zero; solved here by fixed-point iteration).
//!
//! **Approximations, stated.** `sigma` is not known: it is replaced by the current sample estimate, which makes the
//! guarantee asymptotic (a time-uniform central limit argument; Waudby-Smith, Arbour, Sinha, Kennedy and Ramdas,
//! "Time-uniform central limit theory and asymptotic confidence sequences", 2021 preprint, Annals of Statistics
//! 2024). For the paired log-loss difference the cases are taken as independent (separate requests). For the AUC
//! difference the same boundary is applied to the DeLong estimate and standard error: the difference of two AUCs is
//! asymptotically linear in per-case structural components (DeLong, DeLong and Clarke-Pearson 1988), so `n`
//! times it behaves like a running sum with per-case variance `n * se^2`; this is a normal approximation of a
//! U-statistic, not a result of either paper. The simulation tests in `models/tests/sequential_sim.rs` measure the
//! false-verdict rate under peeking.
//!
//! The always-valid p-value at a look is `min(1, 1 / Lambda_n)`, computed at that look only (the running minimum
//! over earlier looks needs their history, which a report over a range does not keep); it is below `alpha` exactly
//! when the confidence sequence excludes 0, and the chance that this happens at *any* look under no difference is
//! at most `alpha` (approximately, as above).

use super::MonitorError;
use crate::compare::{DeLongTest, Minimums, PairedTest, Verdict, VerdictRule};

/// Options of the always-valid tests.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SequentialOptions {
    /// Probability of ever excluding the true difference (two-sided).
    pub alpha: f64,
    /// The number of paired cases at which the boundary is tightest.
    pub tuned_for: f64,
}

impl Default for SequentialOptions {
    /// `alpha = 0.05` (the fixed-sample rule's level) and tightest at 1,000 paired cases (our choice: a few days of
    /// a small route's outcomes; any fixed value keeps the guarantee).
    fn default() -> Self {
        SequentialOptions {
            alpha: 0.05,
            tuned_for: 1000.0,
        }
    }
}

impl SequentialOptions {
    fn check(&self) -> Result<(), MonitorError> {
        if !(self.alpha > 0.0 && self.alpha < 1.0) {
            return Err(MonitorError::BadOption {
                name: "alpha",
                value: self.alpha,
                reason: "must lie strictly between 0 and 1",
            });
        }
        if !(self.tuned_for.is_finite() && self.tuned_for >= 1.0) {
            return Err(MonitorError::BadOption {
                name: "tuned_for",
                value: self.tuned_for,
                reason: "must be a finite number of cases, at least 1",
            });
        }
        Ok(())
    }

    /// The mixture parameter `rho` (in cases) that makes the boundary tightest at `tuned_for` cases.
    pub fn rho(&self) -> f64 {
        let two_l = 2.0 * (1.0 / self.alpha).ln();
        let mut u = two_l;
        for _ in 0..100 {
            u = two_l + (1.0 + u).ln();
        }
        self.tuned_for / u
    }
}

/// The always-valid view of one difference (challenger minus champion) at the current look.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ConfidenceSequence {
    /// Paired cases so far.
    pub cases: usize,
    /// The estimated difference.
    pub estimate: f64,
    /// Its (fixed-sample) standard error.
    pub standard_error: f64,
    /// Lower end of the always-valid interval.
    pub lower: f64,
    /// Upper end of the always-valid interval.
    pub upper: f64,
    /// Natural log of the mixture likelihood ratio against no difference; `None` when the standard error is 0.
    pub log_likelihood_ratio: Option<f64>,
    /// Always-valid p-value at this look, `min(1, 1 / Lambda)`; `None` with the ratio.
    pub p_value: Option<f64>,
    /// The options' `alpha`.
    pub alpha: f64,
    /// The mixture parameter used.
    pub rho: f64,
}

impl ConfidenceSequence {
    /// True when the interval excludes 0 (equivalently, `p_value < alpha` up to rounding at the boundary).
    pub fn excludes_zero(&self) -> bool {
        self.lower > 0.0 || self.upper < 0.0
    }
}

/// The normal-mixture confidence sequence and mixture likelihood ratio for an asymptotically normal `estimate` with
/// `standard_error` after `cases` paired cases.
///
/// Errors: bad options, no case, a non-finite estimate or a negative or non-finite standard error.
pub fn normal_mixture(
    estimate: f64,
    standard_error: f64,
    cases: usize,
    options: &SequentialOptions,
) -> Result<ConfidenceSequence, MonitorError> {
    options.check()?;
    if cases == 0 {
        return Err(MonitorError::BadOption {
            name: "cases",
            value: 0.0,
            reason: "a confidence sequence needs at least one case",
        });
    }
    if !estimate.is_finite() {
        return Err(MonitorError::BadOption {
            name: "estimate",
            value: estimate,
            reason: "must be finite",
        });
    }
    if !(standard_error.is_finite() && standard_error >= 0.0) {
        return Err(MonitorError::BadOption {
            name: "standard error",
            value: standard_error,
            reason: "must be finite and not negative",
        });
    }
    let n = cases as f64;
    let rho = options.rho();
    let width = standard_error
        * ((n + rho) / n * ((n + rho) / (rho * options.alpha * options.alpha)).ln()).sqrt();
    let (log_likelihood_ratio, p_value) = if standard_error > 0.0 {
        let z = estimate / standard_error;
        let log_lr = 0.5 * (rho / (n + rho)).ln() + n * z * z / (2.0 * (n + rho));
        (Some(log_lr), Some((-log_lr).exp().min(1.0)))
    } else {
        (None, None)
    };
    Ok(ConfidenceSequence {
        cases,
        estimate,
        standard_error,
        lower: estimate - width,
        upper: estimate + width,
        log_likelihood_ratio,
        p_value,
        alpha: options.alpha,
        rho,
    })
}

/// The always-valid view of the paired log-loss (or any loss) difference, from its Diebold-Mariano test with the
/// independent-cases variance (standard error `s / sqrt(n)`, `s` with divisor `n - 1`).
pub fn loss_sequence(
    test: &PairedTest,
    options: &SequentialOptions,
) -> Result<ConfidenceSequence, MonitorError> {
    normal_mixture(test.mean, test.standard_error, test.cases, options)
}

/// The always-valid view of the AUC difference from its DeLong test (see the module's statement of the
/// approximation); `cases` counts positives and negatives together.
pub fn auc_sequence(
    test: &DeLongTest,
    options: &SequentialOptions,
) -> Result<ConfidenceSequence, MonitorError> {
    normal_mixture(
        test.difference,
        test.standard_error,
        test.positives + test.negatives,
        options,
    )
}

/// The comparison's verdict from the always-valid tests: the rule of [`VerdictRule`] (log-loss first, AUC second,
/// mixed when they disagree) applied to the always-valid p-values instead of the fixed-sample ones, at the
/// sequences' `alpha`. The verdict's evidence therefore carries the always-valid p-values.
pub fn always_valid_verdict(
    minimums: Minimums,
    positives: usize,
    negatives: usize,
    log_loss: Option<(&PairedTest, &ConfidenceSequence)>,
    auc: Option<(&DeLongTest, &ConfidenceSequence)>,
) -> Verdict {
    let alpha = log_loss
        .map(|(_, s)| s.alpha)
        .or(auc.map(|(_, s)| s.alpha))
        .unwrap_or(0.05);
    let rule = VerdictRule { alpha, minimums };
    let ll = log_loss.map(|(t, s)| PairedTest {
        p_value: s.p_value,
        ..t.clone()
    });
    let au = auc.map(|(t, s)| DeLongTest {
        p_value: s.p_value,
        ..t.clone()
    });
    rule.judge(positives, negatives, ll.as_ref(), au.as_ref())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rho_solves_its_equation_and_is_tightest_at_the_tuned_time() {
        let o = SequentialOptions::default();
        let rho = o.rho();
        let u = o.tuned_for / rho;
        assert!((u - (2.0 * 20.0f64.ln() + (1.0 + u).ln())).abs() < 1e-12);
        // The width factor at n = tuned_for is smallest at this rho among nearby values.
        let factor = |r: f64| {
            let n = o.tuned_for;
            ((n + r) / n * ((n + r) / (r * 0.0025)).ln()).sqrt()
        };
        assert!(factor(rho) < factor(rho * 0.9) && factor(rho) < factor(rho * 1.1));
    }

    #[test]
    fn p_value_below_alpha_exactly_when_zero_is_excluded() {
        let o = SequentialOptions::default();
        for n in [50usize, 100, 1000, 10_000] {
            let probe = normal_mixture(0.0, 1.0, n, &o).unwrap();
            let half = probe.upper;
            for k in [0.99, 1.01] {
                let s = normal_mixture(half * k, 1.0, n, &o).unwrap();
                assert_eq!(s.excludes_zero(), k > 1.0, "{n} {k}");
                assert_eq!(s.p_value.unwrap() < o.alpha, k > 1.0, "{n} {k} {s:?}");
            }
            // Always wider than the fixed-sample 95% interval (1.96 standard errors).
            assert!(half > 1.96, "{n}: {half}");
        }
    }

    #[test]
    fn a_fixed_sample_significance_is_not_enough_for_the_always_valid_verdict() {
        use crate::compare::VarianceEstimator;
        // Made-up test results: z = -2.5 on the log-loss (fixed-sample p = 0.012) after 1,000 cases.
        let ll = PairedTest {
            cases: 1000,
            mean: -0.01,
            standard_error: 0.004,
            statistic: Some(-2.5),
            p_value: Some(crate::compare::normal_two_sided_p(-2.5)),
            estimator: VarianceEstimator::Independent,
        };
        let fixed = VerdictRule::default().judge(100, 900, Some(&ll), None);
        assert_eq!(fixed.code(), "challenger_better");
        let seq = loss_sequence(&ll, &SequentialOptions::default()).unwrap();
        let v = always_valid_verdict(Minimums::default(), 100, 900, Some((&ll, &seq)), None);
        assert_eq!(v.code(), "no_clear_difference", "{seq:?}");
        // At z = -5 both agree.
        let strong = PairedTest {
            statistic: Some(-5.0),
            mean: -0.02,
            ..ll.clone()
        };
        let seq = loss_sequence(&strong, &SequentialOptions::default()).unwrap();
        let v = always_valid_verdict(Minimums::default(), 100, 900, Some((&strong, &seq)), None);
        assert_eq!(v.code(), "challenger_better");
    }

    #[test]
    fn mixture_ratio_hand_computed() {
        // rho = 100 (alpha 0.05, tuned_for = 100 u), n = 300, z = 3: log LR = 0.5 ln(100/400) + 300 * 9 / 800.
        let o = SequentialOptions::default();
        let u = o.tuned_for / o.rho();
        let o = SequentialOptions {
            tuned_for: 100.0 * u,
            ..o
        };
        let s = normal_mixture(0.3, 0.1, 300, &o).unwrap();
        let want = 0.5 * 0.25f64.ln() + 2700.0 / 800.0;
        assert!((s.log_likelihood_ratio.unwrap() - want).abs() < 1e-12);
        assert!((s.p_value.unwrap() - (-want).exp()).abs() < 1e-15);
        assert!(normal_mixture(0.0, 0.0, 10, &o).unwrap().p_value.is_none());
        assert!(normal_mixture(0.0, 1.0, 0, &o).is_err());
        assert!(normal_mixture(0.0, 1.0, 1, &SequentialOptions { alpha: 0.0, ..o }).is_err());
    }
}
