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

use std::fmt::Write;

use probity_models::monitor::{kaplan_meier, DelayObservation};
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
    let result = kaplan_meier(&observations, horizon_ms as f64).and_then(|km| {
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
