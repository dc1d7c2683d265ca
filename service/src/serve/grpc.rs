//! The gRPC handlers: take the request apart, call the core, record the call, hand back the answer or the status.

use std::pin::Pin;
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio_stream::Stream;
use tonic::{Request, Response, Status, Streaming};

use crate::serve::conversions::{feature_infos, model_info, route_info, row_error, ModelTarget};
use crate::serve::error::ServeError;
use crate::serve::limits;
use crate::serve::metrics;
use crate::serve::proto as pb;
use crate::serve::scoring::{Pending, Scorer};
use crate::serve::server::Reloader;
use crate::store::writer::NotRecorded;

/// Responses queued per stream before the reader waits for the client to read.
const STREAM_BUFFER: usize = 64;

/// Records a finished call and turns the domain result into the gRPC one.
pub(crate) fn finish<T>(
    method: &'static str,
    route: &str,
    started: Instant,
    result: Result<T, ServeError>,
) -> Result<Response<T>, Status> {
    let result = result.map_err(Status::from);
    let code = match &result {
        Ok(_) => tonic::Code::Ok,
        Err(status) => status.code(),
    };
    metrics::request(method, route, code, started.elapsed().as_secs_f64());
    result.map(Response::new)
}

/// The answer of a scoring call once it may be sent: at once, or on a route with `record = "before-answer"` after
/// its predictions are committed. A call whose predictions are not committed (or not before its deadline) is
/// refused and counted (`probity_store_record_refusals_total`).
pub(crate) async fn recorded<T>(pending: Pending<T>, deadline: Instant) -> Result<T, ServeError> {
    let Pending {
        answer,
        route,
        receipt,
    } = pending;
    let Some(receipt) = receipt else {
        return Ok(answer);
    };
    let refused = match tokio::time::timeout_at(deadline.into(), receipt).await {
        Ok(Ok(Ok(()))) => return Ok(answer),
        Ok(Ok(Err(why))) => ServeError::NotRecorded(why),
        // The writer is gone without answering: the store is closed.
        Ok(Err(_)) => ServeError::NotRecorded(NotRecorded::Closed),
        Err(_) => ServeError::RecordDeadline,
    };
    let reason = match &refused {
        ServeError::NotRecorded(why) => why.as_str(),
        _ => "deadline",
    };
    crate::store::running::record_refused(&route, reason);
    Err(refused)
}

/// The deadline of a call: the caller's `grpc-timeout` if it sent one, capped by the configured default.
fn deadline_of<T>(request: &Request<T>, default: Duration) -> Instant {
    let asked = request
        .metadata()
        .get("grpc-timeout")
        .and_then(|v| v.to_str().ok())
        .and_then(parse_grpc_timeout);
    Instant::now() + asked.map_or(default, |a| a.min(default))
}

/// `grpc-timeout` per the gRPC over HTTP/2 protocol document: up to 8 digits and a unit (H, M, S, m, u, n).
fn parse_grpc_timeout(text: &str) -> Option<Duration> {
    if text.len() < 2 || text.len() > 9 {
        return None;
    }
    let (digits, unit) = text.split_at(text.len() - 1);
    let n: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(n.saturating_mul(3600)),
        "M" => Duration::from_secs(n.saturating_mul(60)),
        "S" => Duration::from_secs(n),
        "m" => Duration::from_millis(n),
        "u" => Duration::from_micros(n),
        "n" => Duration::from_nanos(n),
        _ => return None,
    })
}

/// A row of a scoring stream, scored and waiting for its turn to be answered.
struct ScoredRow {
    /// When it arrived.
    started: Instant,
    /// The route label of its metrics.
    route: String,
    /// The latest its answer may wait for its record.
    deadline: Instant,
    /// The answer, or why there is none.
    scored: Result<Pending<pb::ScoreResponse>, ServeError>,
}

/// The `probity.v1.Scoring` service.
pub struct ScoringApi {
    scorer: Arc<Scorer>,
    default_deadline: Duration,
}

impl ScoringApi {
    /// A scoring service over `scorer`.
    pub fn new(scorer: Arc<Scorer>, default_deadline: Duration) -> ScoringApi {
        ScoringApi {
            scorer,
            default_deadline,
        }
    }
}

#[tonic::async_trait]
impl pb::scoring_server::Scoring for ScoringApi {
    async fn score(
        &self,
        request: Request<pb::ScoreRequest>,
    ) -> Result<Response<pb::ScoreResponse>, Status> {
        let started = Instant::now();
        let deadline = deadline_of(&request, self.default_deadline);
        let route = self.scorer.route_label(&request.get_ref().route);
        let result = match self.scorer.score(request.into_inner()) {
            Ok(pending) => recorded(pending, deadline).await,
            Err(error) => Err(error),
        };
        finish("Score", &route, started, result)
    }

