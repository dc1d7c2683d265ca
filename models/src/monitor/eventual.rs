//! Eventual figures of a window whose outcomes are still arriving: the positive rate, log-loss, Brier score and
//! calibration table its predictions are expected to show once every positive outcome within the horizon has come
//! in, with intervals.
//!
//! **Method: observed over expected arrived, per calibration bin.** The delay reference (a [`KaplanMeier`] curve of
//! the time from prediction to positive outcome, built from older predictions) gives `F(a)`, the share of eventual
//! positives that have arrived by age `a`. Each figure is the window mean of a per-prediction score that is affine in
//! the eventual label `y`: `c_i + y_i g_i` (log-loss: `c = softplus(h)`, `g = softplus(-h) - softplus(h)`, from the
//! final log-odds `h`; Brier: `c = p^2`, `g = 1 - 2p`; positive rate: `c = 0`, `g = 1`). Only `sum_i y_i g_i` over a
//! bin is unknown. Within bin `b`, with `n_b` predictions, its arrived positives' sum `U_b = sum_{arrived} g_i` is
//! divided by the bin's expected arrived share `D_b / n_b`, `D_b = sum_{i in b} F(a_i)`:
//!
//! `estimate = (1 / n) [ sum_i c_i + sum_b (n_b / D_b) U_b ]`, and the bin's eventual positive rate is `k_b / D_b`.
//!
//! This is the reporting-delay correction of Lawless (1994), "Adjustments for reporting delays and the prediction
//! of occurred but not reported events", Canadian Journal of Statistics 22 (counts reported so far divided by the
//! estimated probability of having been reported by now), pooled over the predictions of a bin as a separate ratio
//! estimator (Cochran 1977, "Sampling Techniques", 3rd ed., Wiley, ch. 6); both citations are from memory. With one
//! bin it is [`eventual_rate`](super::eventual_rate) exactly.
//!
//! **Assumptions** (stated in reports too):
//! - the delay from prediction to positive outcome does not depend on the score, the bin or the prediction's time:
//!   the reference's delays apply to the window (Lawless's stationary reporting delay);
//! - within a bin, a prediction's chance of turning positive and its score are unrelated to its age inside the
//!   window (no drift within the window's span); the older and younger predictions of a bin stand for each other;
//! - outcomes of different predictions are independent; only positives arriving within the horizon count, and a
//!   prediction without one by then is a negative (the maturity rule);
//! - the reference holds none of the window's predictions.
//!
//! The target is the *expected* eventual figure of the window's predictions given their scores (what their outcomes
//! show on average), as for [`eventual_rate`](super::eventual_rate); the noise of the outcomes still to come is not
//! in the interval.
//!
//! **Why not impute from the score.** The delayed-feedback model of Chapelle (2014), "Modeling delayed feedback in
//! display advertising" (KDD), gives a prediction still without a positive at age `a` the chance `p S(a) / (1 - p +
//! p S(a))` of turning positive, from the model's own `p`. Used to audit that model, it pulls the estimated
//! calibration towards the model's own claim (a model that says 0.01 where the truth is 0.02 looks closer to
//! right than it is), so it is not used here; only the delay distribution is borrowed.
//!
//! **Intervals: delta method, two independent parts.**
//! - The window's outcomes: `U_b` is a sum over the bin's `n_b` predictions of independent terms `z_i = g_i` if the
//!   positive has arrived, else 0; its variance is estimated by `sum z_i^2 - (sum z_i)^2 / n_b` (the bin's terms
//!   taken as exchangeable; for the rate this is the binomial `k_b (1 - k_b / n_b)`). Bins are independent.
//! - The reference: the estimate is a smooth function of `S` at the window's ages and at the horizon (`F(a) = (1 -
//!   S(a)) / (1 - S(H))`); its gradient is applied to Greenwood's covariance `Cov(S(s), S(t)) = S(s) S(t) V(min(s,
//!   t))` (the same as [`eventual_rate`](super::eventual_rate)).
//!
//! A bin whose predictions are all younger than the reference's first delay expects no arrival: its own rate is
//! unknown, and for the window's figures it is counted with the nearest bin that expects some (a collapsed
//! stratum).
//!
//! Rates get a Wald interval on the log scale (`exp(ln estimate +- z se / estimate)`, both ends capped at 1; the
//! estimate itself is left as it is, above 1 in a small bin whose few positives arrived early, so that it stays
//! unbiased: a caller showing it may cap it and say so), and with no
//! positive arrived yet `[0, -ln(alpha / 2) / D]`, the Garwood (1936) zero-count bound scaled by the expected
//! arrived count; log-loss and Brier score a Wald interval on their own scale, cut at 0, and none at all while no
//! positive has arrived in the window (the outcome part of the variance is then 0 and says nothing). The intervals
//! are asymptotic: `models/tests/eventual_sim.rs` measures their coverage on simulated routes with known truth.

use super::delay::KaplanMeier;
use super::{normal_upper_point, MonitorError};
use crate::link::softplus;
use crate::metrics::quantile::right_closed_bin;
use crate::metrics::MetricsError;

