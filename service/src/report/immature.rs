//! The eventual positive rate of a report section whose outcomes are still arriving
//! (`probity_models::monitor::delay`): a Kaplan-Meier estimate of the time from prediction to the receipt of a
//! positive outcome over every prediction of the section, each followed until "now", with Greenwood's variance.
//!
//! Choices, stated: "now" is the latest moment the store shows for the section (its latest prediction or outcome
//! receipt), so the figure depends on the store only. The horizon is the follow-up that the oldest tenth of the
//! section's predictions (at least 30 of them) have had: the Kaplan-Meier steps beyond the point where few
//! predictions remain at risk are large and the Greenwood interval is poor there (cutting the curve where the risk
//! set gets small is common practice, no single source). Positives that take longer than the horizon are not
//! counted, and the estimate is meant for sections whose oldest predictions have matured. A label received before its prediction was
//! logged counts as a delay of 0; a negative label, from a client or the maturity rule, leaves the prediction
//! followed to "now" without an event.
//!
//! **The immature window** ([`window`]): the section's predictions younger than the horizon, whose positives may
//! still arrive, get estimates of their eventual positive rate, log-loss, Brier score and calibration table
//! (`probity_models::monitor::eventual_figures`: the reporting-delay correction of Lawless 1994 per calibration
//! bin, delta-method intervals), beside the same figures of the section's matured predictions (at least the
//! horizon old, each counted positive if its positive arrived within the horizon). The matured predictions are the
//! delay reference: a Kaplan-Meier curve of their time to a received positive (they are all followed for the
//! whole horizon, so it is their empirical distribution). The horizon is the route's maturity period when the
//! caller knows it (the server's `[store]` maturity, `probity report --horizon`), else the rule above. Bins are
//! the report's: equal-width edges, or equal-count edges cut on the window's probabilities.

use std::fmt::Write;

use probity_models::metrics::quantile::{linspace_unit, quantile_edges_sorted};
use probity_models::metrics::{wilson_interval, BinStrategy, Z_95};
use probity_models::monitor::{eventual_figures, kaplan_meier, DelayObservation, ScoredCase};
use serde::Serialize;

use crate::store::LoggedPrediction;

/// Confidence level of the interval.
pub const LEVEL: f64 = 0.95;

/// The estimate of one section.
#[derive(Debug, Clone, Serialize)]
pub struct EventualRate {
    /// "Now": the latest prediction or outcome receipt of the section (ms).
    pub now_ms: i64,
    /// The horizon: the longest follow-up (ms).
    pub horizon_ms: i64,
    /// Positive outcomes received so far.
    pub positives_so_far: usize,
    /// Estimated share of the section's predictions that turn positive within the horizon.
    pub estimate: f64,
    /// Lower end of the Wald-Greenwood interval.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Confidence level.
    pub level: f64,
    /// Median delay to a positive outcome among those that arrive (ms), when the estimate reaches half.
    pub median_delay_ms: Option<f64>,
}

/// Least number of predictions still followed at the horizon: a tenth of the section, at least 30.
pub fn at_risk_floor(predictions: usize) -> usize {
    (predictions / 10).max(30)
}

/// The horizon (ms): the age of the `at_risk_floor`-th oldest prediction; `None` with fewer predictions than that.
pub fn horizon(rows: &[LoggedPrediction], now_ms: i64) -> Option<i64> {
    let floor = at_risk_floor(rows.len());
    if rows.len() < floor {
        return None;
    }
    let mut ages: Vec<i64> = rows.iter().map(|r| now_ms - r.time_ms).collect();
    ages.sort_unstable();
    Some(ages[ages.len() - floor])
}

