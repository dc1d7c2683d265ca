//! The scoring core behind the gRPC handlers: resolve the route, take one snapshot of the model, convert the rows,
//! score them, record the prediction metrics.
//!
//! Everything here is synchronous; a batch checks its deadline between chunks of rows, since a running
//! computation cannot be interrupted from outside.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Instant;

use probity_models::EvalError;

use crate::serve::challenger::Answer;
use crate::serve::config::{Limits, RecordMode, Route};
use crate::serve::conversions::{prepare_row, score_response};
use crate::serve::error::ServeError;
use crate::serve::explain;
use crate::serve::metrics;
use crate::serve::promotion::{RouteMap, RouteTable};
use crate::serve::proto as pb;
use crate::serve::registry::{LoadedModel, Registry};
use crate::serve::silent::{Answered, Silent, SilentJob};
use crate::store::writer::{Queued, Receipt};
use crate::store::PredictionStore;

/// Rows scored between two deadline checks in a batch.
const CHUNK_ROWS: usize = 256;

/// A row converted for the engine.
#[derive(Debug)]
pub struct PreparedRow {
    /// The caller's id, or a server-made UUID version 7.
    pub prediction_id: String,
    /// The caller's subject key (may be empty), kept in the prediction store.
    pub subject_key: String,
    /// The caller's tags, kept in the prediction store.
    pub tags: std::collections::HashMap<String, String>,
    /// The dense row in the model's feature order.
    pub values: Vec<f64>,
    /// What the caller should know about the row.
    pub warnings: Vec<RowWarning>,
}

/// A warning attached to a scored row.
#[derive(Debug, Clone, PartialEq)]
pub struct RowWarning {
    /// What it is about.
    pub kind: WarningKind,
    /// The feature concerned.
    pub feature: String,
    /// A plain description.
    pub message: String,
}

/// The kinds of row warning.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WarningKind {
    /// No value; routed as missing.
    MissingFeature,
    /// A NaN or infinite number; routed as missing.
    NonFiniteValue,
    /// A category the model does not know; routed as unknown.
    UnknownCategory,
    /// A named feature the model does not have; ignored.
    IgnoredFeature,
}

impl WarningKind {
    /// The metric label value.
    pub fn as_str(self) -> &'static str {
        match self {
            WarningKind::MissingFeature => "missing_feature",
            WarningKind::NonFiniteValue => "non_finite_value",
            WarningKind::UnknownCategory => "unknown_category",
            WarningKind::IgnoredFeature => "ignored_feature",
        }
    }
}

/// An answer, and on a route with `record = "before-answer"` the receipt to wait for before sending it
/// ([`PredictionStore::record`]).
pub struct Pending<T> {
    /// The answer.
    pub answer: T,
    /// The route it was scored on (a configured name).
    pub route: String,
    /// Resolves when the answer's predictions are committed; `None` when the route does not wait.
    pub receipt: Option<Receipt>,
}

/// Scores requests against the registry's current models.
pub struct Scorer {
    registry: Arc<Registry>,
    routes: Arc<RouteTable>,
    limits: Limits,
    log: Option<Arc<PredictionStore>>,
    silent: Option<Silent>,
}

impl Scorer {
    /// A scorer over `registry` for the configured routes.
    pub fn new(registry: Arc<Registry>, routes: BTreeMap<String, Route>, limits: Limits) -> Scorer {
        Scorer {
            registry,
            routes: Arc::new(RouteTable::new(routes)),
            limits,
            log: None,
            silent: None,
        }
    }

    /// The same scorer, also scoring requests silently with the models that did not answer them
    /// (silent challengers, and the other side of a live challenger with `paired`); see [`crate::serve::silent`].
    /// Call after [`Scorer::with_store`]. Without any challenger configured, no worker is started.
    pub fn with_silent(mut self) -> Scorer {
        if self
            .routes
            .load()
            .values()
            .all(|r| r.challengers.is_empty())
        {
            return self;
        }
        match Silent::start(
            Arc::clone(&self.registry),
            Arc::clone(&self.routes),
            self.log.clone(),
        ) {
            Ok(silent) => self.silent = Some(silent),
            Err(error) => {
                tracing::error!(%error, "cannot start the background scoring thread; silent challengers are not scored")
            }
        }
        self
    }

    /// The models that score in the background when `answered` answers on `config`'s route.
    fn silent_models(
        &self,
        config: &Route,
        answered: &crate::serve::model_ref::ModelRef,
    ) -> Vec<Answer> {
        if self.silent.is_none() {
            return Vec::new();
        }
        config.challengers.silent(&config.model, answered)
    }

    fn submit(&self, config: &Route, models: Vec<Answer>, rows: Vec<Answered>) {
        if let Some(silent) = &self.silent {
            silent.submit(SilentJob {
                route: config.name.clone(),
                models,
                rows,
            });
        }
    }

