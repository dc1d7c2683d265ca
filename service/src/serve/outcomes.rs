//! The prediction store inside the server: what a scored row becomes in the log, the `probity.v1.Outcomes`
//! handlers (outcome batches and streams, reports), and the background sweep task.

use std::pin::Pin;
use std::sync::Arc;
use std::time::Instant;

use tokio_stream::Stream;
use tonic::{Request, Response, Status, Streaming};

use crate::report::{self, Report};
use crate::serve::config::Route;
use crate::serve::error::ServeError;
use crate::serve::limits;
use crate::serve::metrics;
use crate::serve::proto as pb;
use crate::serve::registry::LoadedModel;
use crate::serve::scoring::PreparedRow;
use crate::store::writer::{ModelFacts, Queued};
use crate::store::{
    ModelVersionInfo, OutcomeInput, OutcomeResult, OutcomeStatus, PredictionRecord,
    PredictionStore, Reference, ReportFilter,
};

/// Most outcomes in one `RecordOutcomes` call.
pub const MAX_OUTCOMES_PER_CALL: usize = 10_000;
/// Outcomes read from a stream before they are written together.
const STREAM_CHUNK: usize = 256;

impl ModelFacts for LoadedModel {
    fn version_info(&self) -> ModelVersionInfo {
        ModelVersionInfo {
            model: self.model.name().to_string(),
            version: self.model.version().to_string(),
            base_rate: self.model.base_rate(),
            reference: self.model.reference_distribution().map(Reference::of),
            features: self
                .model
                .training_distributions()
                .take(crate::serve::feature_metrics::MAX_MONITORED_FEATURES)
                .map(|(column, d)| {
                    let name = self
                        .model
                        .schema()
                        .feature(column)
                        .map(|f| f.name.as_str())
                        .unwrap_or_default();
                    crate::store::features::FeatureDistribution::of(name, d)
                })
                .collect(),
        }
    }
}

/// The log entry of a scored row (the subject key and tags are moved out of the row; the response does not carry
/// them), with the slots of its monitored features when the scoring path found them.
pub fn queued(
    route: &Route,
    loaded: &Arc<LoadedModel>,
    role: &str,
    row: &mut PreparedRow,
    scored: &probity_models::Scored,
    features: Option<crate::store::features::RowFeatures>,
) -> Queued {
    let prior = route
        .output
        .target_base_rate
        .unwrap_or_else(|| loaded.model.base_rate());
    Queued {
        record: PredictionRecord {
            prediction_id: row.prediction_id.clone(),
            route: route.name.clone(),
            model: loaded.model.name().to_string(),
            version: loaded.model.version().to_string(),
            role: role.to_string(),
            time_ms: crate::store::clock::system_now_ms(),
            margin: scored.margin,
            log_odds: scored.log_odds,
            adjusted_log_odds: scored.adjusted_log_odds,
            probability: scored.probability,
            subject_key: std::mem::take(&mut row.subject_key),
            tags: std::mem::take(&mut row.tags).into_iter().collect(),
            served: crate::store::Served {
                prior: Some(prior),
                decision: route
                    .output
                    .decision
                    .as_ref()
                    .map(crate::store::decision_words)
                    .unwrap_or_default(),
            },
        },
        prior,
        facts: Arc::clone(loaded) as Arc<dyn ModelFacts>,
        features,
    }
}

fn status_of(status: OutcomeStatus) -> pb::OutcomeStatus {
    match status {
        OutcomeStatus::Matched => pb::OutcomeStatus::Matched,
        OutcomeStatus::Duplicate => pb::OutcomeStatus::Duplicate,
        OutcomeStatus::Corrected => pb::OutcomeStatus::Corrected,
        OutcomeStatus::Pending => pb::OutcomeStatus::Pending,
        OutcomeStatus::Invalid => pb::OutcomeStatus::Invalid,
    }
}

fn input(outcome: pb::Outcome) -> OutcomeInput {
    let pb::Outcome {
        prediction_id,
        label,
        outcome_time_unix_ms,
    } = outcome;
    OutcomeInput {
        prediction_id,
        label,
        time_ms: (outcome_time_unix_ms != 0).then_some(outcome_time_unix_ms),
    }
}