/// The estimate for `rows` (one section), or `None` with the reason noted when there is nothing to follow.
pub fn compute(rows: &[LoggedPrediction], notes: &mut Vec<String>) -> Option<EventualRate> {
    let now_ms = rows
        .iter()
        .map(|r| r.time_ms.max(r.outcome_received_ms.unwrap_or(i64::MIN)))
        .max()?;
    if rows.len() < at_risk_floor(rows.len()) {
        notes.push(format!(
            "eventual positive rate: {} predictions, fewer than the {} the estimate needs",
            rows.len(),
            at_risk_floor(rows.len())
        ));
        return None;
    }
    let horizon_ms = horizon(rows, now_ms)?;
    if horizon_ms <= 0 {
        notes.push(format!(
            "eventual positive rate: the oldest {} predictions have no follow-up yet",
            at_risk_floor(rows.len())
        ));
        return None;
    }
    let observations: Vec<DelayObservation> = rows
        .iter()
        .map(|r| DelayObservation {
            age: (now_ms - r.time_ms) as f64,
            positive_after: match (r.label, r.outcome_received_ms) {
                (Some(true), Some(received)) => Some(((received - r.time_ms).max(0)) as f64),
                _ => None,
            },
        })
        .collect();
    of_fit(
        kaplan_meier(&observations, horizon_ms as f64),
        now_ms,
        horizon_ms,
        notes,
    )
}

/// The estimate from a Kaplan-Meier fit (from the rows, or from follow-up grouped by the store), or `None` with
/// the reason noted.
pub fn of_fit(
    fit: Result<probity_models::monitor::KaplanMeier, probity_models::monitor::MonitorError>,
    now_ms: i64,
    horizon_ms: i64,
    notes: &mut Vec<String>,
) -> Option<EventualRate> {
    let result = fit.and_then(|km| {
        let (estimate, lower, upper) = km.eventual_share_interval(LEVEL)?;
        let median_delay_ms = km
            .times
            .iter()
            .copied()
            .find(|&t| km.arrived_share(t).is_some_and(|f| f >= 0.5));
        Ok(EventualRate {
            now_ms,
            horizon_ms,
            positives_so_far: km.positives,
            estimate,
            lower,
            upper,
            level: LEVEL,
            median_delay_ms,
        })
    });
    match result {
        Ok(e) => Some(e),
        Err(e) => {
            notes.push(format!("eventual positive rate: {e}"));
            None
        }
    }
}

/// The line of the text report.
pub fn render(s: &mut String, e: &Option<EventualRate>) {
    if let Some(e) = e {
        let _ = writeln!(
            s,
            "eventual positive rate {:.4} ({:.0}% {:.4} to {:.4}; Kaplan-Meier over {:.1} days of follow-up, {} positives so far{})",
            e.estimate,
            e.level * 100.0,
            e.lower,
            e.upper,
            e.horizon_ms as f64 / 86_400_000.0,
            e.positives_so_far,
            e.median_delay_ms
                .map(|m| format!(", median delay {:.1} days", m / 86_400_000.0))
                .unwrap_or_default()
        );
    }
}

/// An estimate with its interval; a missing end is unknown (the window's notes say why).
#[derive(Debug, Clone, Copy, Serialize)]
pub struct Estimate {
    /// The estimate.
    pub estimate: f64,
    /// Its delta-method standard error.
    pub standard_error: Option<f64>,
    /// Lower end of the interval.
    pub lower: Option<f64>,
    /// Upper end of the interval.
    pub upper: Option<f64>,
}

impl From<probity_models::monitor::Estimate> for Estimate {
    fn from(e: probity_models::monitor::Estimate) -> Self {
        Estimate {
            estimate: e.estimate,
            standard_error: e.standard_error,
            lower: e.lower,
            upper: e.upper,
        }
    }
}

/// The figures of the matured predictions (followed for the whole horizon).
#[derive(Debug, Clone, Serialize)]
pub struct Matured {
    /// Predictions at least the horizon old.
    pub predictions: usize,
    /// Of them, positives received within the horizon.
    pub positives: usize,
    /// Their share.
    pub positive_rate: f64,
    /// Mean log-loss with those labels (nats).
    pub log_loss: f64,
    /// Brier score with those labels.
    pub brier: f64,
}

