//! The `probity.v1.Challengers` service: Compare (from the prediction store), Promote and Restore (the `admin`
//! role) and RouteHistory. Handlers validate, call [`crate::compare`] or [`crate::serve::promotion`], and convert back.

use std::sync::Arc;
use std::time::Instant;

use tonic::{Request, Response, Status};

use crate::compare::{self, CompareRequest};
use crate::serve::error::ServeError;
use crate::serve::grpc::finish;
use crate::serve::limits;
use crate::serve::model_ref::ModelRef;
use crate::serve::promotion::RouteChange;
use crate::serve::proto as pb;
use crate::serve::scoring::Scorer;
use crate::serve::security::access::Caller;
use crate::store::ReportFilter;

/// The `probity.v1.Challengers` service. Who may call what is decided before the call arrives here
/// ([`crate::serve::security`]: Promote needs the `admin` role).
pub struct ChallengersApi {
    scorer: Arc<Scorer>,
}

impl ChallengersApi {
    /// The service over `scorer`.
    pub fn new(scorer: Arc<Scorer>) -> ChallengersApi {
        ChallengersApi { scorer }
    }

    fn promote_as(
        &self,
        request: pb::PromoteRequest,
        peer: &str,
    ) -> Result<pb::PromoteResponse, ServeError> {
        let pb::PromoteRequest {
            route,
            challenger,
            requested_by,
            reason,
        } = request;
        limits::names(&[("route", &route)])?;
        limits::text("challenger", &challenger, limits::MODEL_REF)?;
        who_and_why(&requested_by, &reason, "promotion")?;
        let snapshot = self.scorer.registry().snapshot();
        let c = self.scorer.route_table().promote(
            &route,
            &challenger,
            &requested_by,
            peer,
            &reason,
            |m| version_of(&snapshot, m),
        )?;
        Ok(pb::PromoteResponse {
            change: Some(change(c)),
        })
    }

    fn restore_as(
        &self,
        request: pb::RestoreRequest,
        peer: &str,
    ) -> Result<pb::RestoreResponse, ServeError> {
        let pb::RestoreRequest {
            route,
            requested_by,
            reason,
        } = request;
        limits::names(&[("route", &route)])?;
        who_and_why(&requested_by, &reason, "restore")?;
        let snapshot = self.scorer.registry().snapshot();
        let c = self.scorer.route_table().restore(
            &route,
            &requested_by,
            peer,
            &reason,
            |m| version_of(&snapshot, m),
            || snapshot.loaded_list(),
        )?;
        Ok(pb::RestoreResponse {
            change: Some(change(c)),
        })
    }
}

/// The version serving for `model` in `snapshot`.
fn version_of(snapshot: &crate::serve::registry::Snapshot, model: &ModelRef) -> Option<String> {
    snapshot.find(model).map(|m| m.model.version().to_string())
}

/// The limits of `requested_by` and `reason`, and `requested_by` required.
fn who_and_why(requested_by: &str, reason: &str, what: &str) -> Result<(), ServeError> {
    limits::text("requested_by", requested_by, limits::REQUESTED_BY)?;
    limits::text("reason", reason, limits::REASON)?;
    if requested_by.trim().is_empty() {
        return Err(ServeError::invalid(
            "requested_by",
            format!("is required: who asks for the {what}"),
        ));
    }
    Ok(())
}

/// The peer as recorded: its address and, when access control is on, the caller it authenticated as.
fn peer_of<T>(request: &Request<T>) -> String {
    let address = crate::serve::security::tls::remote_addr(request)
        .map(|a| a.to_string())
        .unwrap_or_default();
    match request.extensions().get::<Arc<Caller>>() {
        Some(caller) => format!("{address} as {}", caller.name),
        None => address,
    }
}

