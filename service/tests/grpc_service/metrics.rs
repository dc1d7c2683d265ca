//! The monitoring endpoint's content: the metric families the issue asks for, with route/model/version labels.
//! (The exposition format itself is checked with a real parser in `tests/e2e`.)

use crate::fixtures::*;

#[tokio::test]
async fn metrics_carry_route_model_and_version() {
    let t = TestServer::start(false).await;
    let mut scoring = t.scoring().await;
    for i in 0..5 {
        scoring
            .score(score_request(
                "credit",
                named(
                    &format!("m{i}"),
                    &[
                        ("income", Value::Num(40.0 + i as f64)),
                        ("region", Value::Cat("north")),
                    ],
                ),
            ))
            .await
            .unwrap();
    }
    let _ = scoring
        .score(score_request("nope", fraud_row("")))
        .await
        .unwrap_err();
    let (code, body) = t.http_get("/metrics").await;
    assert_eq!(code, 200);
    let has = |prefix: &str, parts: &[&str]| {
        body.lines()
            .any(|l| l.starts_with(prefix) && parts.iter().all(|p| l.contains(p)))
    };
    let route = [
        "route=\"credit\"",
        "model=\"grpc-credit\"",
        "version=\"v1\"",
    ];
    assert!(has("probity_predictions_total{", &route), "{body}");
    assert!(has("probity_prediction_probability_bucket{", &route));
    assert!(has("probity_prediction_log_odds_bucket{", &route));
    assert!(has(
        "probity_grpc_requests_total{",
        &["method=\"Score\"", "route=\"credit\"", "code=\"OK\""]
    ));
    assert!(
        has(
            "probity_grpc_requests_total{",
            &["route=\"(unknown)\"", "code=\"NOT_FOUND\""]
        ),
        "unknown routes share one label"
    );
    assert!(has(
        "probity_grpc_request_duration_seconds_bucket{",
        &["method=\"Score\"", "le=\""]
    ));
    assert!(has(
        "probity_model_loads_total{",
        &["model=\"grpc-credit\""]
    ));
    assert!(has(
        "probity_model_info{",
        &["model=\"grpc-fraud\"", "version=\"v1\""]
    ));
    assert!(has("probity_route_ready{", &["route=\"orphan\""]));
    assert!(has("probity_build_info{", &["version=\""]));
    assert!(body.contains("# TYPE probity_predictions_total counter"));
    t.server.shutdown().await;
}