/// One calibration bin of the immature window, beside the matured predictions of the same bin.
#[derive(Debug, Clone, Serialize)]
pub struct WindowBin {
    /// Lower edge (excluded, except for the first bin).
    pub lower: f64,
    /// Upper edge (included).
    pub upper: f64,
    /// Window predictions in the bin.
    pub count: usize,
    /// Positives arrived so far.
    pub positives_so_far: usize,
    /// Mean served probability of the window's predictions in the bin.
    pub mean_predicted: f64,
    /// Expected share of the bin's eventual positives arrived by now.
    pub arrived_share: f64,
    /// Estimated eventual share of positives; `None`: unknown (all the bin's predictions are younger than the first
    /// delay of the reference).
    pub eventual: Option<Estimate>,
    /// Matured predictions in the bin.
    pub matured_count: usize,
    /// Of them, positives within the horizon.
    pub matured_positives: usize,
    /// Their mean served probability.
    pub matured_mean_predicted: Option<f64>,
    /// Their observed share of positives, with its 95% Wilson interval.
    pub matured_observed: Option<f64>,
    /// Wilson lower end.
    pub matured_lower: Option<f64>,
    /// Wilson upper end.
    pub matured_upper: Option<f64>,
}

/// The estimated eventual figures of the predictions whose outcomes are still arriving.
#[derive(Debug, Clone, Serialize)]
pub struct Window {
    /// "Now" (ms): the section's latest prediction or outcome receipt.
    pub now_ms: i64,
    /// The horizon (ms).
    pub horizon_ms: i64,
    /// Where the horizon comes from.
    pub horizon_from: String,
    /// Predictions younger than the horizon.
    pub predictions: usize,
    /// Positives received so far among them, within the horizon.
    pub positives_so_far: usize,
    /// Expected share of their eventual positives arrived by now.
    pub arrived_share: f64,
    /// Confidence level.
    pub level: f64,
    /// The figures as they stand now, every prediction without a positive taken as negative (biased low).
    pub so_far: SoFar,
    /// Estimated eventual positive rate.
    pub positive_rate: Estimate,
    /// Estimated eventual mean log-loss.
    pub log_loss: Estimate,
    /// Estimated eventual Brier score.
    pub brier: Estimate,
    /// The calibration table.
    pub bins: Vec<WindowBin>,
    /// The matured predictions (the delay reference).
    pub matured: Matured,
    /// The method and its assumptions.
    pub method: String,
    /// Why an interval or a bin is unknown, and other cautions.
    pub notes: Vec<String>,
}

/// The window's figures now, with every prediction not yet positive taken as negative.
#[derive(Debug, Clone, Serialize)]
pub struct SoFar {
    /// Share of positives received.
    pub positive_rate: f64,
    /// Mean log-loss.
    pub log_loss: f64,
    /// Brier score.
    pub brier: f64,
}

/// The immature window of a section: estimated, or unknown with the reason.
#[derive(Debug, Clone, Serialize)]
#[serde(tag = "status", rename_all = "snake_case")]
pub enum ImmatureWindow {
    /// Estimated.
    Estimated(Box<Window>),
    /// Cannot be estimated.
    Unknown {
        /// Why.
        reason: String,
    },
}

/// The stated method, in the text and the JSON.
pub const METHOD: &str = "observed positives over the share expected to have arrived, per calibration bin \
    (Lawless 1994 reporting-delay correction), the delay taken from a Kaplan-Meier curve of the matured \
    predictions; assumes the delay does not depend on the score or the prediction time, and no drift within the \
    window; delta-method intervals (window outcomes and the delay curve by Greenwood's variance); the target is \
    the figure the window's predictions will show on average once their outcomes are in";