    async fn score_batch(
        &self,
        request: Request<pb::ScoreBatchRequest>,
    ) -> Result<Response<pb::ScoreBatchResponse>, Status> {
        let started = Instant::now();
        let deadline = deadline_of(&request, self.default_deadline);
        let route = self.scorer.route_label(&request.get_ref().route);
        let result = match self.scorer.score_batch(request.into_inner(), deadline) {
            Ok(pending) => recorded(pending, deadline).await,
            Err(error) => Err(error),
        };
        finish("ScoreBatch", &route, started, result)
    }

    type ScoreStreamStream =
        Pin<Box<dyn Stream<Item = Result<pb::ScoreStreamResponse, Status>> + Send>>;

    async fn score_stream(
        &self,
        request: Request<Streaming<pb::ScoreRequest>>,
    ) -> Result<Response<Self::ScoreStreamStream>, Status> {
        let mut inbound = request.into_inner();
        let (tx, rx) = tokio::sync::mpsc::channel(STREAM_BUFFER);
        // Scored rows in arrival order, each with what it waits for: the reader scores the next rows while the
        // rows of a `record = "before-answer"` route wait for their commit (so one stream's rows share batches),
        // and the answers still leave in order.
        let (scored_tx, mut scored_rx) =
            tokio::sync::mpsc::channel::<Result<ScoredRow, Status>>(STREAM_BUFFER);
        let scorer = Arc::clone(&self.scorer);
        let default_deadline = self.default_deadline;
        tokio::spawn(async move {
            loop {
                let message = match inbound.message().await {
                    Ok(Some(message)) => message,
                    Ok(None) => break,
                    Err(status) => {
                        // A frame we could not decode (or a reset): counted, and the stream ends with that
                        // status after the answers to the rows before it.
                        metrics::request("ScoreStream", "", status.code(), 0.0);
                        let _ = scored_tx.send(Err(status)).await;
                        break;
                    }
                };
                let started = Instant::now();
                // Each row's wait for its record is bounded by the default deadline from its arrival.
                let deadline = started + default_deadline;
                let route = scorer.route_label(&message.route);
                let scored = scorer.score(message);
                let row = ScoredRow {
                    started,
                    route,
                    deadline,
                    scored,
                };
                if scored_tx.send(Ok(row)).await.is_err() {
                    break; // the client went away
                }
            }
        });
        tokio::spawn(async move {
            let mut sequence = 0u64;
            while let Some(row) = scored_rx.recv().await {
                let ScoredRow {
                    started,
                    route,
                    deadline,
                    scored,
                } = match row {
                    Ok(row) => row,
                    Err(status) => {
                        let _ = tx.send(Err(status)).await;
                        break;
                    }
                };
                let result = match scored {
                    Ok(pending) => recorded(pending, deadline).await,
                    Err(error) => Err(error),
                };
                let outcome = match result {
                    Ok(response) => {
                        metrics::request(
                            "ScoreStream",
                            &route,
                            tonic::Code::Ok,
                            started.elapsed().as_secs_f64(),
                        );
                        pb::score_stream_response::Outcome::Result(response)
                    }
                    Err(error) => {
                        let status = Status::from(error);
                        metrics::request(
                            "ScoreStream",
                            &route,
                            status.code(),
                            started.elapsed().as_secs_f64(),
                        );
                        pb::score_stream_response::Outcome::Error(row_error(&status))
                    }
                };
                let answer = pb::ScoreStreamResponse {
                    sequence,
                    outcome: Some(outcome),
                };
                if tx.send(Ok(answer)).await.is_err() {
                    break; // the client went away
                }
                sequence += 1;
            }
        });
        Ok(Response::new(Box::pin(
            tokio_stream::wrappers::ReceiverStream::new(rx),
        )))
    }
}

/// The `probity.v1.Models` service.
pub struct ModelsApi {
    scorer: Arc<Scorer>,
    reloader: Arc<Reloader>,
}

impl ModelsApi {
    /// A model management service.
    pub fn new(scorer: Arc<Scorer>, reloader: Arc<Reloader>) -> ModelsApi {
        ModelsApi { scorer, reloader }
    }
}

#[tonic::async_trait]
impl pb::models_server::Models for ModelsApi {
    async fn list_routes(
        &self,
        _request: Request<pb::ListRoutesRequest>,
    ) -> Result<Response<pb::ListRoutesResponse>, Status> {
        let started = Instant::now();
        let snapshot = self.scorer.registry().snapshot();
        let routes = self
            .scorer
            .routes()
            .values()
            .map(|r| route_info(r, snapshot.find(&r.model).map(|m| m.as_ref())))
            .collect();
        let models = snapshot.models.values().map(|m| model_info(m)).collect();
        let problems = snapshot
            .problems
            .iter()
            .map(pb::FileProblem::from)
            .collect();
        finish(
            "ListRoutes",
            "",
            started,
            Ok(pb::ListRoutesResponse {
                routes,
                models,
                problems,
            }),
        )
    }