fn result(index: usize, id: String, r: OutcomeResult) -> pb::OutcomeResult {
    pb::OutcomeResult {
        index: index as u64,
        prediction_id: id,
        status: status_of(r.status) as i32,
        predictions_matched: u32::try_from(r.predictions_matched).unwrap_or(u32::MAX),
        message: r.message,
    }
}

/// Most outcome writes and reports running on blocking threads at once. They share one store behind one lock, so
/// more would only queue there; and a call that gives up (its deadline passes) while its blocking task waits for
/// a stalled disk leaves that task running: the limit bounds how many such tasks (and the outcomes they carry) a
/// stalled disk can pile up. Calls beyond it wait for a slot within their deadline.
pub const STORE_CALLS_IN_FLIGHT: usize = 4;

/// Runs `f` on the log's thread for calls ([`PredictionStore::on_thread`]), off the async runtime, holding one of
/// the [`STORE_CALLS_IN_FLIGHT`] slots until it ends.
async fn on_store<T: Send + 'static>(
    slots: &Arc<tokio::sync::Semaphore>,
    log: Arc<PredictionStore>,
    f: impl FnOnce(&PredictionStore) -> Result<T, crate::store::StoreError> + Send + 'static,
) -> Result<T, ServeError> {
    let closed = || ServeError::Store(crate::store::StoreError::Closed);
    let slot = Arc::clone(slots)
        .acquire_owned()
        .await
        .map_err(|_| closed())?;
    let on = Arc::clone(&log);
    log.on_thread(move || {
        let _slot = slot;
        f(&on)
    })
    .await
    .map_err(|_| closed())?
    .map_err(ServeError::from)
}

/// Records outcomes off the async runtime.
async fn record(
    slots: &Arc<tokio::sync::Semaphore>,
    log: Arc<PredictionStore>,
    inputs: Vec<OutcomeInput>,
) -> Result<Vec<OutcomeResult>, ServeError> {
    on_store(slots, log, move |log| log.record_outcomes(&inputs)).await
}

/// The calibration-test and eventual-rate fields of a report section's wire message (the others at their
/// defaults).
fn monitor_fields(s: &crate::report::SeriesReport) -> pb::ReportSeries {
    let t = &s.calibration_tests;
    let r = t.recalibration.as_ref();
    let e = s.eventual_positive_rate.as_ref();
    let w = match &s.immature_window {
        crate::report::immature::ImmatureWindow::Estimated(w) => Some(w.as_ref()),
        crate::report::immature::ImmatureWindow::Unknown { .. } => None,
    };
    pb::ReportSeries {
        spiegelhalter_z: t.spiegelhalter.as_ref().map(|z| z.z),
        spiegelhalter_p_value: t.spiegelhalter.as_ref().map(|z| z.p_value),
        calibration_slope: r.map(|r| r.slope.estimate),
        calibration_slope_lower: r.map(|r| r.slope.lower),
        calibration_slope_upper: r.map(|r| r.slope.upper),
        calibration_in_the_large: r.map(|r| r.in_the_large.estimate),
        calibration_in_the_large_lower: r.map(|r| r.in_the_large.lower),
        calibration_in_the_large_upper: r.map(|r| r.in_the_large.upper),
        recalibration_p_value: r.map(|r| r.joint_p_value),
        eventual_positive_rate: e.map(|e| e.estimate),
        eventual_positive_rate_lower: e.map(|e| e.lower),
        eventual_positive_rate_upper: e.map(|e| e.upper),
        immature_eventual_positive_rate: w.map(|w| w.positive_rate.estimate),
        immature_eventual_positive_rate_lower: w.and_then(|w| w.positive_rate.lower),
        immature_eventual_positive_rate_upper: w.and_then(|w| w.positive_rate.upper),
        immature_eventual_log_loss: w.map(|w| w.log_loss.estimate),
        immature_eventual_log_loss_lower: w.and_then(|w| w.log_loss.lower),
        immature_eventual_log_loss_upper: w.and_then(|w| w.log_loss.upper),
        immature_eventual_brier: w.map(|w| w.brier.estimate),
        immature_eventual_brier_lower: w.and_then(|w| w.brier.lower),
        immature_eventual_brier_upper: w.and_then(|w| w.brier.upper),
        ..pb::ReportSeries::default()
    }
}