/// A section's positives with fewer than this many arrived in the window get a caution: the intervals are
/// asymptotic (simulated coverage of the log-loss and Brier intervals was about 0.9 with 6 arrived, nominal with
/// 50 or more; models/tests/eventual_sim.rs).
pub const FEW_ARRIVED: usize = 30;

/// The immature window of `rows` (one section): `horizon_ms` the route's maturity if known, else the rule of
/// [`horizon`]; calibration bins cut by `bins`.
pub fn window(
    rows: &[LoggedPrediction],
    bins: BinStrategy,
    horizon_ms: Option<i64>,
) -> ImmatureWindow {
    let unknown = |reason: String| ImmatureWindow::Unknown { reason };
    let Some(now_ms) = rows
        .iter()
        .map(|r| r.time_ms.max(r.outcome_received_ms.unwrap_or(i64::MIN)))
        .max()
    else {
        return unknown("no predictions".into());
    };
    let (horizon_ms, horizon_from) = match horizon_ms {
        Some(h) => (h, "the route's maturity period".to_string()),
        None => match horizon(rows, now_ms) {
            Some(h) => (
                h,
                format!(
                    "the follow-up of the oldest {} predictions (no maturity period given)",
                    at_risk_floor(rows.len())
                ),
            ),
            None => {
                return unknown(format!(
                    "{} predictions, fewer than the {} the horizon rule needs",
                    rows.len(),
                    at_risk_floor(rows.len())
                ))
            }
        },
    };
    if horizon_ms <= 0 {
        return unknown("the horizon is not positive".into());
    }
    // Delay to a received positive, if any.
    let delay = |r: &LoggedPrediction| match (r.label, r.outcome_received_ms) {
        (Some(true), Some(received)) => Some((received - r.time_ms).max(0)),
        _ => None,
    };
    let (young, old): (Vec<&LoggedPrediction>, Vec<&LoggedPrediction>) =
        rows.iter().partition(|r| now_ms - r.time_ms < horizon_ms);
    if young.is_empty() {
        return unknown(format!(
            "no prediction is younger than the {:.1}-day horizon: every outcome is in",
            days(horizon_ms)
        ));
    }
    if old.is_empty() {
        return unknown(format!(
            "no prediction in the range is at least the {:.1}-day horizon old, so no delay has been seen in full; \
             report over a range that also holds older predictions",
            days(horizon_ms)
        ));
    }
    let h = horizon_ms as f64;
    let reference: Vec<DelayObservation> = old
        .iter()
        .map(|r| DelayObservation {
            age: (now_ms - r.time_ms) as f64,
            positive_after: delay(r).map(|d| d as f64),
        })
        .collect();
    let km = match kaplan_meier(&reference, h) {
        Ok(km) => km,
        Err(e) => return unknown(format!("delay reference: {e}")),
    };
    if km.positives == 0 {
        return unknown(format!(
            "none of the {} matured predictions had a positive within the horizon, so the delay of positives is \
             unknown",
            old.len()
        ));
    }
    let cases: Vec<ScoredCase> = young
        .iter()
        .map(|r| ScoredCase {
            age: (now_ms - r.time_ms) as f64,
            log_odds: r.adjusted_log_odds,
            probability: r.probability,
            positive: delay(r).is_some_and(|d| d <= horizon_ms),
        })
        .collect();
    let edges: Vec<f64> = match bins {
        BinStrategy::Uniform(n) => (0..=n).map(|i| linspace_unit(i, n)).collect(),
        BinStrategy::Quantile(n) => {
            let mut p: Vec<f64> = cases.iter().map(|c| c.probability).collect();
            p.sort_by(f64::total_cmp);
            quantile_edges_sorted(&p, n)
        }
    };
    let figures = eventual_figures(&km, &cases, &edges, LEVEL);
    // Matured figures, with the label "positive within the horizon".
    let matured_label = |r: &LoggedPrediction| delay(r).is_some_and(|d| d <= horizon_ms);
    let mut sums = WindowSums::new(&edges);
    for r in &old {
        sums.matured(r.probability, r.adjusted_log_odds, matured_label(r));
    }
    for (r, c) in young.iter().zip(&cases) {
        sums.young(r.adjusted_log_odds, c.probability, c.positive);
    }
    assemble(
        (now_ms, horizon_ms, horizon_from),
        figures,
        cases.len(),
        &sums,
    )
}