    /// The same scorer, also queueing every answer to the prediction store.
    pub fn with_store(mut self, log: Option<Arc<PredictionStore>>) -> Scorer {
        self.log = log;
        self
    }

    /// The prediction store, when it is on.
    pub fn store(&self) -> Option<&Arc<PredictionStore>> {
        self.log.as_ref()
    }

    /// The same scorer, recording promotions in `dir` (the prediction store's directory) and replaying the ones
    /// recorded there; call before [`Scorer::with_silent`].
    pub fn with_route_history(mut self, dir: Option<&std::path::Path>) -> Scorer {
        if let (Some(dir), Some(table)) = (dir, Arc::get_mut(&mut self.routes)) {
            table.load_history(dir);
        }
        self
    }

    /// The routes now (promotions included).
    pub fn routes(&self) -> Arc<RouteMap> {
        self.routes.load()
    }

    /// The live route table, for promotions.
    pub fn route_table(&self) -> &Arc<RouteTable> {
        &self.routes
    }

    /// The registry.
    pub fn registry(&self) -> &Arc<Registry> {
        &self.registry
    }

    /// The configured route name to use as a metric label: unknown names collapse into one value, so a client
    /// cannot grow the label set.
    pub fn route_label(&self, route: &str) -> String {
        if self.routes.load().contains_key(route) {
            route.to_string()
        } else {
            "(unknown)".to_string()
        }
    }

    /// The route and the model serving it now.
    pub fn resolve(&self, route: &str) -> Result<(Arc<Route>, Arc<LoadedModel>), ServeError> {
        if route.is_empty() {
            return Err(ServeError::invalid("route", "is empty"));
        }
        let routes = self.routes.load();
        let Some(config) = routes.get(route).cloned() else {
            let known = routes.keys().cloned().collect::<Vec<_>>().join(", ");
            // Bounded before it is quoted back.
            crate::serve::limits::names(&[("route", route)])?;
            return Err(ServeError::RouteNotFound {
                route: route.to_string(),
                known,
            });
        };
        let snapshot = self.registry.snapshot();
        match snapshot.find(&config.model) {
            Some(model) => Ok((config, Arc::clone(model))),
            None => Err(ServeError::RouteNotReady {
                route: route.to_string(),
                model: config.model.to_string(),
                loaded: snapshot.loaded_list(),
            }),
        }
    }

    /// Queues the held predictions of a `record = "before-answer"` route and wraps the answer with its receipt.
    fn pending<T>(&self, config: &Route, answer: T, held: Vec<Queued>) -> Pending<T> {
        let receipt = match &self.log {
            Some(log) if !held.is_empty() => Some(log.record(held)),
            _ => None,
        };
        Pending {
            answer,
            route: config.name.clone(),
            receipt,
        }
    }

    /// Scores one row. On a route with `record = "before-answer"` the answer must wait for its receipt.
    pub fn score(
        &self,
        request: pb::ScoreRequest,
    ) -> Result<Pending<pb::ScoreResponse>, ServeError> {
        let pb::ScoreRequest {
            route,
            row,
            explain,
        } = request;
        let (route_now, champion) = self.resolve(&route)?;
        let config: &Route = &route_now;
        let row = row.ok_or_else(|| ServeError::invalid("row", "is required"))?;
        let answer = config
            .challengers
            .answer(&config.name, &config.model, &row.subject_key);
        // A live challenger that is not loaded leaves its subjects with the champion.
        let (loaded, role, answered) = match self.registry.snapshot().find(&answer.model) {
            Some(model) if answer.role == "challenger" => {
                (Arc::clone(model), "challenger", answer.model)
            }
            _ => (champion, "champion", config.model.clone()),
        };
        let silent_models = self.silent_models(config, &answered);
        let kept = (!silent_models.is_empty()).then(|| row.clone());
        let level = explain::level(explain, "explain")?;
        let prepared = prepare_row(row, "row", loaded.model.schema(), config)?;
        let scored = loaded
            .model
            .score(&prepared.values, &config.output)
            .map_err(|error| ServeError::Eval {
                field: "row".into(),
                error,
            })?;
        let explanation = match level {
            None => None,
            Some(level) => Some(explain::explain(
                &loaded.model,
                &prepared.values,
                &config.reasons,
                level,
                "row",
            )?),
        };
        let mut held = Vec::new();
        let mut response = self.respond(config, &loaded, role, prepared, scored, &mut held);
        response.explanation = explanation;
        if let Some(mut row) = kept {
            row.prediction_id.clone_from(&response.prediction_id);
            let answered = Answered {
                row,
                adjusted_log_odds: response.adjusted_log_odds,
                decision: response.decision.clone(),
            };
            self.submit(config, silent_models, vec![answered]);
        }
        Ok(self.pending(config, response, held))
    }