/// One prediction of a window whose outcomes are still arriving, with its score.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoredCase {
    /// Time since the prediction, in the unit of the delay reference.
    pub age: f64,
    /// The final log-odds (log-loss is computed from it).
    pub log_odds: f64,
    /// The served probability (calibration bins and Brier score use it).
    pub probability: f64,
    /// Whether its positive outcome has arrived (within the horizon).
    pub positive: bool,
}

/// An estimate with its standard error and interval; `None` where they cannot be formed (see the module overview).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Estimate {
    /// The estimate.
    pub estimate: f64,
    /// Its standard error (delta method), on the figure's own scale.
    pub standard_error: Option<f64>,
    /// Lower end of the interval.
    pub lower: Option<f64>,
    /// Upper end of the interval.
    pub upper: Option<f64>,
}

/// One non-empty calibration bin of the window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EventualBin {
    /// Position among all bins (empty ones included), from 0.
    pub index: usize,
    /// Lower edge (excluded, except for the first bin).
    pub lower: f64,
    /// Upper edge (included).
    pub upper: f64,
    /// Predictions in the bin.
    pub count: usize,
    /// Positives arrived so far.
    pub positives_so_far: usize,
    /// Mean served probability.
    pub mean_predicted: f64,
    /// Mean share of eventual positives arrived by the bin's ages, `D_b / n_b`.
    pub arrived_share: f64,
    /// Estimated eventual share of positives, `k_b / D_b` (not capped at 1); `None` when the bin's predictions are all younger than
    /// the reference's first delay (the window's figures then count the bin with the nearest bin that has some).
    pub rate: Option<Estimate>,
}

/// The eventual figures of a window.
#[derive(Debug, Clone, PartialEq)]
pub struct EventualFigures {
    /// Predictions in the window.
    pub cases: usize,
    /// Positives arrived so far.
    pub positives_so_far: usize,
    /// Mean share of eventual positives arrived by the window's ages.
    pub arrived_share: f64,
    /// Estimated number of eventual positives, `sum_b n_b k_b / D_b`, uncapped: above `cases` the window's positives
    /// have arrived faster than the reference's delays allow, and the assumptions do not hold.
    pub eventual_positives: f64,
    /// Confidence level of the intervals.
    pub level: f64,
    /// Eventual positive rate (the bins' rates weighted by their counts).
    pub positive_rate: Estimate,
    /// Eventual mean log-loss (nats).
    pub log_loss: Estimate,
    /// Eventual Brier score.
    pub brier: Estimate,
    /// Eventual calibration table: the non-empty bins.
    pub bins: Vec<EventualBin>,
}

/// One prediction as the computation keeps it.
#[derive(Debug, Clone, Copy)]
struct Case {
    bin: usize,
    step: usize,
    positive: bool,
    log_odds: f64,
    probability: f64,
}

/// The options both forms of [`eventual_figures`] check first: a level strictly inside (0, 1), at least two bin
/// edges, finite and non-decreasing.
fn check_level_and_edges(level: f64, edges: &[f64]) -> Result<(), MonitorError> {
    if !(level > 0.0 && level < 1.0) {
        return Err(MonitorError::BadOption {
            name: "confidence level",
            value: level,
            reason: "must lie strictly between 0 and 1",
        });
    }
    if edges.len() < 2 {
        return Err(MonitorError::BadOption {
            name: "number of bin edges",
            value: edges.len() as f64,
            reason: "must be at least 2",
        });
    }
    if let Some(i) = edges.iter().position(|e| !e.is_finite()) {
        return Err(bad_row("bin edges", i, edges[i]));
    }
    if let Some(i) = (1..edges.len()).find(|&i| edges[i] < edges[i - 1]) {
        return Err(MonitorError::BadOption {
            name: "bin edge",
            value: edges[i],
            reason: "edges must not decrease",
        });
    }
    Ok(())
}