/// What the immature window adds up besides the eventual figures, over the matured predictions (label: positive
/// within the horizon) and the window's (label: positive so far), in the order written: a streamed report adds the
/// same terms in the same order.
#[derive(Debug, Clone)]
pub struct WindowSums {
    inner: Vec<f64>,
    matured: usize,
    matured_positives: usize,
    matured_loss: f64,
    matured_squares: f64,
    mc: Vec<u64>,
    mp: Vec<u64>,
    msum: Vec<f64>,
    young_loss: f64,
    young_squares: f64,
}

impl WindowSums {
    /// Empty sums for calibration bins cut at `edges` (all of them).
    pub fn new(edges: &[f64]) -> WindowSums {
        let nb = edges.len().saturating_sub(1);
        WindowSums {
            inner: edges[1..edges.len().saturating_sub(1).max(1)].to_vec(),
            matured: 0,
            matured_positives: 0,
            matured_loss: 0.0,
            matured_squares: 0.0,
            mc: vec![0; nb],
            mp: vec![0; nb],
            msum: vec![0.0; nb],
            young_loss: 0.0,
            young_squares: 0.0,
        }
    }

    /// A matured prediction.
    pub fn matured(&mut self, p: f64, h: f64, y: bool) {
        self.matured += 1;
        self.matured_positives += usize::from(y);
        let s = if y { -1.0 } else { 1.0 };
        self.matured_loss += probity_models::link::softplus(s * h);
        self.matured_squares += (p - f64::from(u8::from(y))).powi(2);
        let b = probity_models::metrics::quantile::right_closed_bin(&self.inner, p);
        if b < self.mc.len() {
            self.mc[b] += 1;
            self.mp[b] += u64::from(y);
            self.msum[b] += p;
        }
    }

    /// A prediction of the window.
    pub fn young(&mut self, h: f64, p: f64, y: bool) {
        let s = if y { -1.0 } else { 1.0 };
        self.young_loss += probity_models::link::softplus(s * h);
        self.young_squares += (p - f64::from(u8::from(y))).powi(2);
    }
}