/// An operating point as its wire message.
fn point_message(p: &crate::report::operating::Point) -> pb::OperatingPoint {
    pb::OperatingPoint {
        threshold: p.threshold,
        true_positive: p.true_positive as u64,
        false_positive: p.false_positive as u64,
        true_negative: p.true_negative as u64,
        false_negative: p.false_negative as u64,
        approval_rate: p.approval_rate,
        decline_rate: p.decline_rate,
        precision: p.precision,
        recall: p.recall,
        expected_cost: p.expected_cost,
    }
}

/// The operating points of one served decision rule as its wire message.
fn served_rule(r: &crate::report::operating::ServedRule) -> pb::ServedRule {
    pb::ServedRule {
        rule: r.rule.clone(),
        predictions: r.predictions as u64,
        with_outcome: r.with_outcome as u64,
        positives: r.positives as u64,
        first_unix_ms: r.first_ms,
        last_unix_ms: r.last_ms,
        false_positive_cost: r.costs.map(|c| c.false_positive),
        false_negative_cost: r.costs.map(|c| c.false_negative),
        point: r.point.as_ref().map(point_message),
        bands: r
            .bands
            .iter()
            .map(|b| pb::ScoreBand {
                label: b.label.clone(),
                lower: b.lower,
                upper: b.upper,
                count: b.count as u64,
                positives: b.positives as u64,
                positive_rate: b.positive_rate,
                declining_from_here: Some(point_message(&b.declining_from_here)),
            })
            .collect(),
    }
}

/// A feature's stability in a report section as its wire message.
fn feature_stability(f: &crate::report::features::FeatureReport) -> pb::FeatureStability {
    pb::FeatureStability {
        feature: f.feature.clone(),
        rows: f.rows,
        psi: f.psi,
        missing_rate: f.missing_rate,
        unknown_rate: f.unknown_rate,
        counts: f.counts.clone(),
    }
}

/// The report as its wire message.
pub fn report_response(report: &Report) -> pb::ReportResponse {
    let series = report
        .series
        .iter()
        .map(|s| pb::ReportSeries {
            route: s.route.clone(),
            model: s.model.clone(),
            version: s.version.clone(),
            role: s.role.clone(),
            predictions: s.predictions as u64,
            with_outcome: s.with_outcome as u64,
            features: s.features.iter().map(feature_stability).collect(),
            immature: s.immature as u64,
            settled_by_maturity: s.settled_by_maturity as u64,
            corrected: s.corrected as u64,
            observed_base_rate: s.observed_base_rate,
            predicted_base_rate: s.predicted_base_rate,
            log_loss: s.log_loss,
            brier: s.brier,
            roc_auc: s.roc_auc,
            ks: s.ks,
            ece: s.calibration.as_ref().map(|c| c.ece),
            hosmer_lemeshow_statistic: s.hosmer_lemeshow.as_ref().map(|h| h.statistic),
            hosmer_lemeshow_p_value: s.hosmer_lemeshow.as_ref().map(|h| h.p_value),
            psi: s.psi.as_ref().map(|p| p.value),
            base_rate_estimate: s.base_rate_estimate,
            configured_base_rate: s.configured_base_rate,
            operating_points: s.operating_points.iter().map(served_rule).collect(),
            ..monitor_fields(s)
        })
        .collect();
    pb::ReportResponse {
        series,
        pending_outcomes: report.outcomes.pending,
        unmatched_outcomes: report.outcomes.unmatched,
        json: serde_json::to_string(report).unwrap_or_default(),
    }
}

fn filter_of(request: pb::ReportRequest) -> ReportFilter {
    let pb::ReportRequest {
        from_unix_ms,
        to_unix_ms,
        route,
        model,
        version,
    } = request;
    let text = |s: String| (!s.is_empty()).then_some(s);
    ReportFilter {
        from_ms: (from_unix_ms != 0).then_some(from_unix_ms),
        to_ms: (to_unix_ms != 0).then_some(to_unix_ms),
        route: text(route),
        model: text(model),
        version: text(version),
    }
}

