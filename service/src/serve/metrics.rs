//! Monitoring: metric names, the recorder, and the HTTP endpoint with `/metrics` (Prometheus text exposition),
//! `/livez` and `/readyz`.
//!
//! Names follow the Prometheus conventions (prometheus.io, "Metric and label naming"): a `probity_` prefix, base
//! units (seconds), `_total` on counters, `_info` on a constant-1 gauge that carries labels. The recorder is
//! process-wide (the `metrics` facade has one global recorder), so several servers in one process, as in the
//! tests, share it.

use std::collections::{BTreeMap, HashMap};
use std::sync::{Arc, OnceLock};

use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use metrics_exporter_prometheus::{Matcher, PrometheusBuilder, PrometheusHandle};

use probity_models::Model;

use crate::serve::feature_metrics::FeatureCounters;
use crate::serve::registry::LoadedModel;

/// Calls by method, route and gRPC status code; for `ScoreStream`, one per streamed message.
pub const REQUESTS: &str = "probity_grpc_requests_total";
/// Call latency by method, route and code, in seconds.
pub const REQUEST_DURATION: &str = "probity_grpc_request_duration_seconds";
/// Rows scored by route, model and version.
pub const PREDICTIONS: &str = "probity_predictions_total";
/// Distribution of the returned probability by route, model and version.
pub const PROBABILITY: &str = "probity_prediction_probability";
/// Distribution of the adjusted log-odds by route, model and version.
pub const LOG_ODDS: &str = "probity_prediction_log_odds";
/// Warnings in responses, by route and kind.
pub const WARNINGS: &str = "probity_prediction_warnings_total";
/// Model versions loaded, by model and version.
pub const MODEL_LOADS: &str = "probity_model_loads_total";
/// Model files that failed to load, by file.
pub const MODEL_LOAD_FAILURES: &str = "probity_model_load_failures_total";
/// 1 for each model version serving, 0 for one that was replaced or removed.
pub const MODEL_INFO: &str = "probity_model_info";
/// 1 when the route's model is loaded, else 0.
pub const ROUTE_READY: &str = "probity_route_ready";
/// Constant 1 with the build's version.
pub const BUILD_INFO: &str = "probity_build_info";
/// Calls refused by the access check, by reason and method.
pub const AUTH_REFUSALS: &str = "probity_auth_refusals_total";
/// TLS connections that did not complete their handshake, by reason (`handshake`, `timeout`, `busy`).
pub const TLS_HANDSHAKE_FAILURES: &str = "probity_tls_handshake_failures_total";
/// Reloads of the TLS files and token files that changed something, by part and result (`loaded`, `failed`).
pub const SECURITY_RELOADS: &str = "probity_security_reloads_total";
/// Connections open on the gRPC port (each holds a slot of `limits.max_connections`).
pub const CONNECTIONS_OPEN: &str = "probity_connections_open";
/// Connections closed at once because `limits.max_connections` were open.
pub const CONNECTIONS_REFUSED: &str = "probity_connections_refused_total";
/// End of validity of the server certificate in use, seconds since the Unix epoch, labelled with its fingerprint.
pub const TLS_CERTIFICATE_EXPIRY: &str = "probity_tls_certificate_expiry_timestamp_seconds";

/// Latency buckets in seconds: scoring is expected well under a millisecond, batches and queueing above.
const LATENCY_BUCKETS: [f64; 14] = [
    0.000_05, 0.000_1, 0.000_25, 0.000_5, 0.001, 0.002_5, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5,
    1.0,
];
/// Probability buckets, finer near 0 where fraud and default rates live.
const PROBABILITY_BUCKETS: [f64; 14] = [
    0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.7, 0.9, 1.0,
];
/// Log-odds buckets, one per unit from -10 to 10.
const LOG_ODDS_BUCKETS: [f64; 21] = [
    -10.0, -9.0, -8.0, -7.0, -6.0, -5.0, -4.0, -3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0,
    7.0, 8.0, 9.0, 10.0,
];

/// Buckets of the absolute log-odds difference between a silent model and the answer (a histogram, so that
/// replicas add up; a summary's quantiles would not).
const DIFFERENCE_BUCKETS: [f64; 12] = [
    0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 5.0, 10.0,
];

static INSTALLED: OnceLock<Result<PrometheusHandle, String>> = OnceLock::new();

/// How often pending histogram samples are folded into their buckets.
const UPKEEP_EVERY: std::time::Duration = std::time::Duration::from_secs(5);

/// Installs the process-wide recorder once and returns its handle. `OnceLock::get_or_init` blocks concurrent
/// callers until the first one has finished, so a server started on another thread (tests start several) never
/// sees the recorder in place without its handle.
pub fn install() -> Result<PrometheusHandle, String> {
    INSTALLED.get_or_init(install_once).clone()
}