/// The window from its eventual figures over `cases` predictions and the sums beside them.
pub fn assemble(
    (now_ms, horizon_ms, horizon_from): (i64, i64, String),
    figures: Result<
        probity_models::monitor::EventualFigures,
        probity_models::monitor::MonitorError,
    >,
    cases: usize,
    sums: &WindowSums,
) -> ImmatureWindow {
    let unknown = |reason: String| ImmatureWindow::Unknown { reason };
    let figures = match figures {
        Ok(f) => f,
        Err(e) => return unknown(e.to_string()),
    };
    if figures.eventual_positives > cases as f64
        || figures.log_loss.estimate < 0.0
        || figures.brier.estimate < 0.0
    {
        return unknown(format!(
            "{} positives have arrived among {} predictions, while the delay reference expects only {:.1}% of the \
             eventual ones by now: the window's outcomes arrive faster than the matured predictions' did (outcomes \
             sent in a batch, or a changed delay), so one delay distribution does not fit both",
            figures.positives_so_far,
            cases,
            100.0 * figures.arrived_share
        ));
    }
    let mut notes = Vec::new();
    if figures.positives_so_far == 0 {
        notes.push(
            "log-loss and Brier intervals unknown: no positive has arrived in the window yet, so the spread of \
             the outcomes cannot be estimated"
                .to_string(),
        );
    } else if figures.positives_so_far < FEW_ARRIVED {
        notes.push(format!(
            "only {} positives have arrived in the window: the intervals are approximate (asymptotic)",
            figures.positives_so_far
        ));
    }
    let m = sums.matured as f64;
    let matured = Matured {
        predictions: sums.matured,
        positives: sums.matured_positives,
        positive_rate: sums.matured_positives as f64 / m,
        log_loss: sums.matured_loss / m,
        brier: sums.matured_squares / m,
    };
    let (mc, mp, msum) = (&sums.mc, &sums.mp, &sums.msum);
    let mut table = Vec::new();
    for b in &figures.bins {
        if b.rate.is_none() {
            notes.push(format!(
                "bin ({:.4}, {:.4}]: eventual rate unknown, its {} predictions are all younger than the first \
                 delay seen; the window's figures count it with the nearest bin",
                b.lower, b.upper, b.count
            ));
        }
        // The ratio can pass 1 in a small bin whose few positives came early; shown capped, and said.
        let eventual = b.rate.map(|r| {
            let mut e = Estimate::from(r);
            if e.estimate > 1.0 {
                notes.push(format!(
                    "bin ({:.4}, {:.4}]: the estimate {:.4} is above 1 (its {} positives came earlier than the \
                     delay reference expects) and is shown as 1",
                    b.lower, b.upper, e.estimate, b.positives_so_far
                ));
                e.estimate = 1.0;
            }
            e
        });
        let (c, k) = (mc[b.index], mp[b.index]);
        let wilson = wilson_interval(k, c, Z_95);
        table.push(WindowBin {
            lower: b.lower,
            upper: b.upper,
            count: b.count,
            positives_so_far: b.positives_so_far,
            mean_predicted: b.mean_predicted,
            arrived_share: b.arrived_share,
            eventual,
            matured_count: c as usize,
            matured_positives: k as usize,
            matured_mean_predicted: (c > 0).then(|| msum[b.index] / c as f64),
            matured_observed: (c > 0).then(|| k as f64 / c as f64),
            matured_lower: wilson.map(|w| w.0),
            matured_upper: wilson.map(|w| w.1),
        });
    }
    let n = cases as f64;
    let so_far = SoFar {
        positive_rate: figures.positives_so_far as f64 / n,
        log_loss: sums.young_loss / n,
        brier: sums.young_squares / n,
    };
    ImmatureWindow::Estimated(Box::new(Window {
        now_ms,
        horizon_ms,
        horizon_from,
        predictions: cases,
        positives_so_far: figures.positives_so_far,
        arrived_share: figures.arrived_share,
        level: figures.level,
        so_far,
        positive_rate: figures.positive_rate.into(),
        log_loss: figures.log_loss.into(),
        brier: figures.brier.into(),
        bins: table,
        matured,
        method: METHOD.to_string(),
        notes,
    }))
}

fn days(ms: i64) -> f64 {
    ms as f64 / 86_400_000.0
}

fn interval(e: &Estimate) -> String {
    match (e.lower, e.upper) {
        (Some(lo), Some(hi)) => format!("{:.4} ({lo:.4} to {hi:.4})", e.estimate),
        _ => format!("{:.4} (interval unknown)", e.estimate),
    }
}