    async fn model_facts(
        &self,
        request: Request<pb::ModelFactsRequest>,
    ) -> Result<Response<pb::ModelFactsResponse>, Status> {
        let started = Instant::now();
        let result = ModelTarget::try_from(request.into_inner()).and_then(|target| {
            match &target {
                ModelTarget::Route(route) => limits::names(&[("route", route)])?,
                ModelTarget::Model(model) => limits::text("model", model, limits::MODEL_REF)?,
            }
            let loaded = match target {
                ModelTarget::Route(route) => self.scorer.resolve(&route)?.1,
                ModelTarget::Model(model) => {
                    let named = crate::serve::model_ref::ModelRef::parse(&model)
                        .map_err(|e| ServeError::invalid("model", e.to_string()))?;
                    let snapshot = self.scorer.registry().snapshot();
                    match snapshot.find(&named) {
                        Some(loaded) => Arc::clone(loaded),
                        None if !named.is_pinned() && snapshot.versions_of(&named.name).nth(1).is_some() => {
                            let versions = snapshot
                                .versions_of(&named.name)
                                .map(|m| m.model.version())
                                .collect::<Vec<_>>()
                                .join(", ");
                            return Err(ServeError::invalid(
                                "model",
                                format!(
                                    "`{}` is loaded in several versions ({versions}); name one as {}@VERSION",
                                    named.name, named.name
                                ),
                            ));
                        }
                        None => return Err(ServeError::ModelNotFound { model }),
                    }
                }
            };
            let features = feature_infos(loaded.model.schema());
            Ok(pb::ModelFactsResponse {
                model: Some(model_info(&loaded)),
                features,
            })
        });
        finish("ModelFacts", "", started, result)
    }

    async fn reload(
        &self,
        _request: Request<pb::ReloadRequest>,
    ) -> Result<Response<pb::ReloadResponse>, Status> {
        let started = Instant::now();
        let result = self
            .reloader
            .reload_all("rpc")
            .await
            .map(|files| pb::ReloadResponse {
                files: files.into_iter().map(pb::FileReload::from).collect(),
            });
        finish("Reload", "", started, result)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pending(receipt: crate::store::writer::Receipt) -> Pending<u32> {
        Pending {
            answer: 7,
            route: "credit".into(),
            receipt: Some(receipt),
        }
    }

    #[tokio::test]
    async fn an_answer_waits_for_its_record_and_is_refused_without_it() {
        let soon = || Instant::now() + Duration::from_secs(60);
        // No receipt: answered at once.
        let plain = Pending {
            answer: 7,
            route: "fraud".into(),
            receipt: None,
        };
        assert_eq!(recorded(plain, soon()).await.unwrap(), 7);
        let (done, receipt) = tokio::sync::oneshot::channel();
        done.send(Ok(())).unwrap();
        assert_eq!(recorded(pending(receipt), soon()).await.unwrap(), 7);
        // Not committed: UNAVAILABLE, with the reason in the message.
        let (done, receipt) = tokio::sync::oneshot::channel();
        done.send(Err(NotRecorded::Write(
            crate::store::WriteFailure::DiskFull,
        )))
        .unwrap();
        let status = Status::from(recorded(pending(receipt), soon()).await.unwrap_err());
        assert_eq!(status.code(), tonic::Code::Unavailable);
        assert!(
            status.message().contains("disk_full"),
            "{}",
            status.message()
        );
        // The writer gone without an answer: the store is closed.
        let (done, receipt) = tokio::sync::oneshot::channel::<Result<(), NotRecorded>>();
        drop(done);
        let error = recorded(pending(receipt), soon()).await.unwrap_err();
        assert!(
            matches!(error, ServeError::NotRecorded(NotRecorded::Closed)),
            "{error:?}"
        );
        // No commit before the deadline: DEADLINE_EXCEEDED, not an answer.
        let (_done, receipt) = tokio::sync::oneshot::channel();
        let error = recorded(pending(receipt), Instant::now() + Duration::from_millis(1))
            .await
            .unwrap_err();
        assert_eq!(Status::from(error).code(), tonic::Code::DeadlineExceeded);
    }

    #[test]
    fn grpc_timeout_units() {
        // Units from the gRPC over HTTP/2 protocol document (grpc/grpc, doc/PROTOCOL-HTTP2.md).
        assert_eq!(parse_grpc_timeout("1H"), Some(Duration::from_secs(3600)));
        assert_eq!(parse_grpc_timeout("250m"), Some(Duration::from_millis(250)));
        assert_eq!(
            parse_grpc_timeout("99999999n"),
            Some(Duration::from_nanos(99_999_999))
        );
        assert_eq!(parse_grpc_timeout("123456789S"), None, "more than 8 digits");
        assert_eq!(parse_grpc_timeout("5x"), None);
        assert_eq!(parse_grpc_timeout("S"), None);
    }
}
