//! End to end through the real gRPC service: a route that opts in to `base_rate_from_estimate` moves its target
//! base rate to the live estimate once the window is full, and a route without the option keeps serving exactly
//! what the model says.
//!
//! The model is linear with one feature `h`, coefficient 1, base rate 0.2, so its log-odds are `h`. The rows are
//! simulated: scores from unit-variance normals at +-1.5 (log likelihood ratio `3 x`, equal-variance normal
//! discriminant), population base rate 0.05, `h = 3 x + logit(0.2)`, i.e. probabilities calibrated under the
//! model's 0.2. The Saerens, Latinne and Decaestecker (2002) EM over the window should land near 0.05.

#![allow(clippy::unwrap_used)]

use std::time::Duration;

use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity_models::link::{logit, sigmoid};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde_json::json;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

async fn http_get(addr: std::net::SocketAddr, path: &str) -> String {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(format!("GET {path} HTTP/1.0\r\nHost: test\r\n\r\n").as_bytes())
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text.split_once("\r\n\r\n").unwrap().1.to_string()
}

/// The value of the one sample of `name` with label `route`.
fn gauge(text: &str, name: &str, route: &str) -> Option<f64> {
    text.lines()
        .filter(|l| {
            l.starts_with(&format!("{name}{{")) && l.contains(&format!("route=\"{route}\""))
        })
        .find_map(|l| l.rsplit_once(' ')?.1.parse().ok())
}

/// The probability served for `h = 0` on `route`.
async fn probe(
    scoring: &pb::scoring_client::ScoringClient<tonic::transport::Channel>,
    route: &str,
) -> f64 {
    scoring
        .clone()
        .score(pb::ScoreRequest {
            explain: 0,
            route: route.into(),
            row: Some(row(0.0)),
        })
        .await
        .unwrap()
        .into_inner()
        .probability
}

fn row(h: f64) -> pb::Row {
    pb::Row {
        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
            values: vec![h],
        })),
        ..Default::default()
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn an_opted_in_route_follows_the_estimate_and_another_route_does_not() {
    let models = tempfile::tempdir().unwrap();
    let model = json!({
        "format": "probity.model", "format_version": 1, "name": "m", "version": "1",
        "features": [{"name": "h", "type": "numeric"}],
        "margin_scale": "log_odds", "base_rate": 0.2,
        "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": 1.0}}]}
    });
    std::fs::write(models.path().join("m.json"), model.to_string()).unwrap();
    let data = tempfile::tempdir().unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [store]\ndirectory = {:?}\nflush_interval = \"5ms\"\nprior_window = 10000\n\
             [routes.on]\nmodel = \"m\"\n\
             base_rate_from_estimate = {{ min = 0.001, max = 0.5, min_predictions = 10000 }}\n\
             [routes.off]\nmodel = \"m\"\n",
            models.path().display().to_string(),
            data.path().display().to_string()
        ),
    )
    .unwrap();
    let config = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    let server = probity::serve::start(config).await.unwrap();
    let channel = tonic::transport::Channel::from_shared(format!("http://{}", server.grpc_addr()))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut scoring = pb::scoring_client::ScoringClient::new(channel);
    // Before the window is full both routes serve the model's own probability: sigmoid(0) = 0.5.
    assert_eq!(probe(&scoring, "on").await, 0.5);

    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let noise = Normal::new(0.0, 1.0).unwrap();
    let h: Vec<f64> = (0..10_000)
        .map(|_| {
            let label = rng.random::<f64>() < 0.05;
            3.0 * (if label { 1.5 } else { -1.5 } + noise.sample(&mut rng)) + logit(0.2)
        })
        .collect();
    for route in ["on", "off"] {
        for chunk in h.chunks(1000) {
            scoring
                .score_batch(pb::ScoreBatchRequest {
                    explain: 0,
                    route: route.into(),
                    rows: chunk.iter().map(|&x| row(x)).collect(),
                })
                .await
                .unwrap();
        }
    }

    // Within a few seconds (writer flush, gauge publish every second, the route task every second) the target
    // moves; a probe at h = 0 then answers sigmoid(logit(target) - logit(0.2)) (Elkan 2001, Theorem 2).
    let mut applied = None;
    for _ in 0..150 {
        let text = http_get(server.metrics_addr(), "/metrics").await;
        if let Some(t) = gauge(&text, "probity_effective_target_base_rate", "on") {
            applied = Some(t);
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let target = applied.expect("the effective target gauge appears");
    println!("applied target {target}, truth 0.05");
    // Truth 0.05; 10,000 scores give about 10% relative spread at two standard errors (the report's test asks 10%
    // of the same EM directly; here the probe rows join the window, so 15%).
    assert!(
        (target - 0.05).abs() / 0.05 < 0.15,
        "applied target {target}"
    );
    // Every probe joins the window, so the target may move by a hair between reading the gauge and probing: retry
    // until a probe falls between two equal readings.
    let mut consistent = false;
    for _ in 0..50 {
        let before = gauge(
            &http_get(server.metrics_addr(), "/metrics").await,
            "probity_effective_target_base_rate",
            "on",
        )
        .unwrap();
        let p = probe(&scoring, "on").await;
        let after = gauge(
            &http_get(server.metrics_addr(), "/metrics").await,
            "probity_effective_target_base_rate",
            "on",
        )
        .unwrap();
        if before == after {
            let expected = sigmoid(logit(before) - logit(0.2));
            assert!((p - expected).abs() < 1e-12, "{p} vs {expected}");
            consistent = true;
            break;
        }
    }
    assert!(consistent);
    // The route without the option still serves the model's probability, bit for bit.
    assert_eq!(probe(&scoring, "off").await.to_bits(), 0.5f64.to_bits());
    let text = http_get(server.metrics_addr(), "/metrics").await;
    assert_eq!(
        gauge(&text, "probity_effective_target_base_rate", "off"),
        None
    );

    // The Report RPC carries the estimate beside the configured rate: for `off` (no target) the EM runs under the
    // model's 0.2 over the logged probabilities, the batch rows then the one probe, and equals estimate_prior on
    // the same values.
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(
        tonic::transport::Channel::from_shared(format!("http://{}", server.grpc_addr()))
            .unwrap()
            .connect()
            .await
            .unwrap(),
    );
    let mut off = None;
    for _ in 0..150 {
        let report = outcomes
            .report(pb::ReportRequest {
                route: "off".into(),
                ..Default::default()
            })
            .await
            .unwrap()
            .into_inner();
        if let Some(s) = report.series.into_iter().find(|s| s.predictions == 10_001) {
            off = Some(s);
            break;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    let off = off.expect("all predictions of `off` are logged");
    let mut p: Vec<f64> = h.iter().map(|&x| sigmoid(x)).collect();
    p.push(0.5);
    let direct = probity_models::fit::estimate_prior(&p, 0.2, Default::default())
        .unwrap()
        .prior;
    assert_eq!(off.configured_base_rate, None);
    let reported = off.base_rate_estimate.unwrap();
    println!("reported estimate for `off` {reported}, direct {direct}");
    assert!((reported - direct).abs() < 1e-12, "{reported} vs {direct}");
    server.shutdown().await;
}
