//! Outcomes that are still arriving: the delay from prediction to positive outcome, and the eventual positive rate
//! of a window whose outcomes are incomplete.
//!
//! **Delay.** Every logged prediction is a subject followed from its prediction time; the event is the arrival of a
//! positive outcome, observed up to `min(age, horizon)` where `age` is the time since the prediction (right-censored
//! by the current time) and `horizon` is the time after which an outcome no longer counts (the route's maturity). A
//! prediction that never turns positive stays censored. The Kaplan-Meier (1958, "Nonparametric estimation from
//! incomplete observations", JASA 53) product `S(t) = prod_{t_j <= t} (1 - d_j / n_j)` then estimates the share still
//! without a positive outcome at delay `t`, and `G(t) = 1 - S(t)` the share positive by `t`: a distribution that
//! stops at the eventual positive rate `G(horizon)`. Its variance is Greenwood's (1926) `S(t)^2 V(t)` with `V(t) =
//! sum_{t_j <= t} d_j / (n_j (n_j - d_j))`, and `Cov(S(s), S(t)) = S(s) S(t) V(min(s, t))`. Reference: statsmodels
//! `SurvfuncRight` (`surv_prob`, `surv_prob_se`).
//!
//! **Eventual rate of a window.** Of the window's eventual positives, a share `F(a) = G(a) / G(horizon)` has arrived
//! by age `a`. With `k` positives observed among the window's `n` predictions at ages `a_i`, the eventual positive
//! rate is estimated by `k / sum_i F(a_i)` (observed over the expected arrived share; the window's own rate may
//! differ from the reference's, only the delay distribution is borrowed). **Interval**: a Wald interval on the log
//! scale, `exp(log estimate +- z se)`, by the delta method with two independent parts: the window's count, taken as
//! binomial (`Var log k = (1 - k/n) / k`), and the reference's delay distribution, from Greenwood's covariances
//! (`Var log Fbar`, with `Fbar` the mean of `F(a_i)`, through `S` at the window's ages and at the horizon). The
//! reference must not contain the window's own predictions for the independence to hold; older predictions of the
//! same route are the intended reference. With `k = 0` the estimate is 0 and the upper end is `-ln(alpha/2) / (n
//! Fbar)`, the exact Poisson upper bound for a zero count (Garwood 1936) scaled by the arrived share. The target is
//! the rate the window's predictions turn positive at (the binomial parameter), not the count one particular window
//! will end with.

use super::{normal_upper_point, MonitorError};

/// One prediction of the delay reference.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DelayObservation {
    /// Time since the prediction (any unit, the same for all), at least 0.
    pub age: f64,
    /// Delay from prediction to its positive outcome, if one has arrived; at most `age`.
    pub positive_after: Option<f64>,
}

/// A Kaplan-Meier estimate of the time to a positive outcome.
#[derive(Debug, Clone, PartialEq)]
pub struct KaplanMeier {
    /// Predictions followed.
    pub cases: usize,
    /// Positive outcomes within the horizon.
    pub positives: usize,
    /// The horizon.
    pub horizon: f64,
    /// Distinct delays at which positives arrived, increasing.
    pub times: Vec<f64>,
    /// Predictions at risk just before each time.
    pub at_risk: Vec<usize>,
    /// Positives arriving at each time.
    pub events: Vec<usize>,
    /// `S` just after each time.
    pub survival: Vec<f64>,
    /// Greenwood's sum `V` up to each time.
    pub greenwood: Vec<f64>,
}

impl KaplanMeier {
    fn index_at(&self, t: f64) -> Option<usize> {
        // Last event time <= t.
        let k = self.times.partition_point(|&x| x <= t);
        k.checked_sub(1)
    }

    /// The step of the curve that delay `t` (cut at the horizon) falls in: 0 before the first event time, `k` from
    /// the `k`-th event time on (so `times.len()` from the last one on, the step of the horizon).
    pub(crate) fn step_of(&self, t: f64) -> usize {
        self.times.partition_point(|&x| x <= t.min(self.horizon))
    }

    /// `S` on step `g` (see [`KaplanMeier::step_of`]).
    pub(crate) fn survival_on_step(&self, g: usize) -> f64 {
        if g == 0 {
            1.0
        } else {
            self.survival[g - 1]
        }
    }