fn install_once() -> Result<PrometheusHandle, String> {
    let builder = PrometheusBuilder::new()
        .set_buckets_for_metric(Matcher::Full(REQUEST_DURATION.into()), &LATENCY_BUCKETS)
        .and_then(|b| {
            b.set_buckets_for_metric(Matcher::Full(PROBABILITY.into()), &PROBABILITY_BUCKETS)
        })
        .and_then(|b| b.set_buckets_for_metric(Matcher::Full(LOG_ODDS.into()), &LOG_ODDS_BUCKETS))
        .and_then(|b| {
            b.set_buckets_for_metric(
                Matcher::Full(crate::serve::silent::SILENT_LOG_ODDS_DIFFERENCE.into()),
                &DIFFERENCE_BUCKETS,
            )
        })
        .and_then(crate::store::running::buckets)
        .map_err(|e| e.to_string())?;
    let recorder = builder.build_recorder();
    let handle = recorder.handle();
    metrics::set_global_recorder(recorder)
        .map_err(|_| "another metrics recorder is installed".to_string())?;
    // A recorder built this way keeps every histogram sample until someone drains it: a scrape, or upkeep. Without
    // a scraper the samples would pile up (a 5-minute soak at 2,000 calls/s grew by 43 MB), so upkeep runs here,
    // for the life of the process, whatever scrapes.
    let upkeep = handle.clone();
    std::thread::Builder::new()
        .name("metrics-upkeep".into())
        .spawn(move || loop {
            std::thread::sleep(UPKEEP_EVERY);
            upkeep.run_upkeep();
        })
        .map_err(|e| format!("cannot start the metrics upkeep thread: {e}"))?;
    describe();
    metrics::gauge!(BUILD_INFO, "version" => env!("CARGO_PKG_VERSION")).set(1.0);
    Ok(handle)
}

fn describe() {
    crate::serve::silent::describe();
    crate::serve::compare_metrics::describe();
    crate::serve::calibration_metrics::describe();
    crate::serve::feature_metrics::describe();
    metrics::describe_counter!(
        REQUESTS,
        "gRPC calls by method, route and status code (ScoreStream: per message)."
    );
    metrics::describe_histogram!(
        REQUEST_DURATION,
        metrics::Unit::Seconds,
        "gRPC call latency."
    );
    metrics::describe_counter!(PREDICTIONS, "Rows scored.");
    metrics::describe_histogram!(PROBABILITY, "Returned probability of the positive class.");
    metrics::describe_histogram!(
        LOG_ODDS,
        "Adjusted (calibrated, base-rate-corrected) log-odds."
    );
    metrics::describe_counter!(WARNINGS, "Warnings returned with scored rows.");
    metrics::describe_counter!(
        MODEL_LOADS,
        "Model versions loaded from the model directory."
    );
    metrics::describe_counter!(MODEL_LOAD_FAILURES, "Model files that failed to load.");
    metrics::describe_gauge!(
        MODEL_INFO,
        "1 for each model version serving, 0 once replaced."
    );
    metrics::describe_gauge!(ROUTE_READY, "1 when the route's model is loaded.");
    metrics::describe_gauge!(BUILD_INFO, "Constant 1, labelled with the build version.");
    metrics::describe_counter!(
        AUTH_REFUSALS,
        "gRPC calls refused by the access check, by reason and method."
    );
    metrics::describe_counter!(
        TLS_HANDSHAKE_FAILURES,
        "TLS connections closed before their handshake completed, by reason."
    );
    metrics::describe_counter!(
        SECURITY_RELOADS,
        "Reloads of TLS or token files that changed something, by part and result."
    );
    metrics::describe_gauge!(
        CONNECTIONS_OPEN,
        "Connections open on the gRPC port (at most limits.max_connections)."
    );
    metrics::describe_counter!(
        CONNECTIONS_REFUSED,
        "Connections closed at once because limits.max_connections were open."
    );
    metrics::describe_gauge!(
        TLS_CERTIFICATE_EXPIRY,
        metrics::Unit::Seconds,
        "End of validity of the server certificate in use (Unix time); 0 for a replaced one."
    );
}

/// Records a refused call (`method` is a path from the access table or `unknown`, never the caller's text).
pub fn auth_refused(reason: &'static str, method: &'static str) {
    metrics::counter!(AUTH_REFUSALS, "reason" => reason, "method" => method).increment(1);
}

/// Shows the connection series at zero before the first connection.
pub fn connections_start() {
    metrics::gauge!(CONNECTIONS_OPEN).set(0.0);
    metrics::counter!(CONNECTIONS_REFUSED).increment(0);
}

