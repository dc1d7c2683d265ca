//! Calibration tests exported as gauges, for alert rules: every `log.sweep_interval`, each route's logged
//! predictions with an outcome are grouped by model, version and role, and Spiegelhalter's z (1986) and the
//! logistic recalibration (Cox 1958) of [`crate::report::calibration_tests`] are set as gauges labelled `route`,
//! `model`, `version`, `role`. Reads run on the log's thread, like the comparison gauges.
//!
//! An alert rule can use, for instance, `probity_calibration_slope_upper < 1` (scores too extreme, at 95%) or
//! `probity_calibration_spiegelhalter_p_value < 0.01`.

use std::sync::Arc;
use std::time::Duration;

use tokio::task::JoinHandle;

use crate::report::calibration_tests::{self, CalibrationTests};
use crate::serve::scoring::Scorer;
use crate::store::ReportFilter;

/// Prefix of the gauges, e.g. `probity_calibration_slope`.
pub const PREFIX: &str = "probity_calibration_";

/// One series' figures.
struct Series {
    labels: [(&'static str, String); 4],
    outcomes: usize,
    tests: CalibrationTests,
}

fn set(s: &Series) {
    let gauge = |name: &str, value: Option<f64>| {
        if let Some(v) = value {
            metrics::gauge!(format!("{PREFIX}{name}"), &s.labels).set(v);
        }
    };
    gauge("outcomes", Some(s.outcomes as f64));
    let z = s.tests.spiegelhalter.as_ref();
    gauge("spiegelhalter_z", z.map(|z| z.z));
    gauge("spiegelhalter_p_value", z.map(|z| z.p_value));
    let r = s.tests.recalibration.as_ref();
    gauge("slope", r.map(|r| r.slope.estimate));
    gauge("slope_lower", r.map(|r| r.slope.lower));
    gauge("slope_upper", r.map(|r| r.slope.upper));
    gauge("in_the_large", r.map(|r| r.in_the_large.estimate));
    gauge("in_the_large_lower", r.map(|r| r.in_the_large.lower));
    gauge("in_the_large_upper", r.map(|r| r.in_the_large.upper));
    gauge("recalibration_p_value", r.map(|r| r.joint_p_value));
}

/// One refresh of every route's calibration gauges.
pub fn refresh(scorer: &Scorer) {
    let Some(log) = scorer.log() else {
        return;
    };
    for route in scorer.routes().keys() {
        let filter = ReportFilter {
            route: Some(route.clone()),
            ..ReportFilter::default()
        };
        let result = log.read_blocking(move |store| {
            let rows = store.load(&filter)?;
            let mut groups: Vec<Series> = Vec::new();
            // (labels, p, h, y) per series, found by a scan (a handful of series per route).
            let mut data: Vec<(Vec<f64>, Vec<f64>, Vec<bool>)> = Vec::new();
            for r in rows.iter().filter(|r| r.label.is_some()) {
                let i = match groups.iter().position(|g| {
                    g.labels[1].1 == r.model
                        && g.labels[2].1 == r.version
                        && g.labels[3].1 == r.role
                }) {
                    Some(i) => i,
                    None => {
                        groups.push(Series {
                            labels: [
                                ("route", r.route.clone()),
                                ("model", r.model.clone()),
                                ("version", r.version.clone()),
                                ("role", r.role.clone()),
                            ],
                            outcomes: 0,
                            tests: CalibrationTests::default(),
                        });
                        data.push((Vec::new(), Vec::new(), Vec::new()));
                        groups.len() - 1
                    }
                };
                data[i].0.push(r.probability);
                data[i].1.push(r.adjusted_log_odds);
                data[i].2.push(r.label == Some(true));
            }
            for (g, (p, h, y)) in groups.iter_mut().zip(&data) {
                g.outcomes = y.len();
                g.tests = calibration_tests::compute(p, h, y, &mut Vec::new());
            }
            Ok(groups)
        });
        match result {
            Ok(groups) => groups.iter().for_each(set),
            Err(error) => {
                tracing::warn!(route = %route, %error, "calibration gauges not refreshed")
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
                tracing::error!("calibration gauge refresh failed");
            }
        }
    })
}