    /// Greenwood's sum `V` on step `g`.
    pub(crate) fn greenwood_on_step(&self, g: usize) -> f64 {
        if g == 0 {
            0.0
        } else {
            self.greenwood[g - 1]
        }
    }

    /// `S(t)`: the share without a positive outcome by delay `t`.
    pub fn survival_at(&self, t: f64) -> f64 {
        self.index_at(t.min(self.horizon))
            .map_or(1.0, |k| self.survival[k])
    }

    /// Greenwood's sum `V(t)`.
    pub fn greenwood_at(&self, t: f64) -> f64 {
        self.index_at(t.min(self.horizon))
            .map_or(0.0, |k| self.greenwood[k])
    }

    /// Greenwood standard error of `S(t)`.
    pub fn survival_se_at(&self, t: f64) -> f64 {
        self.survival_at(t) * self.greenwood_at(t).sqrt()
    }

    /// The eventual positive share `G(horizon) = 1 - S(horizon)`.
    pub fn eventual_share(&self) -> f64 {
        1.0 - self.survival_at(self.horizon)
    }

    /// The eventual positive share with a Wald interval at `level` from Greenwood's variance, `G(horizon) +- z
    /// S(horizon) sqrt(V(horizon))`, clipped to [0, 1]: `(estimate, lower, upper)`. Valid when the predictions have
    /// been followed for longer than positives take to arrive (the estimate cannot see beyond the longest follow-up).
    pub fn eventual_share_interval(&self, level: f64) -> Result<(f64, f64, f64), MonitorError> {
        if !(level > 0.0 && level < 1.0) {
            return Err(MonitorError::BadOption {
                name: "confidence level",
                value: level,
                reason: "must lie strictly between 0 and 1",
            });
        }
        let z = normal_upper_point((1.0 - level) / 2.0)?;
        let g = self.eventual_share();
        let se = self.survival_se_at(self.horizon);
        Ok((g, (g - z * se).max(0.0), (g + z * se).min(1.0)))
    }

    /// `F(t) = G(t) / G(horizon)`: the share of eventual positives that have arrived by delay `t`; `None` when no
    /// positive has arrived at all.
    pub fn arrived_share(&self, t: f64) -> Option<f64> {
        let total = self.eventual_share();
        (total > 0.0).then(|| (1.0 - self.survival_at(t)) / total)
    }
}

/// Kaplan-Meier estimate of the time to a positive outcome, followed to `horizon`.
///
/// Errors: a horizon not finite and positive, an age negative or not finite, a delay negative, not finite, or beyond
/// its age (row named).
pub fn kaplan_meier(
    observations: &[DelayObservation],
    horizon: f64,
) -> Result<KaplanMeier, MonitorError> {
    if !(horizon.is_finite() && horizon > 0.0) {
        return Err(MonitorError::BadOption {
            name: "horizon",
            value: horizon,
            reason: "must be finite and positive",
        });
    }
    // (time, is event)
    let mut follow: Vec<(f64, bool)> = Vec::with_capacity(observations.len());
    for (row, o) in observations.iter().enumerate() {
        if !(o.age.is_finite() && o.age >= 0.0) {
            return Err(bad_row("age", row, o.age));
        }
        let end = o.age.min(horizon);
        match o.positive_after {
            Some(d) if !(d.is_finite() && d >= 0.0 && d <= o.age) => {
                return Err(bad_row("positive_after", row, d))
            }
            Some(d) if d <= horizon => follow.push((d, true)),
            _ => follow.push((end, false)),
        }
    }
    // Events before censorings at the same time: a prediction censored at t was still at risk at t.
    follow.sort_by(|a, b| a.0.total_cmp(&b.0).then(b.1.cmp(&a.1)));
    let mut km = KaplanMeierSteps::new(follow.len(), horizon);
    let mut i = 0;
    while i < follow.len() {
        let t = follow[i].0;
        let mut d = 0;
        let mut j = i;
        while j < follow.len() && follow[j].0 == t {
            d += usize::from(follow[j].1);
            j += 1;
        }
        km.push(t, d, j - i);
        i = j;
    }
    Ok(km.finish())
}