/// Estimates the eventual figures of `window` from the delay reference `km`, with calibration bins cut at `edges`
/// (all of them, from the lowest to the highest, bins `(e_{k-1}, e_k]`, the first open below and the last open
/// above, as `calibration_table` cuts them), intervals at `level`. See the module overview for the method.
///
/// Errors: a bad level, fewer than two edges or edges not finite and non-decreasing, an empty window, an age
/// negative or not finite, log-odds not finite, a probability outside [0, 1] (row named), a reference without a
/// positive outcome, a bin whose predictions are all younger than the reference's first delay (nothing is
/// expected to have arrived there, so nothing can be scaled up).
pub fn eventual_figures(
    km: &KaplanMeier,
    window: &[ScoredCase],
    edges: &[f64],
    level: f64,
) -> Result<EventualFigures, MonitorError> {
    check_level_and_edges(level, edges)?;
    if window.is_empty() {
        return Err(MetricsError::Empty { what: "window" }.into());
    }
    let g_h = km.eventual_share();
    if g_h <= 0.0 {
        return Err(MonitorError::NoFit {
            statistic: "eventual figures",
            reason: "the delay reference holds no positive outcome",
        });
    }
    let inner = &edges[1..edges.len() - 1];
    let bins = edges.len() - 1;
    let mut cases = Vec::with_capacity(window.len());
    for (row, c) in window.iter().enumerate() {
        if !(c.age.is_finite() && c.age >= 0.0) {
            return Err(bad_row("age", row, c.age));
        }
        if !c.log_odds.is_finite() {
            return Err(bad_row("log_odds", row, c.log_odds));
        }
        if !(0.0..=1.0).contains(&c.probability) {
            return Err(bad_row("probability", row, c.probability));
        }
        cases.push(Case {
            bin: right_closed_bin(inner, c.probability),
            step: km.step_of(c.age),
            positive: c.positive,
            log_odds: c.log_odds,
            probability: c.probability,
        });
    }
    let arrived = |c: &Case| (1.0 - km.survival_on_step(c.step)) / g_h;
    let n = cases.len() as f64;
    let mut count = vec![0usize; bins];
    let mut positives = vec![0usize; bins];
    let mut expected = vec![0.0f64; bins];
    let mut sum_p = vec![0.0f64; bins];
    for c in &cases {
        count[c.bin] += 1;
        positives[c.bin] += usize::from(c.positive);
        expected[c.bin] += arrived(c);
        sum_p[c.bin] += c.probability;
    }
    // A bin whose predictions are all younger than the reference's first delay expects no arrival, so nothing in
    // it can be scaled up: for the window's figures it joins the nearest bin that expects some (lower first), a
    // collapsed stratum, and its own rate is unknown.
    let usable: Vec<usize> = (0..bins).filter(|&b| expected[b] > 0.0).collect();
    if usable.is_empty() {
        return Err(MonitorError::NoFit {
            statistic: "eventual figures",
            reason: "the window's predictions are all younger than the first delay in the reference, so none of \
                     their positives is expected yet",
        });
    }
    let stratum: Vec<usize> = (0..bins)
        .map(|b| {
            *usable
                .iter()
                .min_by_key(|&&u| (u.abs_diff(b), u > b))
                .unwrap_or(&b)
        })
        .collect();
    let z = normal_upper_point((1.0 - level) / 2.0)?;
    let alpha = 1.0 - level;
    let k_total: usize = positives.iter().sum();
    let expected_total: f64 = expected.iter().sum();
    // The window's figures, on the strata.
    let merged: Vec<Case> = cases
        .iter()
        .map(|c| Case {
            bin: stratum[c.bin],
            ..*c
        })
        .collect();
    let mut merged_count = vec![0usize; bins];
    let mut merged_expected = vec![0.0f64; bins];
    for b in 0..bins {
        merged_count[stratum[b]] += count[b];
        merged_expected[stratum[b]] += expected[b];
    }
    let weights: Vec<f64> = merged_count.iter().map(|&c| c as f64 / n).collect();
    let strata: Vec<usize> = (0..bins).filter(|&b| merged_count[b] > 0).collect();
    let whole = Ratio {
        km,
        g_h,
        cases: &merged,
        count: &merged_count,
        expected: &merged_expected,
    };
    // Positive rate.
    let (rate, rate_var) = whole.figure(&strata, &weights, |_| 1.0);
    let positive_rate = rate_interval(rate, rate_var, k_total, expected_total, z, alpha);
    // Log-loss: c = softplus(h), g = softplus(-h) - softplus(h).
    let (ll, ll_var) = whole.figure(&strata, &weights, |c| {
        softplus(-c.log_odds) - softplus(c.log_odds)
    });
    let ll_base = cases.iter().map(|c| softplus(c.log_odds)).sum::<f64>() / n;
    let log_loss = linear_interval(ll_base + ll, ll_var, k_total, z, f64::INFINITY);
    // Brier: c = p^2, g = 1 - 2p.
    let (br, br_var) = whole.figure(&strata, &weights, |c| 1.0 - 2.0 * c.probability);
    let br_base = cases
        .iter()
        .map(|c| c.probability * c.probability)
        .sum::<f64>()
        / n;
    let brier = linear_interval(br_base + br, br_var, k_total, z, 1.0);
    // The table, on the bins themselves.
    let each = Ratio {
        km,
        g_h,
        cases: &cases,
        count: &count,
        expected: &expected,
    };
    let mut table = Vec::new();
    for b in (0..bins).filter(|&b| count[b] > 0) {
        let rate = (expected[b] > 0.0).then(|| {
            let mut w = vec![0.0; bins];
            w[b] = 1.0;
            let (r, var) = each.figure(&[b], &w, |_| 1.0);
            rate_interval(r, var, positives[b], expected[b], z, alpha)
        });
        table.push(EventualBin {
            index: b,
            lower: edges[b],
            upper: edges[b + 1],
            count: count[b],
            positives_so_far: positives[b],
            mean_predicted: sum_p[b] / count[b] as f64,
            arrived_share: expected[b] / count[b] as f64,
            rate,
        });
    }
    Ok(EventualFigures {
        cases: cases.len(),
        positives_so_far: k_total,
        arrived_share: expected_total / n,
        eventual_positives: rate * n,
        level,
        positive_rate,
        log_loss,
        brier,
        bins: table,
    })
}

/// What every figure's ratio estimate needs.
struct Ratio<'a> {
    km: &'a KaplanMeier,
    g_h: f64,
    cases: &'a [Case],
    count: &'a [usize],
    expected: &'a [f64],
}