    /// Scores many rows with one model version; fails as a whole on the first bad row, naming it. On a route with
    /// `record = "before-answer"` the answer must wait for its receipt (all rows commit in one transaction).
    pub fn score_batch(
        &self,
        request: pb::ScoreBatchRequest,
        deadline: Instant,
    ) -> Result<Pending<pb::ScoreBatchResponse>, ServeError> {
        let pb::ScoreBatchRequest {
            route,
            rows,
            explain,
        } = request;
        let level = explain::level(explain, "explain")?;
        let (route_now, loaded) = self.resolve(&route)?;
        let config: &Route = &route_now;
        if rows.is_empty() {
            return Err(ServeError::invalid(
                "rows",
                "is empty; send at least one row",
            ));
        }
        if rows.len() > self.limits.max_batch_rows {
            return Err(ServeError::invalid(
                "rows",
                format!(
                    "has {} rows, the limit is {} (limits.max_batch_rows)",
                    rows.len(),
                    self.limits.max_batch_rows
                ),
            ));
        }
        let silent_models = self.silent_models(config, &config.model);
        let kept = (!silent_models.is_empty()).then(|| rows.clone());
        let schema = loaded.model.schema();
        let total = rows.len();
        let prepared = rows
            .into_iter()
            .enumerate()
            .map(|(i, row)| prepare_row(row, &format!("rows[{i}]"), schema, config))
            .collect::<Result<Vec<_>, _>>()?;
        let mut flat = Vec::with_capacity(total * schema.len());
        for row in &prepared {
            flat.extend_from_slice(&row.values);
        }
        let mut margins = vec![0.0; total];
        let width = schema.len();
        for start in (0..total).step_by(CHUNK_ROWS) {
            if Instant::now() >= deadline {
                return Err(ServeError::DeadlineExceeded {
                    rows_done: start,
                    rows: total,
                });
            }
            let end = (start + CHUNK_ROWS).min(total);
            loaded
                .model
                .margins(&flat[start * width..end * width], &mut margins[start..end])
                .map_err(|error| match error {
                    EvalError::InRow { row, error } => ServeError::Eval {
                        field: format!("rows[{}]", start + row),
                        error: *error,
                    },
                    other => ServeError::Eval {
                        field: "rows".into(),
                        error: other,
                    },
                })?;
        }
        // Explanations first, so a row that cannot be explained fails the call before anything is answered.
        let mut explanations = Vec::new();
        if let Some(level) = level {
            explanations.reserve(total);
            for (i, row) in prepared.iter().enumerate() {
                if i % CHUNK_ROWS == 0 && Instant::now() >= deadline {
                    return Err(ServeError::DeadlineExceeded {
                        rows_done: i,
                        rows: total,
                    });
                }
                explanations.push(explain::explain(
                    &loaded.model,
                    &row.values,
                    &config.reasons,
                    level,
                    &format!("rows[{i}]"),
                )?);
            }
        }
        let mut explanations = explanations.into_iter();
        let mut held = Vec::new();
        let results: Vec<pb::ScoreResponse> = prepared
            .into_iter()
            .zip(margins)
            .map(|(row, margin)| {
                let scored = loaded.model.finish(margin, &config.output);
                let mut response =
                    self.respond(config, &loaded, "champion", row, scored, &mut held);
                response.explanation = explanations.next();
                response
            })
            .collect();
        if let Some(rows) = kept {
            let answered = rows
                .into_iter()
                .zip(&results)
                .map(|(mut row, r)| {
                    row.prediction_id.clone_from(&r.prediction_id);
                    Answered {
                        row,
                        adjusted_log_odds: r.adjusted_log_odds,
                        decision: r.decision.clone(),
                    }
                })
                .collect();
            self.submit(config, silent_models, answered);
        }
        Ok(self.pending(config, pb::ScoreBatchResponse { results }, held))
    }

    /// The response of one scored row; its prediction is queued for the store, or on a route with
    /// `record = "before-answer"` added to `held` for [`Scorer::pending`].
    fn respond(
        &self,
        config: &Route,
        loaded: &Arc<LoadedModel>,
        role: &str,
        mut row: PreparedRow,
        scored: probity_models::Scored,
        held: &mut Vec<Queued>,
    ) -> pb::ScoreResponse {
        // The metrics find each monitored feature's slot; the same slots go with the prediction to the store.
        let features = metrics::prediction(
            &config.name,
            &loaded.model,
            scored.probability,
            scored.adjusted_log_odds,
            &row.values,
            self.log.is_some(),
        );
        if let Some(log) = &self.log {
            let queued =
                crate::serve::outcomes::queued(config, loaded, role, &mut row, &scored, features);
            match config.record {
                RecordMode::AfterAnswer => log.log(queued),
                RecordMode::BeforeAnswer => held.push(queued),
            }
        }
        for w in &row.warnings {
            metrics::warning(&config.name, w.kind.as_str());
        }
        score_response(&config.name, loaded, role, row, scored)
    }
}
