//! Every RPC once through a tonic client, with the numbers checked against the model-format formulas and against
//! the engine called in-process (to the last bit).

use probity::serve::proto as pb;
use probity_models::{DecisionRule, Model, OutputSpec};
use tonic_health::pb::health_check_response::ServingStatus;

use crate::fixtures::*;

fn sigmoid(x: f64) -> f64 {
    1.0 / (1.0 + (-x).exp())
}

#[tokio::test]
async fn every_rpc_answers() {
    let t = TestServer::start(false).await;
    let mut scoring = t.scoring().await;

    // Score, by name. Hand computation from docs/model-format.md: tree 0 sends amount 150 right (leaf 1.0), tree 1
    // sends `online` left (leaf 0.75); margin = -2 + 1 + 0.75. Platt a=1, b=0 leaves it; the base-rate shift is
    // logit(0.01) - logit(0.1) (Elkan 2001, Theorem 2); the points score is Siddiqi's (2006) formula.
    let response = scoring
        .score(score_request("fraud", fraud_row("")))
        .await
        .unwrap()
        .into_inner();
    let margin = -2.0 + 1.0 + 0.75;
    let adjusted = margin + ((0.01f64 / 0.99).ln() - (0.1f64 / 0.9).ln());
    assert_eq!(response.margin, margin);
    assert_eq!(response.log_odds, margin);
    assert!(
        (response.adjusted_log_odds - adjusted).abs() < 1e-14,
        "{} vs {adjusted}",
        response.adjusted_log_odds
    );
    assert!((response.probability - sigmoid(adjusted)).abs() < 1e-15);
    let points = 600.0 + 20.0 / std::f64::consts::LN_2 * (-adjusted - 50f64.ln());
    assert!((response.score.unwrap() - points).abs() < 1e-9);
    assert_eq!(response.decision.as_deref(), Some("negative"));
    assert_eq!(
        (response.model.as_str(), response.model_version.as_str()),
        ("grpc-fraud", "v1")
    );
    assert!(response.warnings.is_empty());
    let id = uuid::Uuid::parse_str(&response.prediction_id).unwrap();
    assert_eq!(
        id.get_version_num(),
        7,
        "server-made ids are time-ordered UUIDs"
    );

    // The engine in-process gives the same bits.
    let model =
        Model::from_json_slice(&std::fs::read(data_dir().join("grpc-fraud-v1.json")).unwrap())
            .unwrap();
    let spec = OutputSpec {
        target_base_rate: Some(0.01),
        decision: Some(DecisionRule::Threshold { threshold: 0.5 }),
    };
    let local = model.score(&[150.0, 1.0, 3.0], &spec).unwrap();
    assert_eq!(response.probability.to_bits(), local.probability.to_bits());

    // Score, dense, with a caller id: same answer.
    let mut row = dense(&[150.0, 1.0, 3.0]);
    row.prediction_id = "txn-0001".into();
    let d = scoring
        .score(score_request("fraud", row))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(d.prediction_id, "txn-0001");
    assert_eq!(d.probability.to_bits(), response.probability.to_bits());

    // ScoreBatch: three rows, one with a missing feature routed as missing (tree 1 sends `pos` right, then a
    // missing hour right: -0.25; tree 0 sends 50 left: -0.5).
    let rows = vec![
        fraud_row("a"),
        dense(&[150.0, 1.0, 3.0]),
        named(
            "c",
            &[("amount", Value::Num(50.0)), ("channel", Value::Cat("pos"))],
        ),
    ];
    let batch = scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "fraud".into(),
            rows,
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(batch.results.len(), 3);
    assert_eq!(batch.results[0].prediction_id, "a");
    assert_eq!(
        batch.results[1].probability.to_bits(),
        response.probability.to_bits()
    );
    assert_eq!(batch.results[2].margin, -2.0 - 0.5 - 0.25);
    let w = &batch.results[2].warnings;
    assert_eq!(w.len(), 1);
    assert_eq!(
        (w[0].kind, w[0].feature.as_str()),
        (pb::WarningKind::MissingFeature as i32, "hour")
    );

    // ScoreStream: a bad request in the middle gets an in-stream error and the stream goes on.
    let requests = vec![
        score_request("fraud", fraud_row("s0")),
        score_request("no-such-route", fraud_row("s1")),
        score_request(
            "credit",
            named(
                "s2",
                &[
                    ("income", Value::Num(75.0)),
                    ("region", Value::Cat("south")),
                ],
            ),
        ),
    ];
    let mut stream = scoring
        .score_stream(tokio_stream::iter(requests))
        .await
        .unwrap()
        .into_inner();
    let mut answers = Vec::new();
    while let Some(answer) = stream.message().await.unwrap() {
        answers.push(answer);
    }
    assert_eq!(
        answers.iter().map(|a| a.sequence).collect::<Vec<_>>(),
        vec![0, 1, 2]
    );
    match &answers[1].outcome {
        Some(pb::score_stream_response::Outcome::Error(e)) => {
            assert_eq!(e.code, tonic::Code::NotFound as i32);
            assert!(e.message.contains("no-such-route"), "{}", e.message);
        }
        other => panic!("expected an error, got {other:?}"),
    }
    match &answers[2].outcome {
        // Linear model: -1 + (-0.5) * (75 - 50) / 25 + 0.4, no calibration, no base-rate shift.
        Some(pb::score_stream_response::Outcome::Result(r)) => {
            assert!((r.margin - (-1.0 - 0.5 + 0.4)).abs() < 1e-15);
            assert_eq!(r.model, "grpc-credit");
        }
        other => panic!("expected a result, got {other:?}"),
    }

    // Model management.
    let mut models = t.models_client().await;
    let list = models
        .list_routes(pb::ListRoutesRequest {})
        .await
        .unwrap()
        .into_inner();
    let names: Vec<_> = list
        .routes
        .iter()
        .map(|r| (r.name.as_str(), r.ready, r.model_version.as_str()))
        .collect();
    assert_eq!(
        names,
        vec![
            ("credit", true, "v1"),
            ("fraud", true, "v1"),
            ("fraud-strict", true, "v1"),
            ("orphan", false, "")
        ]
    );
    let fraud = list.routes.iter().find(|r| r.name == "fraud").unwrap();
    assert_eq!(fraud.record, "after-answer", "the default");
    assert_eq!(
        (fraud.target_base_rate, fraud.decision.as_str()),
        (Some(0.01), "threshold 0.5")
    );
    assert_eq!(list.models.len(), 2);
    assert!(list.problems.is_empty());

    let by_route = models
        .model_facts(pb::ModelFactsRequest {
            target: Some(pb::model_facts_request::Target::Route("fraud".into())),
        })
        .await
        .unwrap()
        .into_inner();
    let info = by_route.model.unwrap();
    assert_eq!(
        (
            info.name.as_str(),
            info.kind.as_str(),
            info.tree_count,
            info.feature_count
        ),
        ("grpc-fraud", "ensemble", 2, 3)
    );
    let features: Vec<_> = by_route
        .features
        .iter()
        .map(|f| (f.index, f.name.as_str(), f.categories.len()))
        .collect();
    assert_eq!(
        features,
        vec![(0, "amount", 0), (1, "channel", 3), (2, "hour", 0)]
    );
    let by_name = models
        .model_facts(pb::ModelFactsRequest {
            target: Some(pb::model_facts_request::Target::Model("grpc-credit".into())),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(by_name.model.unwrap().kind, "linear");

    // The method's name of earlier releases is refused with the new one named (the gRPC layer alone would answer
    // UNIMPLEMENTED with an empty message).
    let mut raw = tonic::client::Grpc::new(t.channel().await);
    raw.ready().await.unwrap();
    let old = raw
        .unary::<_, pb::ModelFactsResponse, _>(
            tonic::Request::new(pb::ModelFactsRequest {
                target: Some(pb::model_facts_request::Target::Route("fraud".into())),
            }),
            "/probity.v1.Models/DescribeModel".parse().unwrap(),
            tonic_prost::ProstCodec::default(),
        )
        .await
        .unwrap_err();
    assert_eq!(old.code(), tonic::Code::Unimplemented);
    assert_eq!(
        old.message(),
        "probity.v1.Models/DescribeModel was renamed probity.v1.Models/ModelFacts"
    );

    let reload = models
        .reload(pb::ReloadRequest {})
        .await
        .unwrap()
        .into_inner();
    let outcomes: Vec<_> = reload
        .files
        .iter()
        .map(|f| (f.file.as_str(), f.outcome))
        .collect();
    let unchanged = pb::ReloadOutcome::Unchanged as i32;
    assert_eq!(
        outcomes,
        vec![
            ("grpc-credit-v1.json", unchanged),
            ("grpc-fraud-v1.json", unchanged)
        ]
    );

    // Standard health checking: not serving overall while the `orphan` route has no model.
    let mut health = tonic_health::pb::health_client::HealthClient::new(t.channel().await);
    let check = |service: &str| tonic_health::pb::HealthCheckRequest {
        service: service.into(),
    };
    let overall = health.check(check("")).await.unwrap().into_inner();
    assert_eq!(overall.status, ServingStatus::NotServing as i32);
    let admin = health
        .check(check("probity.v1.Models"))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(admin.status, ServingStatus::Serving as i32);

    // Server reflection lists our services.
    use tonic_reflection::pb::v1::{
        server_reflection_client::ServerReflectionClient,
        server_reflection_request::MessageRequest, server_reflection_response::MessageResponse,
        ServerReflectionRequest,
    };
    let mut reflection = ServerReflectionClient::new(t.channel().await);
    let request = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut replies = reflection
        .server_reflection_info(tokio_stream::iter(vec![request]))
        .await
        .unwrap()
        .into_inner();
    let reply = replies.message().await.unwrap().unwrap();
    let Some(MessageResponse::ListServicesResponse(services)) = reply.message_response else {
        panic!("{reply:?}")
    };
    let services: Vec<_> = services.service.iter().map(|s| s.name.as_str()).collect();
    for wanted in [
        "probity.v1.Scoring",
        "probity.v1.Models",
        "grpc.health.v1.Health",
    ] {
        assert!(services.contains(&wanted), "{wanted} not in {services:?}");
    }

    // Readiness on the monitoring port agrees with health.
    let (code, body) = t.http_get("/readyz").await;
    assert_eq!(code, 503);
    assert!(body.contains("orphan"), "{body}");
    assert_eq!(t.http_get("/livez").await.0, 200);

    t.server.shutdown().await;
}

#[tokio::test]
async fn shutdown_stops_accepting() {
    let t = TestServer::start(false).await;
    let url = t.url();
    let mut scoring = t.scoring().await;
    scoring
        .score(score_request("fraud", fraud_row("")))
        .await
        .unwrap();
    let TestServer {
        server,
        models: _models,
        ..
    } = t;
    server.shutdown().await;
    let again = tonic::transport::Channel::from_shared(url)
        .unwrap()
        .connect()
        .await;
    assert!(
        again.is_err(),
        "a new connection after shutdown should be refused"
    );
}

/// The test fraud model with per-node cover and reason families (model format version 2).
fn fraud_model_with_cover() -> String {
    let text = std::fs::read_to_string(data_dir().join("grpc-fraud-v1.json")).unwrap();
    let mut doc: serde_json::Value = serde_json::from_str(&text).unwrap();
    doc["format_version"] = 2.into();
    doc["version"] = "v2".into();
    for (t, covers) in [
        (0, vec![10.0, 6.0, 4.0]),
        (1, vec![10.0, 3.0, 7.0, 5.0, 2.0]),
    ] {
        for (i, c) in covers.into_iter().enumerate() {
            doc["ensemble"]["trees"][t]["nodes"][i]["cover"] = c.into();
        }
    }
    doc["reason_families"] = serde_json::json!([
        {"code": "A1", "text": "Amount large for the card", "features": [0]},
        {"code": "C1", "text": "Channel and time of day", "features": [1, 2]},
    ]);
    doc.to_string()
}

#[tokio::test]
async fn explanations_on_every_scoring_call() {
    let t = TestServer::start(false).await;
    let mut scoring = t.scoring().await;
    let explained = |row: pb::Row, explain: pb::ExplainLevel| pb::ScoreRequest {
        explain: explain as i32,
        ..score_request("fraud", row)
    };

    // The served model has no cover: asking for an explanation is FAILED_PRECONDITION naming the key, and a
    // plain score is unaffected.
    let err = scoring
        .score(explained(fraud_row(""), pb::ExplainLevel::Reasons))
        .await
        .unwrap_err();
    assert_eq!(err.code(), tonic::Code::FailedPrecondition);
    assert!(
        err.message()
            .contains("`ensemble.trees[0].nodes[0].cover` is missing"),
        "{}",
        err.message()
    );
    let plain = scoring
        .score(score_request("fraud", fraud_row("")))
        .await
        .unwrap()
        .into_inner();
    assert!(plain.explanation.is_none());

    t.put_model("grpc-fraud-v1.json", &fraud_model_with_cover());
    let mut models = t.models_client().await;
    models.reload(pb::ReloadRequest {}).await.unwrap();

    // Hand computation of the path-dependent Shapley values (Lundberg, Erion and Lee 2018): tree 0 has mean
    // 0.6 * -0.5 + 0.4 * 1.0 = 0.1 and the row (amount 150) gets 1.0, so amount gets 0.9. Tree 1: coalition
    // values v({}) = 0.3 * 0.75 + 0.7 * (5/7 * 0.25 + 2/7 * -0.25) = 0.3, v({channel}) = 0.75,
    // v({hour}) = 0.3 * 0.75 + 0.7 * 0.25 = 0.4, v({channel, hour}) = 0.75: channel gets
    // (0.45 + 0.35) / 2 = 0.4, hour (0.1 + 0) / 2 = 0.05. Bias -2 + 0.1 + 0.3 = -1.6; the sum is the margin.
    let r = scoring
        .score(explained(fraud_row("e1"), pb::ExplainLevel::Contributions))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.model_version, "v2");
    let e = r.explanation.expect("an explanation was asked for");
    let got: Vec<(&str, f64)> = e
        .contributions
        .iter()
        .map(|c| (c.feature.as_str(), c.log_odds))
        .collect();
    let want = [("amount", 0.9), ("channel", 0.4), ("hour", 0.05)];
    for ((gn, gv), (wn, wv)) in got.iter().zip(want) {
        assert_eq!(*gn, wn);
        assert!((gv - wv).abs() < 1e-15, "{got:?}");
    }
    assert!((e.bias - -1.6).abs() < 1e-15);
    let total: f64 = e.bias + got.iter().map(|(_, v)| v).sum::<f64>();
    assert!((total - r.log_odds).abs() < 1e-12);
    let reasons: Vec<(&str, &str)> = e
        .reasons
        .iter()
        .map(|x| (x.code.as_str(), x.text.as_str()))
        .collect();
    assert_eq!(
        reasons,
        [
            ("A1", "Amount large for the card"),
            ("C1", "Channel and time of day")
        ]
    );
    assert!((e.reasons[1].weight - 0.45).abs() < 1e-15);
    assert_eq!(e.reasons[1].features, ["channel", "hour"]);

    // ScoreBatch with reasons only: no contributions, the same reasons, every row explained.
    let batch = scoring
        .score_batch(pb::ScoreBatchRequest {
            route: "fraud".into(),
            rows: vec![fraud_row("b1"), dense(&[50.0, 0.0, 3.0])],
            explain: pb::ExplainLevel::Reasons as i32,
        })
        .await
        .unwrap()
        .into_inner();
    let first = batch.results[0].explanation.as_ref().unwrap();
    assert!(first.contributions.is_empty());
    assert_eq!(first.reasons.len(), 2);
    // Row 2: amount 50 goes left (-0.5, below the mean 0.1: amount gets -0.6); `pos` goes right and hour 3 left
    // (0.25, below tree 1's mean 0.3): the family of channel and hour sums to -0.05. Nothing is adverse.
    let second = batch.results[1].explanation.as_ref().unwrap();
    assert!(second.reasons.is_empty(), "{:?}", second.reasons);

    // ScoreStream: explanations per request; an unknown level is an in-stream INVALID_ARGUMENT.
    let requests = vec![
        explained(fraud_row("s0"), pb::ExplainLevel::Reasons),
        pb::ScoreRequest {
            explain: 7,
            ..score_request("fraud", fraud_row("s1"))
        },
        score_request("fraud", fraud_row("s2")),
    ];
    let mut stream = scoring
        .score_stream(tokio_stream::iter(requests))
        .await
        .unwrap()
        .into_inner();
    let mut answers = Vec::new();
    while let Some(answer) = stream.message().await.unwrap() {
        answers.push(answer.outcome);
    }
    match &answers[0] {
        Some(pb::score_stream_response::Outcome::Result(r)) => {
            assert_eq!(r.explanation.as_ref().unwrap().reasons[0].code, "A1");
        }
        other => panic!("expected a result, got {other:?}"),
    }
    match &answers[1] {
        Some(pb::score_stream_response::Outcome::Error(e)) => {
            assert_eq!(e.code, tonic::Code::InvalidArgument as i32);
            assert!(e.message.contains("explain"), "{}", e.message);
        }
        other => panic!("expected an error, got {other:?}"),
    }
    match &answers[2] {
        Some(pb::score_stream_response::Outcome::Result(r)) => assert!(r.explanation.is_none()),
        other => panic!("expected a result, got {other:?}"),
    }
}