impl Ratio<'_> {
    /// `theta = sum_{b in bins} w_b U_b / D_b` with `U_b` the sum of `g` over the bin's arrived positives, and the
    /// delta-method variance of `theta`: the window's part plus the reference's part (module overview).
    fn figure(&self, bins: &[usize], w: &[f64], g: impl Fn(&Case) -> f64) -> (f64, f64) {
        let nb = self.count.len();
        let mut sum = vec![0.0f64; nb];
        let mut sum_sq = vec![0.0f64; nb];
        let mut inside = vec![false; nb];
        for &b in bins {
            inside[b] = true;
        }
        for c in self.cases.iter().filter(|c| c.positive && inside[c.bin]) {
            let v = g(c);
            sum[c.bin] += v;
            sum_sq[c.bin] += v * v;
        }
        let mut theta = 0.0;
        let mut var_window = 0.0;
        // theta_b / (D_b G_H): the derivative of theta by S(a_i) for a prediction of bin b.
        let mut slope = vec![0.0f64; nb];
        for &b in bins {
            let d = self.expected[b];
            let theta_b = w[b] * sum[b] / d;
            theta += theta_b;
            let var_u = (sum_sq[b] - sum[b] * sum[b] / self.count[b] as f64).max(0.0);
            var_window += (w[b] / d) * (w[b] / d) * var_u;
            slope[b] = theta_b / (d * self.g_h);
        }
        // The reference's part: sum_j c_j S(t_j) over the bins' predictions and the horizon.
        let mut terms: Vec<(usize, f64)> = self
            .cases
            .iter()
            .filter(|c| inside[c.bin])
            .map(|c| (c.step, slope[c.bin]))
            .collect();
        terms.push((self.km.step_of(self.km.horizon), -theta / self.g_h));
        let var_reference = greenwood_variance(self.km, &mut terms);
        (theta, var_window + var_reference)
    }
}

/// `Var(sum_j c_j S(t_j))` under Greenwood's covariance `Cov(S(s), S(t)) = S(s) S(t) V(min(s, t))`, the terms given
/// as (step of `t_j`, `c_j`): sorted by step, each term meets the ones at or after its step with its own `V`.
fn greenwood_variance(km: &KaplanMeier, terms: &mut [(usize, f64)]) -> f64 {
    terms.sort_by_key(|t| std::cmp::Reverse(t.0));
    let mut after = 0.0;
    let mut var = 0.0;
    for &(g, c) in terms.iter() {
        let e = c * km.survival_on_step(g);
        let v = km.greenwood_on_step(g);
        if e != 0.0 && v != 0.0 {
            var += v * e * (e + 2.0 * after);
        }
        after += e;
    }
    var
}

/// A rate's estimate with its log-scale Wald interval, or the zero-count bound with no positive arrived.
fn rate_interval(theta: f64, var: f64, k: usize, expected: f64, z: f64, alpha: f64) -> Estimate {
    if k == 0 {
        return Estimate {
            estimate: 0.0,
            standard_error: None,
            lower: Some(0.0),
            upper: Some((-(alpha / 2.0).ln() / expected).min(1.0)),
        };
    }
    let se = var.sqrt();
    if !se.is_finite() {
        return Estimate {
            estimate: theta,
            standard_error: None,
            lower: None,
            upper: None,
        };
    }
    let log_se = se / theta;
    Estimate {
        estimate: theta,
        standard_error: Some(se),
        lower: Some((theta * (-z * log_se).exp()).min(1.0)),
        upper: Some((theta * (z * log_se).exp()).min(1.0)),
    }
}

/// A score's estimate with its Wald interval, cut to [0, `cap`]; none with no positive arrived.
fn linear_interval(estimate: f64, var: f64, k: usize, z: f64, cap: f64) -> Estimate {
    let se = var.sqrt();
    if k == 0 || !se.is_finite() {
        return Estimate {
            estimate,
            standard_error: None,
            lower: None,
            upper: None,
        };
    }
    Estimate {
        estimate,
        standard_error: Some(se),
        lower: Some((estimate - z * se).max(0.0)),
        upper: Some((estimate + z * se).min(cap)),
    }
}

fn bad_row(what: &'static str, index: usize, value: f64) -> MonitorError {
    MonitorError::Metric(MetricsError::NonFinite { what, index, value })
}

