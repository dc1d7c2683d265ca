//! Calibration tests exported as gauges, for alert rules: every `store.sweep_interval`, each route's logged
//! matched pairs (read in a lean form, [`crate::store::Store::labelled_pairs`]) are grouped by model, version and role, and Spiegelhalter's z (1986) and the
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

/// Prefix of the gauges, e.g. `probity_calibration_slope`.
pub const PREFIX: &str = "probity_calibration_";

/// One series' figures.
struct Series {
    labels: [(&'static str, String); 4],
    outcomes: usize,
    tests: CalibrationTests,
}

/// The HELP text of the calibration gauges (route, model, version, role labels).
pub fn describe() {
    for (name, help) in [
        (
            "outcomes",
            "Matched outcomes the calibration tests are computed on.",
        ),
        (
            "spiegelhalter_z",
            "Spiegelhalter's (1986) calibration z statistic.",
        ),
        (
            "spiegelhalter_p_value",
            "Two-sided p-value of Spiegelhalter's z.",
        ),
        (
            "slope",
            "Calibration slope by logistic recalibration (1 when calibrated).",
        ),
        (
            "slope_lower",
            "Lower end of the 95% interval of the calibration slope.",
        ),
        (
            "slope_upper",
            "Upper end of the 95% interval of the calibration slope.",
        ),
        (
            "in_the_large",
            "Calibration-in-the-large (0 when calibrated).",
        ),
        (
            "in_the_large_lower",
            "Lower end of the 95% interval of calibration-in-the-large.",
        ),
        (
            "in_the_large_upper",
            "Upper end of the 95% interval of calibration-in-the-large.",
        ),
        (
            "recalibration_p_value",
            "p-value of Cox's joint test of intercept 0 and slope 1.",
        ),
    ] {
        metrics::describe_gauge!(format!("{PREFIX}{name}"), help);
    }
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
    let Some(log) = scorer.store() else {
        return;
    };
    for route in scorer.routes().keys() {
        let name = route.clone();
        let result = log.read_blocking(move |store| {
            let pairs = store.labelled_pairs(&name)?;
            let mut data = vec![(Vec::new(), Vec::new(), Vec::new()); pairs.series.len()];
            for &(i, p, h, y) in &pairs.rows {
                data[i].0.push(p);
                data[i].1.push(h);
                data[i].2.push(y);
            }
            Ok(pairs
                .series
                .into_iter()
                .zip(&data)
                .map(|((model, version, role), (p, h, y))| Series {
                    labels: [
                        ("route", name.clone()),
                        ("model", model),
                        ("version", version),
                        ("role", role),
                    ],
                    outcomes: y.len(),
                    tests: calibration_tests::compute(p, h, y, &mut Vec::new()),
                })
                .collect::<Vec<_>>())
        });
        match result {
            Ok(groups) => groups.iter().for_each(set),
            // The log is closing (the server is stopping): nothing to refresh.
            Err(crate::store::StoreError::Closed) => return,
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