/// The immature-window block of the text report.
pub fn render_window(s: &mut String, w: &ImmatureWindow) {
    let w = match w {
        ImmatureWindow::Unknown { reason } => {
            let _ = writeln!(s, "immature window: unknown ({reason})");
            return;
        }
        ImmatureWindow::Estimated(w) => w,
    };
    let _ = writeln!(
        s,
        "immature window: {} predictions younger than the {:.1}-day horizon ({}); {} positives so far, about {:.0}% of \
         their eventual positives expected by now. ESTIMATES of their eventual figures, {:.0}% intervals:",
        w.predictions,
        days(w.horizon_ms),
        w.horizon_from,
        w.positives_so_far,
        100.0 * w.arrived_share,
        100.0 * w.level
    );
    let _ = writeln!(
        s,
        "  {:<14} {:>10} {:>10}  estimated eventual",
        "", "matured", "so far"
    );
    for (name, matured, so_far, e) in [
        (
            "positive rate",
            w.matured.positive_rate,
            w.so_far.positive_rate,
            &w.positive_rate,
        ),
        (
            "log-loss",
            w.matured.log_loss,
            w.so_far.log_loss,
            &w.log_loss,
        ),
        ("Brier", w.matured.brier, w.so_far.brier, &w.brier),
    ] {
        let _ = writeln!(
            s,
            "  {name:<14} {matured:>10.4} {so_far:>10.4}  {}",
            interval(e)
        );
    }
    let _ = writeln!(
        s,
        "  (matured: {} predictions followed for the whole horizon, {} positives; so far: missing positives counted \
         as negatives, biased)",
        w.matured.predictions, w.matured.positives
    );
    let _ = writeln!(
        s,
        "  {:>13} {:>7} {:>7} {:>8} {:>9}  {:<30} {:>8} {:>9}",
        "bin",
        "count",
        "so far",
        "arrived",
        "predicted",
        "estimated eventual",
        "matured",
        "observed"
    );
    for b in &w.bins {
        let _ = writeln!(
            s,
            "  ({:.2}, {:.2}] {:>7} {:>7} {:>8.3} {:>9.4}  {:<30} {:>8} {:>9}",
            b.lower,
            b.upper,
            b.count,
            b.positives_so_far,
            b.arrived_share,
            b.mean_predicted,
            b.eventual
                .as_ref()
                .map_or_else(|| "unknown".to_string(), interval),
            b.matured_count,
            b.matured_observed
                .map_or_else(|| "-".to_string(), |o| format!("{o:.4}"))
        );
    }
    let _ = writeln!(s, "  method: {}", w.method);
    for n in &w.notes {
        let _ = writeln!(s, "  note: {n}");
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(time_ms: i64, label: Option<bool>, received: Option<i64>) -> LoggedPrediction {
        LoggedPrediction {
            prediction_id: format!("p{time_ms}"),
            route: "r".into(),
            model: "m".into(),
            version: "1".into(),
            role: "champion".into(),
            time_ms,
            adjusted_log_odds: 0.0,
            probability: 0.5,
            label,
            by_maturity: false,
            corrected: false,
            served_prior: None,
            served_decision: String::new(),
            outcome_received_ms: received,
        }
    }

    #[test]
    fn hand_computed_section() {
        // 40 predictions at 0, 10, ..., 390; now = 400 (the latest receipt). Positive at 0 received at 5 (delay 5),
        // positive at 20 received at 400 (delay 380), the rest without outcome. The horizon is the age of the 30th
        // oldest prediction: ages are 400, 390, ..., 10, so the 30th oldest is 110. At 5, all 40 are at risk and 1
        // event: S = 39/40; the delay 380 is beyond the horizon and not counted. G = 1/40.
        let mut rows: Vec<LoggedPrediction> = (0..40).map(|i| row(10 * i, None, None)).collect();
        rows[0] = row(0, Some(true), Some(5));
        rows[2] = row(20, Some(true), Some(400));
        let mut notes = Vec::new();
        let e = compute(&rows, &mut notes).unwrap();
        assert_eq!((e.now_ms, e.horizon_ms, e.positives_so_far), (400, 110, 1));
        assert!((e.estimate - 1.0 / 40.0).abs() < 1e-15, "{e:?}");
        assert!(e.lower <= e.estimate && e.estimate < e.upper);
        assert!(notes.is_empty());
        assert!(compute(&rows[..29], &mut notes).is_none());
        assert_eq!(notes.len(), 1);
    }
}