/// [`eventual_figures`] over a window it does not hold: `pass(each)` calls `each(case)` for every prediction of the
/// window (read once; a pass over a database cursor). What is kept is per calibration bin and per step of `km`
/// (each distinct delay of a positive in the reference): counts and sums, never the cases. The figures are
/// [`eventual_figures`]'s; sums over a bin's cases are added per bin and step before they are added together, so
/// they agree with it to rounding (not to the last bit), and the Greenwood variance's terms at one step are added
/// before they are weighed (`(sum e)^2` for `sum e_i (e_i + 2 after_i)`, equal in exact arithmetic).
///
/// Errors: as [`eventual_figures`].
pub fn eventual_figures_by(
    km: &KaplanMeier,
    edges: &[f64],
    level: f64,
    pass: impl FnOnce(&mut dyn FnMut(ScoredCase)),
) -> Result<EventualFigures, MonitorError> {
    check_level_and_edges(level, edges)?;
    let g_h = km.eventual_share();
    let inner = &edges[1..edges.len() - 1];
    let bins = edges.len() - 1;
    let steps = km.times.len() + 1;
    // Per bin: count, positives, expected arrivals, sum of p; over its positives the sums of g and g^2 for the
    // three figures (rate: g = 1; log-loss; Brier). Per (step, bin): count.
    let mut count = vec![0usize; bins];
    let mut positives = vec![0usize; bins];
    let mut expected = vec![0.0f64; bins];
    let mut sum_p = vec![0.0f64; bins];
    let mut sums = vec![[0.0f64; 6]; bins];
    let mut at_step = vec![0usize; steps * bins];
    let (mut ll_base, mut br_base) = (0.0f64, 0.0f64);
    let mut cases = 0usize;
    let mut bad: Option<MonitorError> = None;
    pass(&mut |c: ScoredCase| {
        if bad.is_some() {
            return;
        }
        let row = cases;
        if !(c.age.is_finite() && c.age >= 0.0) {
            bad = Some(bad_row("age", row, c.age));
            return;
        }
        if !c.log_odds.is_finite() {
            bad = Some(bad_row("log_odds", row, c.log_odds));
            return;
        }
        if !(0.0..=1.0).contains(&c.probability) {
            bad = Some(bad_row("probability", row, c.probability));
            return;
        }
        cases += 1;
        let bin = right_closed_bin(inner, c.probability);
        let step = km.step_of(c.age);
        count[bin] += 1;
        positives[bin] += usize::from(c.positive);
        if g_h > 0.0 {
            expected[bin] += (1.0 - km.survival_on_step(step)) / g_h;
        }
        sum_p[bin] += c.probability;
        at_step[step * bins + bin] += 1;
        ll_base += softplus(c.log_odds);
        br_base += c.probability * c.probability;
        if c.positive {
            let s = &mut sums[bin];
            let gl = softplus(-c.log_odds) - softplus(c.log_odds);
            let gb = 1.0 - 2.0 * c.probability;
            s[0] += 1.0;
            s[1] += 1.0;
            s[2] += gl;
            s[3] += gl * gl;
            s[4] += gb;
            s[5] += gb * gb;
        }
    });
    if let Some(e) = bad {
        return Err(e);
    }
    if cases == 0 {
        return Err(MetricsError::Empty { what: "window" }.into());
    }
    if g_h <= 0.0 {
        return Err(MonitorError::NoFit {
            statistic: "eventual figures",
            reason: "the delay reference holds no positive outcome",
        });
    }
    let n = cases as f64;
    let usable: Vec<usize> = (0..bins).filter(|&b| expected[b] > 0.0).collect();
    if usable.is_empty() {
        return Err(MonitorError::NoFit {
            statistic: "eventual figures",
            reason: "the window's predictions are all younger than the first delay in the reference, so none of \
                     their positives is expected yet",
        });
    }
    let stratum: Vec<usize> = (0..bins)
        .map(|b| {
            *usable
                .iter()
                .min_by_key(|&&u| (u.abs_diff(b), u > b))
                .unwrap_or(&b)
        })
        .collect();
    let z = normal_upper_point((1.0 - level) / 2.0)?;
    let alpha = 1.0 - level;
    let k_total: usize = positives.iter().sum();
    let expected_total: f64 = expected.iter().sum();
    // The strata: every bin's sums moved to its stratum.
    let mut merged_count = vec![0usize; bins];
    let mut merged_expected = vec![0.0f64; bins];
    let mut merged_sums = vec![[0.0f64; 6]; bins];
    let mut merged_at_step = vec![0usize; steps * bins];
    for b in 0..bins {
        let s = stratum[b];
        merged_count[s] += count[b];
        merged_expected[s] += expected[b];
        for k in 0..6 {
            merged_sums[s][k] += sums[b][k];
        }
        for g in 0..steps {
            merged_at_step[g * bins + s] += at_step[g * bins + b];
        }
    }
    let weights: Vec<f64> = merged_count.iter().map(|&c| c as f64 / n).collect();
    let strata: Vec<usize> = (0..bins).filter(|&b| merged_count[b] > 0).collect();
    let whole = Tallied {
        km,
        g_h,
        bins,
        count: &merged_count,
        expected: &merged_expected,
        sums: &merged_sums,
        at_step: &merged_at_step,
    };
    let (rate, rate_var) = whole.figure(&strata, &weights, 0);
    let positive_rate = rate_interval(rate, rate_var, k_total, expected_total, z, alpha);
    let (ll, ll_var) = whole.figure(&strata, &weights, 1);
    let log_loss = linear_interval(ll_base / n + ll, ll_var, k_total, z, f64::INFINITY);
    let (br, br_var) = whole.figure(&strata, &weights, 2);
    let brier = linear_interval(br_base / n + br, br_var, k_total, z, 1.0);
    let each = Tallied {
        km,
        g_h,
        bins,
        count: &count,
        expected: &expected,
        sums: &sums,
        at_step: &at_step,
    };
    let mut table = Vec::new();
    for b in (0..bins).filter(|&b| count[b] > 0) {
        let rate = (expected[b] > 0.0).then(|| {
            let mut w = vec![0.0; bins];
            w[b] = 1.0;
            let (r, var) = each.figure(&[b], &w, 0);
            rate_interval(r, var, positives[b], expected[b], z, alpha)
        });
        table.push(EventualBin {
            index: b,
            lower: edges[b],
            upper: edges[b + 1],
            count: count[b],
            positives_so_far: positives[b],
            mean_predicted: sum_p[b] / count[b] as f64,
            arrived_share: expected[b] / count[b] as f64,
            rate,
        });
    }
    Ok(EventualFigures {
        cases,
        positives_so_far: k_total,
        arrived_share: expected_total / n,
        eventual_positives: rate * n,
        level,
        positive_rate,
        log_loss,
        brier,
        bins: table,
    })
}

