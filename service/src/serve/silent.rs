//! Silent scoring of requests by the models that did not answer them (silent challengers, and the other side of a
//! live challenger with `paired`), kept off the response's critical path.
//!
//! The request path only clones the rows and offers them to a bounded queue with `try_send`; a full queue drops the
//! job and counts it (`probity_silent_dropped_total`) rather than slow the answer down. One worker thread takes the
//! jobs, scores each row with the current version of each silent model under the route's policies, queues the
//! predictions to the prediction store under the answer's prediction id with their role, and updates the live
//! agreement metrics. The full comparison (rank correlation, PSI, tests once outcomes arrive) is computed from the
//! log by `probity compare` ([`crate::compare`]).

use std::sync::mpsc::{sync_channel, Receiver, SyncSender, TrySendError};
use std::sync::Arc;

use crate::serve::challenger::Answer;
use crate::serve::config::{Route, UnknownFeaturePolicy};
use crate::serve::conversions::prepare_row;
use crate::serve::promotion::RouteTable;
use crate::serve::proto as pb;
use crate::serve::registry::Registry;
use crate::store::PredictionStore;

/// Rows scored silently, by route, model and role.
pub const SILENT_PREDICTIONS: &str = "probity_silent_predictions_total";
/// Silent scoring jobs dropped because the queue was full, by route.
pub const SILENT_DROPPED: &str = "probity_silent_dropped_total";
/// Rows a silent model could not score, by route, model and reason (`model_not_loaded`, `row_refused`).
pub const SILENT_FAILURES: &str = "probity_silent_failures_total";
/// Silently scored rows whose decision differs from the answer's, by route and model.
pub const SILENT_DECISION_FLIPS: &str = "probity_silent_decision_flips_total";
/// Distribution of `|silent - answer|` adjusted log-odds, by route and model.
pub const SILENT_LOG_ODDS_DIFFERENCE: &str = "probity_silent_log_odds_abs_difference";

/// The HELP text of the challenger-scoring metrics.
pub fn describe() {
    metrics::describe_counter!(
        SILENT_PREDICTIONS,
        "Rows scored by challengers beside the champion, by route, model and role."
    );
    metrics::describe_counter!(
        SILENT_DROPPED,
        "Challenger scoring jobs dropped because their queue was full, by route."
    );
    metrics::describe_counter!(
        SILENT_FAILURES,
        "Rows a challenger could not score, by route, model and reason."
    );
    metrics::describe_counter!(
        SILENT_DECISION_FLIPS,
        "Rows whose challenger decision differs from the champion's answer, by route and model."
    );
    metrics::describe_histogram!(
        SILENT_LOG_ODDS_DIFFERENCE,
        "Absolute difference of challenger and champion adjusted log-odds on the same row."
    );
}

/// Jobs waiting at most; beyond this the request path drops instead of waiting.
const QUEUE_JOBS: usize = 4_096;

/// What the answer said about one row, to compare the silent prediction with.
#[derive(Debug, Clone)]
pub struct Answered {
    /// The row as received, with the prediction id of the answer filled in.
    pub row: pb::Row,
    /// The answer's adjusted log-odds.
    pub adjusted_log_odds: f64,
    /// The answer's decision, if the route has a rule.
    pub decision: Option<String>,
}

/// One request (or batch) to score in the background.
#[derive(Debug)]
pub struct SilentJob {
    /// The route name.
    pub route: String,
    /// The models to score with, and their roles.
    pub models: Vec<Answer>,
    /// The rows with what the answer said.
    pub rows: Vec<Answered>,
}

/// The sending side; dropping the last one ends the worker after it has finished the queued jobs.
#[derive(Debug, Clone)]
pub struct Silent {
    tx: SyncSender<SilentJob>,
}

impl Silent {
    /// Starts the worker thread.
    pub fn start(
        registry: Arc<Registry>,
        routes: Arc<RouteTable>,
        log: Option<Arc<PredictionStore>>,
    ) -> std::io::Result<Silent> {
        let (tx, rx) = sync_channel(QUEUE_JOBS);
        std::thread::Builder::new()
            .name("probity-silent".into())
            .spawn(move || work(rx, &registry, &routes, log.as_deref()))?;
        Ok(Silent { tx })
    }

    /// Offers a job without waiting; a full queue drops it and counts it.
    pub fn submit(&self, job: SilentJob) {
        match self.tx.try_send(job) {
            Ok(()) => {}
            Err(TrySendError::Full(job)) | Err(TrySendError::Disconnected(job)) => {
                metrics::counter!(SILENT_DROPPED, "route" => job.route).increment(1);
            }
        }
    }
}

fn failure(route: &str, model: &str, reason: &'static str, rows: usize) {
    metrics::counter!(SILENT_FAILURES, "route" => route.to_string(), "model" => model.to_string(),
        "reason" => reason)
    .increment(rows as u64);
}

fn work(
    rx: Receiver<SilentJob>,
    registry: &Registry,
    routes: &RouteTable,
    log: Option<&PredictionStore>,
) {
    while let Ok(job) = rx.recv() {
        let table = routes.load();
        let Some(configured) = table.get(&job.route) else {
            continue;
        };
        // The request was valid for the model that answered; a feature only that model knows is no reason for a
        // silent model to refuse the row, so unknown features are ignored here whatever the route's policy.
        let route = &Route {
            unknown_features: UnknownFeaturePolicy::Ignore,
            ..Route::clone(configured)
        };
        let snapshot = registry.snapshot();
        for model in &job.models {
            // A configured reference (bounded by the configuration), as the metric label.
            let label = model.model.to_string();
            let Some(loaded) = snapshot.find(&model.model) else {
                failure(&job.route, &label, "model_not_loaded", job.rows.len());
                continue;
            };
            for answered in &job.rows {
                let prepared =
                    prepare_row(answered.row.clone(), "row", loaded.model.schema(), route);
                let Ok(mut prepared) = prepared else {
                    failure(&job.route, &label, "row_refused", 1);
                    continue;
                };
                let Ok(scored) = loaded.model.score(&prepared.values, &route.output) else {
                    failure(&job.route, &label, "row_refused", 1);
                    continue;
                };
                if let Some(log) = log {
                    log.log(crate::serve::outcomes::queued(
                        route,
                        loaded,
                        model.role,
                        &mut prepared,
                        &scored,
                        // The answered row's values are counted with the answer.
                        None,
                    ));
                }
                let labels = [("route", job.route.clone()), ("model", label.clone())];
                metrics::counter!(SILENT_PREDICTIONS, "route" => job.route.clone(),
                    "model" => label.clone(), "role" => model.role)
                .increment(1);
                let decision = scored.decision.as_ref().map(|d| d.as_str().to_string());
                if decision != answered.decision {
                    metrics::counter!(SILENT_DECISION_FLIPS, &labels).increment(1);
                }
                metrics::histogram!(SILENT_LOG_ODDS_DIFFERENCE, &labels)
                    .record((scored.adjusted_log_odds - answered.adjusted_log_odds).abs());
            }
        }
    }
}