/// The `probity.v1.Outcomes` service.
pub struct OutcomesApi {
    log: Option<Arc<PredictionStore>>,
    /// The [`STORE_CALLS_IN_FLIGHT`] slots.
    slots: Arc<tokio::sync::Semaphore>,
    /// The live routes, for the configured target base rates a report is set against.
    routes: Option<Arc<crate::serve::promotion::RouteTable>>,
}

impl OutcomesApi {
    /// The service over the log (calls fail with FAILED_PRECONDITION when the log is off).
    pub fn new(log: Option<Arc<PredictionStore>>) -> OutcomesApi {
        OutcomesApi {
            log,
            slots: Arc::new(tokio::sync::Semaphore::new(STORE_CALLS_IN_FLIGHT)),
            routes: None,
        }
    }

    /// Reports set each route's base-rate estimate against its configured target base rate from `routes`.
    pub fn with_routes(mut self, routes: Arc<crate::serve::promotion::RouteTable>) -> OutcomesApi {
        self.routes = Some(routes);
        self
    }

    /// Each route's configured target base rate now.
    fn configured_base_rates(&self) -> std::collections::BTreeMap<String, f64> {
        self.routes.as_ref().map_or_else(Default::default, |t| {
            t.load()
                .iter()
                .filter_map(|(name, r)| r.output.target_base_rate.map(|b| (name.clone(), b)))
                .collect()
        })
    }

    fn store(&self) -> Result<Arc<PredictionStore>, ServeError> {
        self.log.clone().ok_or(ServeError::StoreOff)
    }
}

fn finish<T>(
    method: &'static str,
    started: Instant,
    result: Result<T, ServeError>,
) -> Result<Response<T>, Status> {
    let result = result.map_err(Status::from);
    let code = result
        .as_ref()
        .map_or_else(|s| s.code(), |_| tonic::Code::Ok);
    metrics::request(method, "", code, started.elapsed().as_secs_f64());
    result.map(Response::new)
}

#[tonic::async_trait]
impl pb::outcomes_server::Outcomes for OutcomesApi {
    async fn record_outcomes(
        &self,
        request: Request<pb::RecordOutcomesRequest>,
    ) -> Result<Response<pb::RecordOutcomesResponse>, Status> {
        let started = Instant::now();
        let outcomes = request.into_inner().outcomes;
        let result = async {
            let log = self.store()?;
            if outcomes.len() > MAX_OUTCOMES_PER_CALL {
                return Err(ServeError::invalid(
                    "outcomes",
                    format!(
                        "has {} outcomes, the limit is {MAX_OUTCOMES_PER_CALL}",
                        outcomes.len()
                    ),
                ));
            }
            let ids: Vec<String> = outcomes.iter().map(|o| o.prediction_id.clone()).collect();
            let results =
                record(&self.slots, log, outcomes.into_iter().map(input).collect()).await?;
            Ok(pb::RecordOutcomesResponse {
                results: results
                    .into_iter()
                    .zip(ids)
                    .enumerate()
                    .map(|(i, (r, id))| result(i, id, r))
                    .collect(),
            })
        }
        .await;
        finish("RecordOutcomes", started, result)
    }

    type RecordOutcomeStreamStream =
        Pin<Box<dyn Stream<Item = Result<pb::OutcomeResult, Status>> + Send>>;

