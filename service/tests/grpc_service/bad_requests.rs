//! A table of bad requests: each gets the right status code and a message naming the field at fault, and the
//! server goes on serving afterwards.

use probity::serve::proto as pb;
use tonic::Code;

use crate::fixtures::*;

enum Call {
    Score(pb::ScoreRequest),
    Batch(pb::ScoreBatchRequest),
    Describe(pb::ModelFactsRequest),
    Compare(pb::CompareRequest),
    Promote(pb::PromoteRequest),
    Restore(pb::RestoreRequest),
    History(pb::RouteHistoryRequest),
    Report(pb::ReportRequest),
}

fn with<F: FnOnce(&mut pb::Row)>(mut row: pb::Row, f: F) -> pb::Row {
    f(&mut row);
    row
}

fn table() -> Vec<(&'static str, Call, Code, &'static str)> {
    use Value::*;
    let strict = |row| Call::Score(score_request("fraud-strict", row));
    let fraud = |row| Call::Score(score_request("fraud", row));
    let batch = |rows| {
        Call::Batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "fraud".into(),
            rows,
        })
    };
    let describe = |target| Call::Describe(pb::ModelFactsRequest { target });
    vec![
        (
            "unknown route",
            Call::Score(score_request("nope", fraud_row(""))),
            Code::NotFound,
            "route `nope`",
        ),
        (
            "empty route",
            Call::Score(score_request("", fraud_row(""))),
            Code::InvalidArgument,
            "route: is empty",
        ),
        (
            "route without model",
            Call::Score(score_request("orphan", fraud_row(""))),
            Code::Unavailable,
            "route `orphan` is not ready: model `grpc-absent` is not loaded (loaded: grpc-credit, grpc-fraud)",
        ),
        (
            "no row",
            Call::Score(pb::ScoreRequest {
                explain: 0,
                route: "fraud".into(),
                row: None,
            }),
            Code::InvalidArgument,
            "row: is required",
        ),
        (
            "no features",
            fraud(pb::Row::default()),
            Code::InvalidArgument,
            "row.features",
        ),
        (
            "dense too short",
            fraud(dense(&[1.0, 2.0])),
            Code::InvalidArgument,
            "row.dense.values: has 2 values",
        ),
        (
            "dense missing, rejecting",
            strict(dense(&[f64::NAN, 1.0, 3.0])),
            Code::InvalidArgument,
            "row.dense.values[0] (amount)",
        ),
        (
            "dense infinite, rejecting",
            strict(dense(&[1.0, 1.0, f64::INFINITY])),
            Code::InvalidArgument,
            "row.dense.values[2] (hour)",
        ),
        (
            "dense unknown category, rejecting",
            strict(dense(&[1.0, 7.0, 3.0])),
            Code::InvalidArgument,
            "row.dense.values[1] (channel)",
        ),
        (
            "named missing, rejecting",
            strict(named("", &[("amount", Num(1.0)), ("channel", Cat("pos"))])),
            Code::InvalidArgument,
            "row.named.values[\"hour\"]",
        ),
        (
            "named value unset, rejecting",
            strict(named(
                "",
                &[
                    ("amount", Unset),
                    ("channel", Cat("pos")),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"amount\"]",
        ),
        (
            "named NaN, rejecting",
            strict(named(
                "",
                &[
                    ("amount", Num(f64::NAN)),
                    ("channel", Cat("pos")),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"amount\"]: is not a finite number",
        ),
        (
            "named unknown category, rejecting",
            strict(named(
                "",
                &[
                    ("amount", Num(1.0)),
                    ("channel", Cat("phone")),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"channel\"]: category \"phone\"",
        ),
        (
            "unknown feature name",
            fraud(named(
                "",
                &[
                    ("amout", Num(1.0)),
                    ("amount", Num(1.0)),
                    ("channel", Cat("pos")),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"amout\"]",
        ),
        (
            "category for a numeric feature",
            fraud(named(
                "",
                &[
                    ("amount", Cat("high")),
                    ("channel", Cat("pos")),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"amount\"]: is a numeric feature",
        ),
        (
            "number for a categorical feature",
            fraud(named(
                "",
                &[
                    ("amount", Num(1.0)),
                    ("channel", Num(1.0)),
                    ("hour", Num(3.0)),
                ],
            )),
            Code::InvalidArgument,
            "row.named.values[\"channel\"]: is a categorical feature",
        ),
        (
            "model has no rule for a missing value",
            Call::Score(score_request(
                "credit",
                named("", &[("region", Cat("north"))]),
            )),
            Code::InvalidArgument,
            "feature `income` is missing",
        ),
        (
            "prediction id too long",
            fraud(fraud_row(&"x".repeat(129))),
            Code::InvalidArgument,
            "row.prediction_id",
        ),
        (
            "prediction id with a space",
            fraud(fraud_row("a b")),
            Code::InvalidArgument,
            "row.prediction_id",
        ),
        (
            "subject key too long",
            fraud(with(fraud_row(""), |r| r.subject_key = "k".repeat(257))),
            Code::InvalidArgument,
            "row.subject_key",
        ),
        (
            "too many tags",
            fraud(with(fraud_row(""), |r| {
                r.tags = (0..33).map(|i| (format!("t{i}"), "v".into())).collect()
            })),
            Code::InvalidArgument,
            "row.tags: has 33 entries",
        ),
        (
            "empty batch",
            batch(vec![]),
            Code::InvalidArgument,
            "rows: is empty",
        ),
        (
            "too many rows",
            batch((0..101).map(|_| fraud_row("")).collect()),
            Code::InvalidArgument,
            "rows: has 101 rows, the limit is 100",
        ),
        (
            "bad row in a batch",
            batch(vec![fraud_row(""), fraud_row(""), dense(&[1.0])]),
            Code::InvalidArgument,
            "rows[2].dense.values",
        ),
        (
            "engine error in a batch row",
            Call::Batch(pb::ScoreBatchRequest {
                explain: 0,
                route: "credit".into(),
                rows: vec![
                    named("", &[("income", Num(1.0)), ("region", Cat("north"))]),
                    named("", &[("region", Cat("north"))]),
                ],
            }),
            Code::InvalidArgument,
            "rows[1]: feature `income` is missing",
        ),
        (
            "describe: no target",
            describe(None),
            Code::InvalidArgument,
            "target: is required",
        ),
        (
            "describe: unknown model",
            describe(Some(pb::model_facts_request::Target::Model(
                "ghost".into(),
            ))),
            Code::NotFound,
            "model `ghost`",
        ),
        // Every caller-given text has a documented maximum (docs/limits.md), refused naming field and limit, and a
        // message never repeats the whole value (a 100,000-character field once made a status too large to send).
        (
            "compare: 100,000-character challenger",
            Call::Compare(pb::CompareRequest {
                route: "fraud".into(),
                challenger: "c".repeat(100_000),
                ..Default::default()
            }),
            Code::InvalidArgument,
            "challenger: is 100000 characters long; the limit is 257",
        ),
        (
            "promote: 100,000-character route",
            Call::Promote(pb::PromoteRequest {
                route: "r".repeat(100_000),
                challenger: "m2".into(),
                requested_by: "t".into(),
                reason: String::new(),
            }),
            Code::InvalidArgument,
            "route: is 100000 characters long; the limit is 128",
        ),
        (
            "restore: 1,000,000-character reason",
            Call::Restore(pb::RestoreRequest {
                route: "fraud".into(),
                requested_by: "t".into(),
                reason: "x".repeat(1_000_000),
            }),
            Code::InvalidArgument,
            "reason: is 1000000 characters long; the limit is 1024",
        ),
        (
            "restore: long requested_by",
            Call::Restore(pb::RestoreRequest {
                route: "fraud".into(),
                requested_by: "y".repeat(1_000_000),
                reason: String::new(),
            }),
            Code::InvalidArgument,
            "requested_by: is 1000000 characters long; the limit is 256",
        ),
        (
            "restore: nobody asks",
            Call::Restore(pb::RestoreRequest {
                route: "fraud".into(),
                requested_by: " ".into(),
                reason: String::new(),
            }),
            Code::InvalidArgument,
            "requested_by: is required: who asks for the restore",
        ),
        (
            "restore: 100,000-character route",
            Call::Restore(pb::RestoreRequest {
                route: "r".repeat(100_000),
                requested_by: "t".into(),
                reason: String::new(),
            }),
            Code::InvalidArgument,
            "route: is 100000 characters long; the limit is 128",
        ),
        (
            "restore: unknown route",
            Call::Restore(pb::RestoreRequest {
                route: "no-such-route".into(),
                requested_by: "t".into(),
                reason: String::new(),
            }),
            Code::NotFound,
            "route `no-such-route` is not configured",
        ),
        (
            "restore: nothing promoted yet",
            Call::Restore(pb::RestoreRequest {
                route: "fraud".into(),
                requested_by: "t".into(),
                reason: String::new(),
            }),
            Code::FailedPrecondition,
            "route `fraud` has no earlier champion in the route history",
        ),
        (
            "promote: 1,000,000-character reason",
            Call::Promote(pb::PromoteRequest {
                route: "fraud".into(),
                challenger: "m2".into(),
                requested_by: "t".into(),
                reason: "x".repeat(1_000_000),
            }),
            Code::InvalidArgument,
            "reason: is 1000000 characters long; the limit is 1024",
        ),
        (
            "promote: long requested_by",
            Call::Promote(pb::PromoteRequest {
                route: "fraud".into(),
                challenger: "m2".into(),
                requested_by: "y".repeat(1_000_000),
                reason: String::new(),
            }),
            Code::InvalidArgument,
            "requested_by: is 1000000 characters long; the limit is 256",
        ),
        (
            "route history: long route",
            Call::History(pb::RouteHistoryRequest {
                route: "h".repeat(5_000),
            }),
            Code::InvalidArgument,
            "route: is 5000 characters long; the limit is 128",
        ),
        (
            "report: long version",
            Call::Report(pb::ReportRequest {
                version: "v".repeat(129),
                ..Default::default()
            }),
            Code::InvalidArgument,
            "version: is 129 characters long; the limit is 128",
        ),
        (
            "score: long route",
            Call::Score(score_request(&"s".repeat(100_000), fraud_row(""))),
            Code::InvalidArgument,
            "route: is 100000 characters long; the limit is 128",
        ),
    ]
}

#[tokio::test]
async fn bad_requests_get_the_right_status_and_the_server_keeps_serving() {
    let t = TestServer::start(false).await;
    let mut scoring = t.scoring().await;
    let mut models = t.models_client().await;
    let channel = t.channel().await;
    let mut challengers = pb::challengers_client::ChallengersClient::new(channel.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(channel);
    let cases = table();
    assert!(cases.len() >= 15);
    let mut failures = Vec::new();
    for (name, call, code, needle) in cases {
        let status = match call {
            Call::Score(r) => scoring.score(r).await.map(|_| ()),
            Call::Batch(r) => scoring.score_batch(r).await.map(|_| ()),
            Call::Describe(r) => models.model_facts(r).await.map(|_| ()),
            Call::Compare(r) => challengers.compare(r).await.map(|_| ()),
            Call::Promote(r) => challengers.promote(r).await.map(|_| ()),
            Call::Restore(r) => challengers.restore(r).await.map(|_| ()),
            Call::History(r) => challengers.route_history(r).await.map(|_| ()),
            Call::Report(r) => outcomes.report(r).await.map(|_| ()),
        };
        match status {
            Ok(()) => failures.push(format!("{name}: succeeded")),
            Err(s) if s.message().len() > 1_000 => {
                failures.push(format!("{name}: a {}-byte message", s.message().len()))
            }
            Err(s) if s.code() != code || !s.message().contains(needle) => failures.push(format!(
                "{name}:\n  expected: {code:?} containing {needle:?}\n  actual:   {:?} {:?}",
                s.code(),
                s.message()
            )),
            Err(_) => {}
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));

    // Refusals made by the gRPC layer before any handler runs are counted like the others (the metrics are shared
    // by the binary's tests, so the counts are compared before and after).
    let count = |text: &str, code: &str| -> f64 {
        text.lines()
            .filter(|l| {
                l.starts_with("probity_grpc_requests_total{")
                    && l.contains("method=\"Score\"")
                    && l.contains(&format!("code=\"{code}\""))
            })
            .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
            .sum()
    };
    let before = t.http_get("/metrics").await.1;

    // A message above limits.max_message_bytes: RESOURCE_EXHAUSTED, as the gRPC status table prescribes (the
    // library alone answers OUT_OF_RANGE), naming the limit's key.
    let huge = dense(&vec![1.0; 600_000]);
    let status = scoring
        .score(score_request("fraud", huge))
        .await
        .unwrap_err();
    assert_eq!(status.code(), Code::ResourceExhausted, "{status:?}");
    assert!(
        status.message().contains("limits.max_message_bytes"),
        "{status:?}"
    );

    // A body that is not a ScoreRequest (field 1, the route, with bytes that are not UTF-8): INTERNAL, per the table.
    #[derive(Clone, PartialEq, prost::Message)]
    struct NotARequest {
        #[prost(bytes = "vec", tag = "1")]
        route: Vec<u8>,
    }
    let mut raw = tonic::client::Grpc::new(t.channel().await);
    raw.ready().await.unwrap();
    let status = raw
        .unary::<_, pb::ScoreResponse, _>(
            tonic::Request::new(NotARequest {
                route: vec![0xff, 0xfe, 0x00],
            }),
            "/probity.v1.Scoring/Score".parse().unwrap(),
            tonic_prost::ProstCodec::default(),
        )
        .await
        .unwrap_err();
    assert_eq!(status.code(), Code::Internal, "{status:?}");
    let after = t.http_get("/metrics").await.1;
    assert_eq!(
        count(&after, "RESOURCE_EXHAUSTED") - count(&before, "RESOURCE_EXHAUSTED"),
        1.0,
        "{after}"
    );
    assert_eq!(
        count(&after, "INTERNAL") - count(&before, "INTERNAL"),
        1.0,
        "{after}"
    );

    let good = scoring
        .score(score_request("fraud", fraud_row("after")))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(good.prediction_id, "after");
    assert!(good.probability > 0.0 && good.probability < 1.0);
    t.server.shutdown().await;
}
