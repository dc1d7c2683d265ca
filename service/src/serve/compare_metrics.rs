//! The champion-challenger comparison exported as gauges: every `store.sweep_interval`, each route with challengers is
//! compared with each of its challengers from the prediction store ([`crate::compare`]) and the gauges below are set,
//! labelled by route, champion and challenger. Each refresh reads the route's logged predictions (bounded by
//! `store.retention`), on the blocking pool.

use std::sync::Arc;
use std::time::Duration;

use tokio::task::JoinHandle;

use crate::compare::{self, CompareReport, CompareRequest};
use crate::serve::config::Route;
use crate::serve::scoring::Scorer;
use crate::store::ReportFilter;

/// Prefix of the comparison gauges, e.g. `probity_compare_spearman`.
pub const PREFIX: &str = "probity_compare_";

/// Every verdict code, so that the `probity_compare_verdict` gauge is 1 for the current one and 0 for the others.
const VERDICTS: [&str; 7] = [
    "not_enough_outcomes",
    "challenger_better",
    "champion_better",
    "mixed",
    "challenger_ranks_better",
    "champion_ranks_better",
    "no_clear_difference",
];

/// The probability threshold of a route's decision: the fixed one, or the Bayes-optimal `c_fp / (c_fp + c_fn)` of its
/// costs (Elkan 2001); none for bands or no rule.
pub fn route_threshold(route: &Route) -> Option<f64> {
    match &route.output.decision {
        Some(probity_models::DecisionRule::Threshold { threshold }) => Some(*threshold),
        Some(probity_models::DecisionRule::Costs {
            false_positive,
            false_negative,
        }) => Some(false_positive / (false_positive + false_negative)),
        _ => None,
    }
}

/// The HELP text of the comparison gauges (route, champion, challenger labels).
pub fn describe() {
    for (name, help) in [
        (
            "paired_predictions",
            "Requests scored by both champion and challenger.",
        ),
        ("paired_outcomes", "Paired requests whose outcome is known."),
        (
            "spearman",
            "Spearman rank correlation of the two models' scores.",
        ),
        (
            "psi",
            "PSI of the challenger's scores against the champion's (champion quantile bins).",
        ),
        (
            "mean_abs_log_odds_difference",
            "Mean absolute difference of the two models' adjusted log-odds.",
        ),
        (
            "decision_flip_share",
            "Share of paired requests whose decision differs.",
        ),
        (
            "log_loss_difference",
            "Mean paired log-loss difference, challenger minus champion.",
        ),
        (
            "log_loss_p_value",
            "Fixed-sample p-value of the paired log-loss test.",
        ),
        (
            "auc_difference",
            "AUC difference, challenger minus champion (DeLong).",
        ),
        (
            "auc_p_value",
            "Fixed-sample DeLong p-value of the AUC difference.",
        ),
        (
            "log_loss_always_valid_p_value",
            "Always-valid p-value of the paired log-loss difference (may be read at any time).",
        ),
        (
            "log_loss_difference_lower",
            "Lower end of the confidence sequence of the log-loss difference.",
        ),
        (
            "log_loss_difference_upper",
            "Upper end of the confidence sequence of the log-loss difference.",
        ),
        (
            "auc_always_valid_p_value",
            "Always-valid p-value of the AUC difference (may be read at any time).",
        ),
        (
            "auc_difference_lower",
            "Lower end of the confidence sequence of the AUC difference.",
        ),
        (
            "auc_difference_upper",
            "Upper end of the confidence sequence of the AUC difference.",
        ),
        (
            "verdict",
            "1 for the comparison's current verdict code, 0 for the others.",
        ),
    ] {
        metrics::describe_gauge!(format!("{PREFIX}{name}"), help);
    }
}

fn set(report: &CompareReport) {
    let labels = [
        ("route", report.route.clone()),
        ("champion", report.champion.clone()),
        ("challenger", report.challenger.clone()),
    ];
    let gauge = |name: &str, value: Option<f64>| {
        if let Some(v) = value {
            metrics::gauge!(format!("{PREFIX}{name}"), &labels).set(v);
        }
    };
    gauge("paired_predictions", Some(report.paired as f64));
    gauge("paired_outcomes", Some(report.paired_with_outcome as f64));
    if let Some(g) = &report.agreement {
        gauge("spearman", g["spearman"].as_f64());
        gauge("psi", g["psi"].as_f64());
        gauge(
            "mean_abs_log_odds_difference",
            g["mean_absolute_log_odds_difference"].as_f64(),
        );
        gauge("decision_flip_share", g["decision_flips"]["share"].as_f64());
    }
    let o = &report.outcomes;
    gauge(
        "log_loss_difference",
        o["log_loss_test"]["mean_difference"].as_f64(),
    );
    gauge("log_loss_p_value", o["log_loss_test"]["p_value"].as_f64());
    gauge("auc_difference", o["delong"]["difference"].as_f64());
    gauge("auc_p_value", o["delong"]["p_value"].as_f64());
    // The always-valid figures the verdict rests on (may be read at every refresh).
    let a = &report.always_valid;
    for (name, seq) in [("log_loss", &a.log_loss), ("auc", &a.auc)] {
        if let Some(q) = seq {
            gauge(&format!("{name}_always_valid_p_value"), q.p_value);
            gauge(&format!("{name}_difference_lower"), Some(q.lower));
            gauge(&format!("{name}_difference_upper"), Some(q.upper));
        }
    }
    for code in VERDICTS {
        let mut l = labels.to_vec();
        l.push(("verdict", code.to_string()));
        metrics::gauge!(format!("{PREFIX}verdict"), &l)
            .set(f64::from(u8::from(code == report.verdict_code)));
    }
}

/// One refresh of every route's comparison gauges.
pub fn refresh(scorer: &Scorer) {
    let Some(log) = scorer.store() else {
        return;
    };
    for route in scorer.routes().values() {
        for challenger in &route.challengers.list {
            let request = CompareRequest {
                filter: ReportFilter {
                    route: Some(route.name.clone()),
                    ..ReportFilter::default()
                },
                champion: Some(route.model.clone()),
                challenger: Some(challenger.model.clone()),
                threshold: route_threshold(route),
                newey_west_lag: None,
            };
            match log.read_blocking(move |s| Ok(compare::build(s, &request))) {
                Ok(Ok(report)) => set(&report),
                // No prediction of one side yet: nothing to export.
                Ok(Err(compare::CompareReportError::Models(_))) => {}
                Ok(Err(error)) => {
                    tracing::warn!(route = %route.name, challenger = %challenger.model, %error, "comparison not refreshed")
                }
                Err(error) => {
                    tracing::warn!(route = %route.name, %error, "comparison not refreshed")
                }
            }
        }
    }
}

/// Refreshes the gauges every `every` until aborted.
pub fn task(scorer: Arc<Scorer>, every: Duration) -> JoinHandle<()> {
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(every.max(Duration::from_millis(10)));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tick.tick().await;
            let s = Arc::clone(&scorer);
            if tokio::task::spawn_blocking(move || refresh(&s))
                .await
                .is_err()
            {
                tracing::error!("comparison refresh failed");
            }
        }
    })
}