/// Records a connection taking a slot of `limits.max_connections`.
pub fn connection_opened() {
    metrics::gauge!(CONNECTIONS_OPEN).increment(1.0);
}

/// Records a connection giving its slot back.
pub fn connection_closed() {
    metrics::gauge!(CONNECTIONS_OPEN).decrement(1.0);
}

/// Records a connection closed because every slot was taken.
pub fn connection_refused() {
    metrics::counter!(CONNECTIONS_REFUSED).increment(1);
}

/// Records a TLS handshake that did not complete.
pub fn tls_handshake_failed(reason: &'static str) {
    metrics::counter!(TLS_HANDSHAKE_FAILURES, "reason" => reason).increment(1);
}

/// Records a reload of the TLS files or token files that changed something.
pub fn security_reload(what: &'static str, result: &'static str) {
    metrics::counter!(SECURITY_RELOADS, "what" => what, "result" => result).increment(1);
}

static CERTIFICATE_IN_USE: std::sync::Mutex<Option<String>> = std::sync::Mutex::new(None);

/// Sets the expiry gauge to the certificate now in use and zeroes the one it replaced.
pub fn tls_certificate(fingerprint: &str, not_after: i64) {
    let mut in_use = CERTIFICATE_IN_USE
        .lock()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    if let Some(old) = in_use.replace(fingerprint.to_string()) {
        if old != fingerprint {
            metrics::gauge!(TLS_CERTIFICATE_EXPIRY, "fingerprint_sha256" => old).set(0.0);
        }
    }
    metrics::gauge!(TLS_CERTIFICATE_EXPIRY, "fingerprint_sha256" => fingerprint.to_string())
        .set(not_after as f64);
}

/// Records one finished call.
pub fn request(method: &'static str, route: &str, code: tonic::Code, seconds: f64) {
    let code = code_name(code);
    metrics::counter!(REQUESTS, "method" => method, "route" => route.to_string(), "code" => code)
        .increment(1);
    metrics::histogram!(REQUEST_DURATION, "method" => method, "route" => route.to_string(), "code" => code)
        .record(seconds);
}

/// The metric handles of one (route, model, version), registered once.
pub struct PredictionSeries {
    route: String,
    model: String,
    version: String,
    count: metrics::Counter,
    probability: metrics::Histogram,
    log_odds: metrics::Histogram,
    /// The per-feature stability counters, when the model file carries training distributions.
    features: Option<FeatureCounters>,
}

/// Handles by a hash of (route, model, version), so that recording a row needs no label strings and no registry
/// lookup. Bounded by the configured routes times the model versions loaded since start.
static PREDICTION_SERIES: std::sync::LazyLock<
    std::sync::RwLock<HashMap<u64, Arc<PredictionSeries>>>,
> = std::sync::LazyLock::new(Default::default);

fn series_key(route: &str, model: &str, version: &str) -> u64 {
    use std::hash::BuildHasher;
    foldhash::fast::FixedState::with_seed(0).hash_one((route, model, version))
}

/// The handles of (route, model version), registered on first use; `None` on a hash collision between two
/// series (never seen), where the caller records without the cache.
pub fn prediction_series(route: &str, model: &Model) -> Option<Arc<PredictionSeries>> {
    let (name, version) = (model.name(), model.version());
    let key = series_key(route, name, version);
    let same = |s: &PredictionSeries| s.route == route && s.model == name && s.version == version;
    {
        let cache = PREDICTION_SERIES
            .read()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        if let Some(s) = cache.get(&key) {
            return same(s).then(|| Arc::clone(s));
        }
    }
    let labels = [
        ("route", route.to_string()),
        ("model", name.to_string()),
        ("version", version.to_string()),
    ];
    let mut cache = PREDICTION_SERIES
        .write()
        .unwrap_or_else(std::sync::PoisonError::into_inner);
    let series = cache.entry(key).or_insert_with(|| {
        Arc::new(PredictionSeries {
            route: route.to_string(),
            model: name.to_string(),
            version: version.to_string(),
            count: metrics::counter!(PREDICTIONS, &labels),
            probability: metrics::histogram!(PROBABILITY, &labels),
            log_odds: metrics::histogram!(LOG_ODDS, &labels),
            features: FeatureCounters::new(route, model),
        })
    });
    same(series).then(|| Arc::clone(series))
}