/// [`Ratio`] from per-bin sums and per-(step, bin) counts.
struct Tallied<'a> {
    km: &'a KaplanMeier,
    g_h: f64,
    bins: usize,
    count: &'a [usize],
    expected: &'a [f64],
    /// Per bin, over its positives: sum and sum of squares of g for figure 0, 1, 2.
    sums: &'a [[f64; 6]],
    at_step: &'a [usize],
}

impl Tallied<'_> {
    /// As [`Ratio::figure`], `figure` naming the g.
    fn figure(&self, bins: &[usize], w: &[f64], figure: usize) -> (f64, f64) {
        let nb = self.bins;
        let mut theta = 0.0;
        let mut var_window = 0.0;
        let mut slope = vec![0.0f64; nb];
        let mut inside = vec![false; nb];
        for &b in bins {
            inside[b] = true;
            let (sum, sum_sq) = (self.sums[b][2 * figure], self.sums[b][2 * figure + 1]);
            let d = self.expected[b];
            let theta_b = w[b] * sum / d;
            theta += theta_b;
            let var_u = (sum_sq - sum * sum / self.count[b] as f64).max(0.0);
            var_window += (w[b] / d) * (w[b] / d) * var_u;
            slope[b] = theta_b / (d * self.g_h);
        }
        // The reference's part, the terms of one step added together, steps from the last down.
        let horizon_step = self.km.step_of(self.km.horizon);
        let steps = self.at_step.len() / nb.max(1);
        let mut after = 0.0;
        let mut var = 0.0;
        for g in (0..steps.max(horizon_step + 1)).rev() {
            let mut c = 0.0;
            if g < steps {
                for b in (0..nb).filter(|&b| inside[b]) {
                    c += self.at_step[g * nb + b] as f64 * slope[b];
                }
            }
            if g == horizon_step {
                c += -theta / self.g_h;
            }
            let e = c * self.km.survival_on_step(g);
            let v = self.km.greenwood_on_step(g);
            if e != 0.0 && v != 0.0 {
                var += v * e * (e + 2.0 * after);
            }
            after += e;
        }
        (theta, var_window + var)
    }
}

#[cfg(test)]
mod tests {
    use super::super::delay::{eventual_rate, kaplan_meier, DelayObservation, WindowCase};
    use super::*;

    /// A reference of 12 predictions (horizon 10): positives after 1, 2, 2, 4, 7; censored at 3, 5, and five
    /// followed to the horizon without one.
    fn reference() -> KaplanMeier {
        let mut o: Vec<DelayObservation> = [1.0, 2.0, 2.0, 4.0, 7.0]
            .iter()
            .map(|&d| DelayObservation {
                age: 20.0,
                positive_after: Some(d),
            })
            .collect();
        for age in [3.0, 5.0, 20.0, 20.0, 20.0, 20.0, 20.0] {
            o.push(DelayObservation {
                age,
                positive_after: None,
            });
        }
        kaplan_meier(&o, 10.0).unwrap()
    }

    fn case(age: f64, p: f64, positive: bool) -> ScoredCase {
        ScoredCase {
            age,
            log_odds: (p / (1.0 - p)).ln(),
            probability: p,
            positive,
        }
    }

    fn window() -> Vec<ScoredCase> {
        vec![
            case(0.5, 0.1, false),
            case(1.5, 0.2, true),
            case(2.5, 0.3, false),
            case(3.5, 0.6, true),
            case(4.5, 0.7, false),
            case(6.0, 0.8, true),
            case(8.0, 0.4, false),
            case(9.0, 0.9, true),
        ]
    }