/// [`kaplan_meier`] fed with follow-up times already grouped and sorted (as a database returns them, so that the
/// cases never have to be held): per distinct time, ascending, the number of cases whose follow-up ends there and
/// how many of those end with the event. The arithmetic is [`kaplan_meier`]'s, which uses it.
#[derive(Debug, Clone)]
pub struct KaplanMeierSteps {
    km: KaplanMeier,
    seen: usize,
    survival: f64,
    variance: f64,
}

impl KaplanMeierSteps {
    /// Steps over `cases` cases, each followed up to at most `horizon`.
    pub fn new(cases: usize, horizon: f64) -> KaplanMeierSteps {
        KaplanMeierSteps {
            km: KaplanMeier {
                cases,
                positives: 0,
                horizon,
                times: Vec::new(),
                at_risk: Vec::new(),
                events: Vec::new(),
                survival: Vec::new(),
                greenwood: Vec::new(),
            },
            seen: 0,
            survival: 1.0,
            variance: 0.0,
        }
    }

    /// The `count` cases whose follow-up ends at `t` (later than every earlier call's), `events` of them with the
    /// event.
    pub fn push(&mut self, t: f64, events: usize, count: usize) {
        let at_risk = self.km.cases.saturating_sub(self.seen);
        let d = events;
        if d > 0 {
            self.survival *= 1.0 - d as f64 / at_risk as f64;
            self.variance += if d < at_risk {
                d as f64 / (at_risk as f64 * (at_risk - d) as f64)
            } else {
                f64::INFINITY
            };
            self.km.times.push(t);
            self.km.at_risk.push(at_risk);
            self.km.events.push(d);
            self.km.survival.push(self.survival);
            self.km.greenwood.push(self.variance);
        }
        self.km.positives += d;
        self.seen += count;
    }

    /// The estimate.
    pub fn finish(self) -> KaplanMeier {
        self.km
    }
}

fn bad_row(what: &'static str, index: usize, value: f64) -> MonitorError {
    MonitorError::Metric(crate::metrics::MetricsError::NonFinite { what, index, value })
}

/// One prediction of a window whose outcomes are still arriving.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowCase {
    /// Time since the prediction.
    pub age: f64,
    /// Whether its positive outcome has arrived (within the horizon).
    pub positive: bool,
}

/// The estimated eventual positive rate of a window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EventualRate {
    /// Predictions in the window.
    pub cases: usize,
    /// Positives arrived so far.
    pub observed_positives: usize,
    /// `observed_positives / cases`.
    pub observed_rate: f64,
    /// Mean share of eventual positives arrived by the window's ages, `Fbar`.
    pub arrived_share: f64,
    /// `observed_rate / arrived_share`.
    pub estimate: f64,
    /// Standard error of `ln estimate` (`None` with no positive yet).
    pub log_standard_error: Option<f64>,
    /// Lower end of the interval.
    pub lower: f64,
    /// Upper end of the interval.
    pub upper: f64,
    /// Confidence level.
    pub level: f64,
}