/// Builds the comparison; blocking (it reads the log), so it runs on the blocking pool.
fn compare_on(
    scorer: &Scorer,
    request: pb::CompareRequest,
) -> Result<pb::CompareResponse, ServeError> {
    let pb::CompareRequest {
        route,
        challenger,
        from_unix_ms,
        to_unix_ms,
    } = request;
    limits::names(&[("route", &route)])?;
    limits::text("challenger", &challenger, limits::MODEL_REF)?;
    let challenger = if challenger.is_empty() {
        None
    } else {
        Some(
            ModelRef::parse(&challenger)
                .map_err(|e| ServeError::invalid("challenger", e.to_string()))?,
        )
    };
    let (config, _) = scorer.resolve(&route)?;
    let log = scorer.store().ok_or(ServeError::StoreOff)?;
    // The flip share uses the route's threshold.
    let threshold = crate::serve::compare_metrics::route_threshold(&config);
    let request = CompareRequest {
        filter: ReportFilter {
            from_ms: (from_unix_ms != 0).then_some(from_unix_ms),
            to_ms: (to_unix_ms != 0).then_some(to_unix_ms),
            route: Some(route),
            model: None,
            version: None,
        },
        // The current champion: after a promotion the comparison follows the new arrangement.
        champion: Some(config.model.clone()),
        challenger,
        threshold,
        newey_west_lag: None,
    };
    let report = log.read_blocking(move |s| Ok(compare::build(s, &request)))??;
    Ok(pb::CompareResponse {
        verdict_code: report.verdict_code.clone(),
        verdict: report.verdict.clone(),
        report_json: serde_json::to_string(&report).unwrap_or_default(),
        table: compare::text::render(&report),
        ..always_valid_fields(&report)
    })
}

/// The always-valid fields of the Compare answer (the others at their defaults).
fn always_valid_fields(report: &compare::CompareReport) -> pb::CompareResponse {
    let a = &report.always_valid;
    pb::CompareResponse {
        fixed_sample_verdict_code: report.fixed_sample_verdict_code.clone(),
        log_loss_always_valid_p_value: a.log_loss.as_ref().and_then(|s| s.p_value),
        log_loss_difference_lower: a.log_loss.as_ref().map(|s| s.lower),
        log_loss_difference_upper: a.log_loss.as_ref().map(|s| s.upper),
        auc_always_valid_p_value: a.auc.as_ref().and_then(|s| s.p_value),
        auc_difference_lower: a.auc.as_ref().map(|s| s.lower),
        auc_difference_upper: a.auc.as_ref().map(|s| s.upper),
        ..pb::CompareResponse::default()
    }
}

impl From<compare::CompareReportError> for ServeError {
    fn from(e: compare::CompareReportError) -> ServeError {
        match e {
            compare::CompareReportError::Store(s) => ServeError::Store(s),
            other => ServeError::Comparison(other.to_string()),
        }
    }
}

fn change(c: RouteChange) -> pb::RouteChange {
    let RouteChange {
        time_ms,
        kind,
        route,
        previous_champion,
        previous_version,
        new_champion,
        new_version,
        requested_by,
        peer,
        reason,
    } = c;
    pb::RouteChange {
        route,
        previous_champion,
        new_champion,
        requested_by,
        peer,
        time_unix_ms: time_ms,
        reason,
        kind,
        previous_champion_version: previous_version,
        new_champion_version: new_version,
    }
}

#[tonic::async_trait]
impl pb::challengers_server::Challengers for ChallengersApi {
    async fn compare(
        &self,
        request: Request<pb::CompareRequest>,
    ) -> Result<Response<pb::CompareResponse>, Status> {
        let started = Instant::now();
        let route = self.scorer.route_label(&request.get_ref().route);
        let inner = request.into_inner();
        let scorer = Arc::clone(&self.scorer);
        let result = tokio::task::spawn_blocking(move || compare_on(&scorer, inner))
            .await
            .unwrap_or_else(|e| {
                Err(ServeError::Comparison(format!(
                    "comparison task failed: {e}"
                )))
            });
        finish("Compare", &route, started, result)
    }

    async fn promote(
        &self,
        request: Request<pb::PromoteRequest>,
    ) -> Result<Response<pb::PromoteResponse>, Status> {
        let started = Instant::now();
        let route = self.scorer.route_label(&request.get_ref().route);
        let peer = peer_of(&request);
        let result = self.promote_as(request.into_inner(), &peer);
        finish("Promote", &route, started, result)
    }

    async fn restore(
        &self,
        request: Request<pb::RestoreRequest>,
    ) -> Result<Response<pb::RestoreResponse>, Status> {
        let started = Instant::now();
        let route = self.scorer.route_label(&request.get_ref().route);
        let peer = peer_of(&request);
        let result = self.restore_as(request.into_inner(), &peer);
        finish("Restore", &route, started, result)
    }

    async fn route_history(
        &self,
        request: Request<pb::RouteHistoryRequest>,
    ) -> Result<Response<pb::RouteHistoryResponse>, Status> {
        let started = Instant::now();
        let route = request.into_inner().route;
        let result = limits::names(&[("route", &route)]).map(|()| pb::RouteHistoryResponse {
            changes: self
                .scorer
                .route_table()
                .history(&route)
                .into_iter()
                .map(change)
                .collect(),
        });
        finish(
            "RouteHistory",
            &self.scorer.route_label(&route),
            started,
            result,
        )
    }
}
