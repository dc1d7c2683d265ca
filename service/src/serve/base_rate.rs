//! Applying the live base-rate estimate to a route that opts in (`routes.<name>.base_rate_from_estimate`).
//!
//! The prediction-log writer keeps, per route and model, the latest Saerens, Latinne and Decaestecker (2002) EM
//! estimate over its window of recent champion and challenger predictions ([`crate::store::running`]). For a route
//! with the option on, a background task checks the estimate of the route's champion model every second: once the
//! window holds at least `min_predictions`, the route's effective target base rate becomes the estimate clamped to
//! `[min, max]`, swapped into the route table atomically (a request sees the route before or after, never a mix).
//! The effective value is exported as [`EFFECTIVE_TARGET`] and logged when it changes. Until the window is full
//! enough the configured `target_base_rate` (or the model's own base rate, when none is set) stays in force.
//!
//! Off by default; a route without the option is never touched, so its served probabilities never depend on the
//! estimate.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Duration;

use serde::Deserialize;

use crate::serve::promotion::RouteTable;
use crate::store::PredictionStore;

/// The target base rate in force on a route: the configured `target_base_rate` from the start, then the applied
/// estimate on a route that opts in.
pub const EFFECTIVE_TARGET: &str = "probity_effective_target_base_rate";
/// How often the task looks at the estimates.
const EVERY: Duration = Duration::from_secs(1);

/// `routes.<name>.base_rate_from_estimate` as written.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawEstimateBounds {
    min: Option<f64>,
    max: Option<f64>,
    min_predictions: Option<u64>,
}

/// Validated bounds of an applied estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EstimateBounds {
    /// Lowest effective target base rate.
    pub min: f64,
    /// Highest effective target base rate.
    pub max: f64,
    /// Predictions the window must hold before the estimate is applied.
    pub min_predictions: usize,
}

impl EstimateBounds {
    /// The effective target for `estimate` over a window of `count` predictions, or `None` while the window holds
    /// too few or the estimate is not a number.
    pub fn effective(&self, estimate: f64, count: usize) -> Option<f64> {
        (count >= self.min_predictions && !estimate.is_nan())
            .then(|| estimate.clamp(self.min, self.max))
    }
}

/// Validates the bounds of route `route`; `prior_window` is `store.prior_window` (`None` when the log is off). The
/// error is `(key, message)`.
pub fn bounds(
    route: &str,
    raw: RawEstimateBounds,
    prior_window: Option<usize>,
) -> Result<EstimateBounds, (String, String)> {
    let key = |k: &str| {
        if k.is_empty() {
            format!("routes.{route}.base_rate_from_estimate")
        } else {
            format!("routes.{route}.base_rate_from_estimate.{k}")
        }
    };
    let rate = |name: &str, v: Option<f64>| match v {
        None => Err((key(name), "is required (a base rate in (0, 1))".to_string())),
        Some(v) if v > 0.0 && v < 1.0 => Ok(v),
        Some(v) => Err((key(name), format!("must be in (0, 1), got {v}"))),
    };
    let min = rate("min", raw.min)?;
    let max = rate("max", raw.max)?;
    if min > max {
        return Err((
            key("max"),
            format!("must be at least min ({min}), got {max}"),
        ));
    }
    let Some(window) = prior_window else {
        return Err((
            key(""),
            "needs the prediction store (store.directory), whose window the estimate is computed over"
                .to_string(),
        ));
    };
    let min_predictions = raw.min_predictions.unwrap_or(window as u64);
    if min_predictions == 0 || min_predictions > window as u64 {
        return Err((
            key("min_predictions"),
            format!("must be in [1, store.prior_window = {window}], got {min_predictions}"),
        ));
    }
    Ok(EstimateBounds {
        min,
        max,
        min_predictions: min_predictions as usize,
    })
}

/// One pass: sets the effective target of every opted-in route whose champion's window is full enough. `latest`
/// maps (route, model, version) to (estimate, predictions in the window); a champion named without a version reads
/// the version `""` (the model's latest estimate, [`crate::store::running::LatestEstimates`]). Returns the routes changed, with their new target.
pub fn apply_once(
    table: &RouteTable,
    opted_in: &BTreeMap<String, EstimateBounds>,
    latest: &BTreeMap<(String, String, String), (f64, usize)>,
) -> Vec<(String, f64)> {
    let mut changed = Vec::new();
    let routes = table.load();
    for (name, b) in opted_in {
        let Some(route) = routes.get(name) else {
            continue;
        };
        let Some(&(estimate, count)) = latest.get(&(
            name.clone(),
            route.model.name.clone(),
            route.model.version.clone().unwrap_or_default(),
        )) else {
            continue;
        };
        let Some(target) = b.effective(estimate, count) else {
            continue;
        };
        if route.output.target_base_rate == Some(target) {
            continue;
        }
        if table.set_target_base_rate(name, target) {
            metrics::gauge!(EFFECTIVE_TARGET, "route" => name.clone()).set(target);
            tracing::info!(route = %name, model = %route.model, estimate, window = count,
                previous = ?route.output.target_base_rate, target, "effective target base rate changed");
            changed.push((name.clone(), target));
        }
    }
    changed
}

/// Runs [`apply_once`] every second for the opted-in routes (nothing to do when none opted in).
pub fn task(
    table: Arc<RouteTable>,
    log: Arc<PredictionStore>,
    opted_in: BTreeMap<String, EstimateBounds>,
) -> tokio::task::JoinHandle<()> {
    metrics::describe_gauge!(
        EFFECTIVE_TARGET,
        "Target base rate in force on a route (configured, or the applied estimate)."
    );
    let routes = table.load();
    for name in opted_in.keys() {
        if let Some(r) = routes.get(name) {
            if let Some(t) = r.output.target_base_rate {
                metrics::gauge!(EFFECTIVE_TARGET, "route" => name.clone()).set(t);
            }
        }
    }
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(EVERY);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tick.tick().await;
            apply_once(&table, &opted_in, &log.base_rate_estimates());
        }
    })
}

#[cfg(test)]
mod tests;

/// Sets [`EFFECTIVE_TARGET`] for every route with a configured `target_base_rate`, at start, so that a monitoring
/// system can set the live estimate (`probity_base_rate_estimate`) against it; routes that apply the estimate move
/// it on from there ([`task`]). A route without a configured target has no series.
pub fn publish_configured(routes: &BTreeMap<String, crate::serve::config::Route>) {
    metrics::describe_gauge!(
        EFFECTIVE_TARGET,
        "Target base rate in force on a route (configured, or the applied estimate)."
    );
    for (name, route) in routes {
        if let Some(t) = route.output.target_base_rate {
            metrics::gauge!(EFFECTIVE_TARGET, "route" => name.clone()).set(t);
        }
    }
}