/// Records one scored row. With `slots`, also returns the slot of each monitored feature's value, for the
/// prediction store's hourly counts (`store::features`); `None` when the model has no training distribution.
pub fn prediction(
    route: &str,
    model: &Model,
    probability: f64,
    log_odds: f64,
    values: &[f64],
    slots: bool,
) -> Option<crate::store::features::RowFeatures> {
    if let Some(s) = prediction_series(route, model) {
        s.count.increment(1);
        s.probability.record(probability);
        s.log_odds.record(log_odds);
        // The row's feature values, into the slots of their training distributions (same series lookup).
        return s.features.as_ref().and_then(|f| f.count(values, slots));
    }
    let labels = [
        ("route", route.to_string()),
        ("model", model.name().to_string()),
        ("version", model.version().to_string()),
    ];
    metrics::counter!(PREDICTIONS, &labels).increment(1);
    metrics::histogram!(PROBABILITY, &labels).record(probability);
    metrics::histogram!(LOG_ODDS, &labels).record(log_odds);
    None
}

/// Records one warning returned with a row.
pub fn warning(route: &str, kind: &'static str) {
    metrics::counter!(WARNINGS, "route" => route.to_string(), "kind" => kind).increment(1);
}

/// Records a model version loaded.
pub fn model_loaded(model: &str, version: &str) {
    metrics::counter!(MODEL_LOADS, "model" => model.to_string(), "version" => version.to_string())
        .increment(1);
}

/// Records a model file that failed to load.
pub fn model_load_failed(file: &str) {
    metrics::counter!(MODEL_LOAD_FAILURES, "file" => file.to_string()).increment(1);
}

/// Updates the serving-model gauges after a snapshot swap.
pub fn models_published(
    old: &BTreeMap<crate::serve::registry::ModelKey, Arc<LoadedModel>>,
    new: &BTreeMap<crate::serve::registry::ModelKey, Arc<LoadedModel>>,
) {
    let info = |m: &LoadedModel, v: f64| {
        metrics::gauge!(MODEL_INFO, "model" => m.model.name().to_string(),
            "version" => m.model.version().to_string(), "file" => m.file.clone())
        .set(v);
    };
    for m in old.values() {
        info(m, 0.0);
    }
    for m in new.values() {
        info(m, 1.0);
    }
}

/// Sets a route's readiness gauge.
pub fn route_ready(route: &str, ready: bool) {
    metrics::gauge!(ROUTE_READY, "route" => route.to_string()).set(if ready { 1.0 } else { 0.0 });
}

/// The canonical upper-case name of a gRPC code, as in the gRPC status code documentation.
pub fn code_name(code: tonic::Code) -> &'static str {
    match code {
        tonic::Code::Ok => "OK",
        tonic::Code::Cancelled => "CANCELLED",
        tonic::Code::Unknown => "UNKNOWN",
        tonic::Code::InvalidArgument => "INVALID_ARGUMENT",
        tonic::Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        tonic::Code::NotFound => "NOT_FOUND",
        tonic::Code::AlreadyExists => "ALREADY_EXISTS",
        tonic::Code::PermissionDenied => "PERMISSION_DENIED",
        tonic::Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        tonic::Code::FailedPrecondition => "FAILED_PRECONDITION",
        tonic::Code::Aborted => "ABORTED",
        tonic::Code::OutOfRange => "OUT_OF_RANGE",
        tonic::Code::Unimplemented => "UNIMPLEMENTED",
        tonic::Code::Internal => "INTERNAL",
        tonic::Code::Unavailable => "UNAVAILABLE",
        tonic::Code::DataLoss => "DATA_LOSS",
        tonic::Code::Unauthenticated => "UNAUTHENTICATED",
    }
}

/// Readiness as the HTTP endpoint reports it: the routes that are not ready (empty when all are).
pub type ReadinessFn = Arc<dyn Fn() -> Vec<String> + Send + Sync>;

/// The monitoring HTTP app: `/metrics`, `/livez`, `/readyz`.
pub fn http_app(handle: PrometheusHandle, not_ready: ReadinessFn) -> axum::Router {
    axum::Router::new()
        .route(
            "/metrics",
            get(move || {
                let handle = handle.clone();
                async move {
                    handle.run_upkeep();
                    (
                        [(
                            header::CONTENT_TYPE,
                            "text/plain; version=0.0.4; charset=utf-8",
                        )],
                        handle.render(),
                    )
                }
            }),
        )
        .route("/livez", get(|| async { "ok\n" }))
        .route(
            "/readyz",
            get(move || {
                let not_ready = not_ready();
                async move {
                    if not_ready.is_empty() {
                        (StatusCode::OK, "ready\n".to_string()).into_response()
                    } else {
                        let body = format!("not ready: {}\n", not_ready.join(", "));
                        (StatusCode::SERVICE_UNAVAILABLE, body).into_response()
                    }
                }
            }),
        )
}