    #[test]
    fn figures_from_a_pass_equal_the_figures_of_the_held_window() {
        // `eventual_figures_by` keeps per-bin and per-step sums instead of the cases; on the same window it gives
        // `eventual_figures`'s figures to rounding, with a merged bin (0.1 is younger than the first delay), several
        // bins and cases on the same step.
        let km = reference();
        let mut w = window();
        w.extend([
            case(1.2, 0.25, false),
            case(4.2, 0.65, true),
            case(9.5, 0.95, false),
        ]);
        for edges in [vec![0.0, 1.0], vec![0.0, 0.15, 0.5, 0.75, 1.0]] {
            let held = eventual_figures(&km, &w, &edges, 0.9).unwrap();
            let passed = eventual_figures_by(&km, &edges, 0.9, |each| {
                for c in &w {
                    each(*c);
                }
            })
            .unwrap();
            let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * a.abs().max(b.abs()).max(1e-300);
            let same = |a: &Estimate, b: &Estimate| {
                close(a.estimate, b.estimate)
                    && a.standard_error
                        .zip(b.standard_error)
                        .is_none_or(|(x, y)| close(x, y))
                    && a.lower.zip(b.lower).is_none_or(|(x, y)| close(x, y))
                    && a.upper.zip(b.upper).is_none_or(|(x, y)| close(x, y))
                    && a.standard_error.is_some() == b.standard_error.is_some()
            };
            assert_eq!(
                (held.cases, held.positives_so_far),
                (passed.cases, passed.positives_so_far)
            );
            assert!(close(held.arrived_share, passed.arrived_share));
            assert!(close(held.eventual_positives, passed.eventual_positives));
            assert!(
                same(&held.positive_rate, &passed.positive_rate),
                "{held:?}\n{passed:?}"
            );
            assert!(same(&held.log_loss, &passed.log_loss));
            assert!(same(&held.brier, &passed.brier));
            assert_eq!(held.bins.len(), passed.bins.len());
            for (a, b) in held.bins.iter().zip(&passed.bins) {
                assert_eq!(
                    (a.index, a.count, a.positives_so_far),
                    (b.index, b.count, b.positives_so_far)
                );
                assert!(
                    close(a.mean_predicted, b.mean_predicted)
                        && close(a.arrived_share, b.arrived_share)
                );
                assert_eq!(a.rate.is_some(), b.rate.is_some());
                if let (Some(x), Some(y)) = (&a.rate, &b.rate) {
                    assert!(same(x, y), "{x:?} {y:?}");
                }
            }
        }
        // Refusals alike: an empty window.
        assert!(eventual_figures_by(&km, &[0.0, 1.0], 0.9, |_| {}).is_err());
    }

