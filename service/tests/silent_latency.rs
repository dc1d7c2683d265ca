//! Measures what one silent challenger costs the response latency: the same unary `Score` calls on a route
//! without a challenger and on a route with one silent challenger, on the same server, interleaved. Prints the
//! median and 99th percentile of each; it asserts nothing about time (timings depend on the machine). Run with
//! `cargo test --release -p probity --test silent_latency -- --ignored --nocapture`.

#![allow(clippy::unwrap_used)]

use std::time::Instant;

use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;

const DEMO: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/demo");

fn quantile(v: &mut [f64], q: f64) -> f64 {
    v.sort_by(f64::total_cmp);
    v[((v.len() - 1) as f64 * q).round() as usize]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "a measurement, not a check; run with --ignored --nocapture"]
async fn one_silent_challenger_latency() {
    let data = tempfile::tempdir().unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [models]\ndirectory = {DEMO:?}\nwatch = false\n\
             [store]\ndirectory = {:?}\n\
             [routes.plain]\nmodel = \"harbourline-fraud-trees\"\nunknown_features = \"ignore\"\n\
             [routes.silent]\nmodel = \"harbourline-fraud-trees\"\nunknown_features = \"ignore\"\n\
             [[routes.silent.challengers]]\nmodel = \"harbourline-fraud-scorecard\"\nmode = \"silent\"\n",
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
    let request = |route: &str, i: usize| pb::ScoreRequest {
        explain: 0,
        route: route.into(),
        row: Some(pb::Row {
            prediction_id: format!("{route}-{i}"),
            subject_key: format!("card-{i}"),
            features: Some(pb::row::Features::Named(pb::NamedFeatures {
                values: Default::default(),
            })),
            ..Default::default()
        }),
    };
    let (mut plain, mut silent) = (Vec::new(), Vec::new());
    for i in 0..6_000usize {
        for (route, out) in [("plain", &mut plain), ("silent", &mut silent)] {
            let t = Instant::now();
            scoring.score(request(route, i)).await.unwrap();
            if i >= 1_000 {
                out.push(t.elapsed().as_secs_f64() * 1e6);
            }
        }
    }
    let (p50, m50) = (quantile(&mut plain, 0.5), quantile(&mut silent, 0.5));
    let (p99, m99) = (quantile(&mut plain, 0.99), quantile(&mut silent, 0.99));
    println!(
        "unary Score, 5000 calls each after 1000 warm-up, microseconds: without challenger median {p50:.1} p99 \
         {p99:.1}; with one silent challenger median {m50:.1} p99 {m99:.1}; median cost {:.1}",
        m50 - p50
    );
    server.shutdown().await;
}