/// Estimates the eventual positive rate of `window` from the delay reference `km` (see the module overview for the
/// estimate and how its interval at `level` is formed).
///
/// Errors: an empty window, a bad level, an age negative or not finite, a reference without any positive outcome.
pub fn eventual_rate(
    km: &KaplanMeier,
    window: &[WindowCase],
    level: f64,
) -> Result<EventualRate, MonitorError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(MonitorError::BadOption {
            name: "confidence level",
            value: level,
            reason: "must lie strictly between 0 and 1",
        });
    }
    if window.is_empty() {
        return Err(crate::metrics::MetricsError::Empty { what: "window" }.into());
    }
    if let Some(row) = window
        .iter()
        .position(|c| !(c.age.is_finite() && c.age >= 0.0))
    {
        return Err(bad_row("age", row, window[row].age));
    }
    let g_h = km.eventual_share();
    if g_h <= 0.0 {
        return Err(MonitorError::NoFit {
            statistic: "eventual positive rate",
            reason: "the delay reference holds no positive outcome",
        });
    }
    let n = window.len() as f64;
    let k = window.iter().filter(|c| c.positive).count();
    let s_h = 1.0 - g_h;
    let v_h = km.greenwood_at(km.horizon);
    // Group the window's ages by the reference's step they fall in: index 0 before the first event time.
    let steps = km.times.len() + 1;
    let mut counts = vec![0usize; steps];
    for c in window {
        counts[km.times.partition_point(|&x| x <= c.age.min(km.horizon))] += 1;
    }
    let s_of = |g: usize| if g == 0 { 1.0 } else { km.survival[g - 1] };
    let v_of = |g: usize| if g == 0 { 0.0 } else { km.greenwood[g - 1] };
    let mean_s: f64 = (0..steps).map(|g| counts[g] as f64 * s_of(g)).sum::<f64>() / n;
    let g_bar = 1.0 - mean_s;
    let arrived = g_bar / g_h;
    if arrived <= 0.0 {
        return Err(MonitorError::NoFit {
            statistic: "eventual positive rate",
            reason: "no outcome is expected to have arrived yet at the window's ages",
        });
    }
    // Var(mean S(a_i)) = (1/n^2) sum_g sum_h c_g c_h V(min(g, h)), c_g = count_g S_g; by suffix sums.
    let c: Vec<f64> = (0..steps).map(|g| counts[g] as f64 * s_of(g)).collect();
    let mut suffix = 0.0;
    let mut var_mean_s = 0.0;
    for g in (0..steps).rev() {
        var_mean_s += v_of(g) * c[g] * (c[g] + 2.0 * suffix);
        suffix += c[g];
    }
    var_mean_s /= n * n;
    let cov_mean_s_h: f64 = (0..steps).map(|g| c[g] * s_h * v_of(g)).sum::<f64>() / n;
    let var_log_f = var_mean_s / (g_bar * g_bar) + s_h * s_h * v_h / (g_h * g_h)
        - 2.0 * cov_mean_s_h / (g_bar * g_h);
    let observed_rate = k as f64 / n;
    let estimate = observed_rate / arrived;
    let z = normal_upper_point((1.0 - level) / 2.0)?;
    let (log_standard_error, lower, upper) = if k > 0 {
        let var_log_k = (1.0 - observed_rate) / k as f64;
        let se = (var_log_k + var_log_f.max(0.0)).sqrt();
        (
            Some(se),
            estimate * (-z * se).exp(),
            (estimate * (z * se).exp()).min(1.0),
        )
    } else {
        let alpha = 1.0 - level;
        (None, 0.0, (-(alpha / 2.0).ln() / (n * arrived)).min(1.0))
    };
    Ok(EventualRate {
        cases: window.len(),
        observed_positives: k,
        observed_rate,
        arrived_share: arrived,
        estimate,
        log_standard_error,
        lower,
        upper,
        level,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn obs(age: f64, positive_after: Option<f64>) -> DelayObservation {
        DelayObservation {
            age,
            positive_after,
        }
    }

    #[test]
    fn kaplan_meier_hand_computed() {
        // Times: events at 1, 2, 2 and censorings at 2, 3, 5 (horizon 4): at 1, 6 at risk, 1 event: S = 5/6;
        // at 2, 5 at risk (the censoring at 2 still counts), 2 events: S = 5/6 * 3/5 = 1/2.
        // V = 1/(6*5) + 2/(5*3) = 1/30 + 2/15 = 1/6.
        let o = [
            obs(9.0, Some(1.0)),
            obs(9.0, Some(2.0)),
            obs(2.0, Some(2.0)),
            obs(2.0, None),
            obs(3.0, None),
            obs(5.0, None),
        ];
        let km = kaplan_meier(&o, 4.0).unwrap();
        assert_eq!(km.times, vec![1.0, 2.0]);
        assert_eq!(km.at_risk, vec![6, 5]);
        assert!((km.survival_at(1.5) - 5.0 / 6.0).abs() < 1e-15);
        assert!((km.survival_at(4.0) - 0.5).abs() < 1e-15);
        assert!((km.greenwood_at(10.0) - 1.0 / 6.0).abs() < 1e-15);
        assert!((km.arrived_share(1.0).unwrap() - (1.0 / 6.0) / 0.5).abs() < 1e-15);
        assert!(kaplan_meier(&[obs(1.0, Some(2.0))], 4.0).is_err());
        assert!(kaplan_meier(&o, 0.0).is_err());
    }
}