    #[test]
    fn one_bin_is_the_eventual_rate() {
        // With a single bin the positive rate and its interval are `eventual_rate`'s, which computes the same
        // delta-method variance by another arrangement of the sums.
        let km = reference();
        let w = window();
        let f = eventual_figures(&km, &w, &[0.0, 1.0], 0.95).unwrap();
        let cases: Vec<WindowCase> = w
            .iter()
            .map(|c| WindowCase {
                age: c.age,
                positive: c.positive,
            })
            .collect();
        let r = eventual_rate(&km, &cases, 0.95).unwrap();
        let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-300);
        assert!(close(f.positive_rate.estimate, r.estimate), "{f:?} {r:?}");
        assert!(close(f.arrived_share, r.arrived_share));
        let se = f.positive_rate.standard_error.unwrap() / f.positive_rate.estimate;
        assert!(close(se, r.log_standard_error.unwrap()));
        assert!(close(f.positive_rate.lower.unwrap(), r.lower));
        assert!(close(f.positive_rate.upper.unwrap(), r.upper));
    }

    #[test]
    fn hand_computed_figures() {
        // Reference, horizon 10: at 1, 12 at risk, 1 event: S = 11/12; at 2, 11 at risk, 2 events: S = 11/12 *
        // 9/11 = 3/4; censored at 3; at 4, 8 at risk, 1 event: S = 3/4 * 7/8 = 21/32; censored at 5; at 7, 6 at
        // risk, 1 event: S = 21/32 * 5/6 = 35/64. G(H) = 29/64.
        let km = reference();
        assert!((km.survival_at(10.0) - 35.0 / 64.0).abs() < 1e-15);
        let g_h = 29.0 / 64.0;
        let f_of = |s: f64| (1.0 - s) / g_h;
        // Two bins cut at 0.5. Bin 0 (p <= 0.5): ages 0.5, 1.5, 2.5, 8.0 -> S = 1, 11/12, 3/4, 35/64; one arrived.
        // Bin 1: ages 3.5, 4.5, 6.0, 9.0 -> S = 3/4, 21/32, 21/32, 35/64; three arrived.
        let d0 = f_of(1.0) + f_of(11.0 / 12.0) + f_of(0.75) + f_of(35.0 / 64.0);
        let d1 = f_of(0.75) + f_of(21.0 / 32.0) * 2.0 + f_of(35.0 / 64.0);
        let f = eventual_figures(&km, &window(), &[0.0, 0.5, 1.0], 0.95).unwrap();
        assert_eq!(f.bins.len(), 2);
        assert!((f.bins[0].rate.unwrap().estimate - 1.0 / d0).abs() < 1e-14);
        assert!((f.bins[1].rate.unwrap().estimate - 3.0 / d1).abs() < 1e-14);
        assert!((f.positive_rate.estimate - (4.0 / d0 + 4.0 * 3.0 / d1) / 8.0).abs() < 1e-14);
        // Log-loss: mean softplus(h) plus the bins' scaled sums of softplus(-h) - softplus(h) = -h over arrived
        // positives (p = 0.2 in bin 0; 0.6, 0.8, 0.9 in bin 1).
        let w = window();
        let h = |p: f64| (p / (1.0 - p)).ln();
        let base = w.iter().map(|c| softplus(c.log_odds)).sum::<f64>() / 8.0;
        let ll = base + (4.0 / d0 * -h(0.2) + 4.0 / d1 * (-h(0.6) - h(0.8) - h(0.9))) / 8.0;
        assert!(
            (f.log_loss.estimate - ll).abs() < 1e-13,
            "{} {ll}",
            f.log_loss.estimate
        );
        // Brier: mean p^2 plus scaled sums of 1 - 2p.
        let base = w.iter().map(|c| c.probability.powi(2)).sum::<f64>() / 8.0;
        let br = base + (4.0 / d0 * (1.0 - 0.4) + 4.0 / d1 * (3.0 - 2.0 * (0.6 + 0.8 + 0.9))) / 8.0;
        assert!((f.brier.estimate - br).abs() < 1e-14);
        // Window part of bin 0's rate variance: k (1 - k/n) / D^2 = (3/4) / d0^2; the reference part is positive.
        let se0 = f.bins[0].rate.unwrap().standard_error.unwrap();
        assert!(se0 * se0 > 0.75 / (d0 * d0));
        assert_eq!(f.positives_so_far, 4);
        assert!((f.eventual_positives - (4.0 / d0 + 4.0 * 3.0 / d1)).abs() < 1e-13);
    }

    #[test]
    fn reference_variance_matches_a_numerical_gradient() {
        // The reference's part of the log-loss variance is g' Sigma g with Sigma Greenwood's covariance of S on the
        // curve's steps, Cov(S_i, S_j) = S_i S_j V_min(i, j); here the gradient g is taken numerically by moving
        // one step's S at a time, and compared with the closed form (sorted suffix sums) used above.
        let km = reference();
        let w = window();
        let edges = [0.0, 0.5, 1.0];
        let base = eventual_figures(&km, &w, &edges, 0.95).unwrap();
        // Variance of the window part alone, from the same formula with an exact (variance-free) reference:
        // replace Greenwood's sums by 0.
        let mut exact = km.clone();
        exact.greenwood.iter_mut().for_each(|v| *v = 0.0);
        let window_only = eventual_figures(&exact, &w, &edges, 0.95).unwrap();
        let var_ref = base.log_loss.standard_error.unwrap().powi(2)
            - window_only.log_loss.standard_error.unwrap().powi(2);
        // Numerical: the estimate as a function of the step survivals s_1..s_m.
        let m = km.times.len();
        let estimate_with = |s: &[f64]| {
            let mut k2 = km.clone();
            k2.survival = s.to_vec();
            eventual_figures(&k2, &w, &edges, 0.95)
                .unwrap()
                .log_loss
                .estimate
        };
        let mut grad = vec![0.0; m];
        for j in 0..m {
            let eps = 1e-6;
            let mut up = km.survival.clone();
            up[j] += eps;
            let mut down = km.survival.clone();
            down[j] -= eps;
            grad[j] = (estimate_with(&up) - estimate_with(&down)) / (2.0 * eps);
        }
        let mut numeric = 0.0;
        for i in 0..m {
            for j in 0..m {
                let cov = km.survival[i] * km.survival[j] * km.greenwood[i.min(j)];
                numeric += grad[i] * grad[j] * cov;
            }
        }
        assert!(
            (var_ref - numeric).abs() <= 1e-6 * numeric.abs(),
            "{var_ref} vs {numeric}"
        );
    }

    #[test]
    fn no_arrival_and_bad_input() {
        let km = reference();
        let w: Vec<ScoredCase> = window()
            .into_iter()
            .map(|c| ScoredCase {
                positive: false,
                ..c
            })
            .collect();
        let f = eventual_figures(&km, &w, &[0.0, 1.0], 0.95).unwrap();
        assert_eq!(f.positive_rate.estimate, 0.0);
        // Garwood's zero-count bound -ln(0.025) over the expected arrived count.
        let d = f.arrived_share * 8.0;
        assert!((f.positive_rate.upper.unwrap() - (-(0.025f64).ln() / d).min(1.0)).abs() < 1e-15);
        assert!(f.log_loss.lower.is_none() && f.brier.upper.is_none());
        assert!(eventual_figures(&km, &[], &[0.0, 1.0], 0.95).is_err());
        assert!(eventual_figures(&km, &window(), &[0.0], 0.95).is_err());
        assert!(eventual_figures(&km, &window(), &[0.0, 1.0], 1.0).is_err());
        assert!(eventual_figures(&km, &window(), &[1.0, 0.0], 0.95).is_err());
        let mut bad = window();
        bad[3].probability = 1.5;
        let e = eventual_figures(&km, &bad, &[0.0, 1.0], 0.95).unwrap_err();
        assert!(e.to_string().contains("probability"), "{e}");
        // All of the window younger than the first delay (1): nothing expected yet.
        let young = [case(0.5, 0.1, false), case(0.7, 0.9, false)];
        assert!(eventual_figures(&km, &young, &[0.0, 0.5, 1.0], 0.95).is_err());
        // One bin younger: its rate is unknown and the window's figures count it with the other bin, so they equal
        // the one-bin figures.
        let young = [
            case(0.5, 0.1, false),
            case(5.0, 0.9, true),
            case(3.0, 0.8, false),
        ];
        let two = eventual_figures(&km, &young, &[0.0, 0.5, 1.0], 0.95).unwrap();
        let one = eventual_figures(&km, &young, &[0.0, 1.0], 0.95).unwrap();
        assert!(two.bins[0].rate.is_none() && two.bins[1].rate.is_some());
        assert_eq!(two.log_loss, one.log_loss);
        assert_eq!(two.positive_rate, one.positive_rate);
    }
}