    async fn record_outcome_stream(
        &self,
        request: Request<Streaming<pb::Outcome>>,
    ) -> Result<Response<Self::RecordOutcomeStreamStream>, Status> {
        let log = self.store().map_err(Status::from)?;
        let slots = Arc::clone(&self.slots);
        let mut inbound = request.into_inner();
        let (tx, rx) = tokio::sync::mpsc::channel(STREAM_CHUNK);
        tokio::spawn(async move {
            let mut index = 0usize;
            let mut open = true;
            while open {
                // Take what has arrived (at least one), write it in one transaction, answer each.
                let mut chunk = Vec::new();
                match inbound.message().await {
                    Ok(Some(m)) => chunk.push(m),
                    Ok(None) => break,
                    Err(status) => {
                        // A frame we could not decode (or a reset): counted, and the stream ends with it.
                        metrics::request("RecordOutcomeStream", "", status.code(), 0.0);
                        let _ = tx.send(Err(status)).await;
                        break;
                    }
                }
                while chunk.len() < STREAM_CHUNK {
                    match futures_now(&mut inbound).await {
                        Some(Ok(Some(m))) => chunk.push(m),
                        Some(Ok(None)) => {
                            open = false;
                            break;
                        }
                        Some(Err(_)) | None => break,
                    }
                }
                let started = Instant::now();
                let ids: Vec<String> = chunk.iter().map(|o| o.prediction_id.clone()).collect();
                let written = record(
                    &slots,
                    Arc::clone(&log),
                    chunk.into_iter().map(input).collect(),
                )
                .await;
                let code = written
                    .as_ref()
                    .map_or_else(crate::serve::status::code_of, |_| tonic::Code::Ok);
                metrics::request(
                    "RecordOutcomeStream",
                    "",
                    code,
                    started.elapsed().as_secs_f64(),
                );
                match written {
                    Ok(results) => {
                        for (r, id) in results.into_iter().zip(ids) {
                            if tx.send(Ok(result(index, id, r))).await.is_err() {
                                return;
                            }
                            index += 1;
                        }
                    }
                    Err(error) => {
                        let _ = tx.send(Err(Status::from(error))).await;
                        return;
                    }
                }
            }
        });
        Ok(Response::new(Box::pin(
            tokio_stream::wrappers::ReceiverStream::new(rx),
        )))
    }

    async fn report(
        &self,
        request: Request<pb::ReportRequest>,
    ) -> Result<Response<pb::ReportResponse>, Status> {
        let started = Instant::now();
        let request = request.into_inner();
        let checked = limits::names(&[
            ("route", &request.route),
            ("model", &request.model),
            ("version", &request.version),
        ]);
        let filter = filter_of(request);
        let configured = self.configured_base_rates();
        let result = async {
            checked?;
            let log = self.store()?;
            // The immature window's horizon: each route's label maturity, when configured.
            let horizons = report::Horizons {
                by_route: log
                    .config()
                    .maturity
                    .iter()
                    .map(|(route, d)| {
                        (
                            route.clone(),
                            i64::try_from(d.as_millis()).unwrap_or(i64::MAX),
                        )
                    })
                    .collect(),
                all: None,
            };
            let report = on_store(&self.slots, log, move |log| {
                log.with_store(|store| {
                    report::build_full(
                        store,
                        &filter,
                        &configured,
                        probity_models::metrics::BinStrategy::Uniform(report::CALIBRATION_BINS),
                        &horizons,
                    )
                })
            })
            .await?;
            Ok(report_response(&report))
        }
        .await;
        finish("Report", started, result)
    }
}

/// The next stream message if one is ready now, without waiting (`None` when none is).
async fn futures_now(
    inbound: &mut Streaming<pb::Outcome>,
) -> Option<Result<Option<pb::Outcome>, Status>> {
    tokio::select! {
        biased;
        m = inbound.message() => Some(m),
        () = std::future::ready(()) => None,
    }
}

/// Applies maturity, the outcome hold and retention every `store.sweep_interval`, first at start (so a restart picks
/// up where the last run stopped: the sweep works from what the log holds).
pub fn sweep_task(log: Arc<PredictionStore>) -> tokio::task::JoinHandle<()> {
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(log.config().sweep_interval);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tick.tick().await;
            let l = Arc::clone(&log);
            match tokio::task::spawn_blocking(move || l.sweep()).await {
                Ok(Ok((matured, unmatched, removed))) => {
                    if matured + unmatched as usize + removed as usize > 0 {
                        tracing::info!(matured, unmatched, removed, "prediction store swept");
                    }
                }
                // Counted and logged (once per kind) by the log itself.
                Ok(Err(_)) => {}
                Err(_) => return,
            }
        }
    })
}
