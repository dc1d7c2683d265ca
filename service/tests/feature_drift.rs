//! Per-feature stability on a live server: rows scored through the real gRPC service are counted into the slots of
//! the model file's training distributions (`probity_feature_values_total`), and the PSI computed from a scrape
//! equals the NumPy reference of `tests/fixtures/gen_stability.py` (slot counts by `np.digitize(right=True)`, PSI
//! by its formula, sum (a - e) ln(a / e), Siddiqi 2006, shares floored at 1e-4).
//!
//! The model and the two windows are the fixture's: held-out `load_breast_cancer` rows as they are ("steady"),
//! then the same rows with one feature scaled, one mostly missing and one with an unknown category ("shifted").
//! The steady rows go through `ScoreBatch`, the shifted ones through `Score`, so both counting paths are used.

#![allow(clippy::unwrap_used)]

use std::collections::HashMap;

use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity_models::metrics::EmptyBinRule;
use probity_models::stability::{stability, Slot};
use probity_models::Model;
use serde_json::Value;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

const FIXTURES: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/fixtures/stability");

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

/// The labels and value of every sample of `name` in an exposition.
fn samples(text: &str, name: &str) -> Vec<(HashMap<String, String>, f64)> {
    text.lines()
        .filter_map(|l| {
            let rest = l.strip_prefix(name)?.strip_prefix('{')?;
            let (labels, value) = rest.rsplit_once("} ")?;
            let labels = labels
                .split("\",")
                .filter_map(|kv| {
                    let (k, v) = kv.split_once("=\"")?;
                    Some((k.to_string(), v.trim_end_matches('"').to_string()))
                })
                .collect();
            Some((labels, value.parse().ok()?))
        })
        .collect()
}

/// The slot label the server uses.
fn label(slot: Slot) -> String {
    match slot {
        Slot::Bin(i) => i.to_string(),
        Slot::Missing => "missing".into(),
        Slot::Unknown => "unknown".into(),
    }
}

/// Every feature's slot counts on `route`, in slot order, from one scrape.
fn counts(model: &Model, text: &str, route: &str) -> HashMap<String, Vec<u64>> {
    let all = samples(text, "probity_feature_values_total");
    model
        .training_distributions()
        .map(|(i, d)| {
            let name = model.schema().feature(i).unwrap().name.clone();
            let counts = (0..d.slots())
                .map(|s| {
                    let (_, v) = all
                        .iter()
                        .find(|(l, _)| {
                            l["route"] == route
                                && l["feature"] == name
                                && l["bin"] == label(d.slot(s))
                                && l["model"] == "stability"
                                && l["version"] == "1"
                        })
                        .unwrap_or_else(|| panic!("no series for {name} slot {s}"));
                    *v as u64
                })
                .collect();
            (name, counts)
        })
        .collect()
}

/// Named rows of a fixture CSV (no quoted cells); an empty cell is left out (a missing feature).
fn rows(name: &str) -> Vec<pb::Row> {
    let model = model();
    let text = std::fs::read_to_string(format!("{FIXTURES}/{name}")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    lines
        .map(|line| {
            let mut values: HashMap<String, pb::FeatureValue> = HashMap::new();
            for (h, cell) in header.iter().zip(line.split(',')) {
                let Some(i) = model.schema().index_of(h) else {
                    continue;
                };
                if cell.is_empty() {
                    continue;
                }
                let kind = if model.schema().feature(i).unwrap().is_categorical() {
                    pb::feature_value::Kind::Category(cell.to_string())
                } else {
                    pb::feature_value::Kind::Number(cell.parse().unwrap())
                };
                values.insert(h.to_string(), pb::FeatureValue { kind: Some(kind) });
            }
            // A name the model does not have, with a caller's text: it must never become a label.
            values.insert(
                "caller-invented-feature".into(),
                pb::FeatureValue {
                    kind: Some(pb::feature_value::Kind::Category(
                        "caller-invented-value".into(),
                    )),
                },
            );
            pb::Row {
                features: Some(pb::row::Features::Named(pb::NamedFeatures { values })),
                ..Default::default()
            }
        })
        .collect()
}

fn model() -> Model {
    Model::from_json_str(&std::fs::read_to_string(format!("{FIXTURES}/model.json")).unwrap())
        .unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_shifted_window_raises_the_scraped_psi_to_the_reference() {
    let model = model();
    let reference: Value = serde_json::from_str(
        &std::fs::read_to_string(format!("{FIXTURES}/reference.json")).unwrap(),
    )
    .unwrap();
    let models = tempfile::tempdir().unwrap();
    std::fs::copy(
        format!("{FIXTURES}/model.json"),
        models.path().join("stability.json"),
    )
    .unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [routes.card-auth]\nmodel = \"stability\"\nunknown_features = \"ignore\"\n",
            models.path().display().to_string(),
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

    // Steady window, one batch.
    scoring
        .score_batch(pb::ScoreBatchRequest {
            route: "card-auth".into(),
            rows: rows("steady.csv"),
            explain: 0,
        })
        .await
        .unwrap();
    let first = http_get(server.metrics_addr(), "/metrics").await;
    let steady = counts(&model, &first, "card-auth");
    // The training shares are exported beside the counts, from the model file.
    let shares = samples(&first, "probity_feature_training_share");
    for (i, d) in model.training_distributions() {
        let name = &model.schema().feature(i).unwrap().name;
        for (s, &e) in d.expected().iter().enumerate() {
            let got = shares
                .iter()
                .find(|(l, _)| l["feature"] == *name && l["bin"] == label(d.slot(s)))
                .map(|(_, v)| *v);
            assert_eq!(got, Some(e), "{name} slot {s}");
        }
    }

    // Shifted window, one row per call.
    for row in rows("shifted.csv") {
        scoring
            .score(pb::ScoreRequest {
                route: "card-auth".into(),
                row: Some(row),
                explain: 0,
            })
            .await
            .unwrap();
    }
    let second = http_get(server.metrics_addr(), "/metrics").await;
    let total = counts(&model, &second, "card-auth");
    assert!(
        !second.contains("caller-invented"),
        "a caller's text became a label"
    );

    let rule = EmptyBinRule::Floor(1e-4);
    for (i, d) in model.training_distributions() {
        let name = model.schema().feature(i).unwrap().name.clone();
        let want_steady: Vec<u64> =
            serde_json::from_value(reference["steady"][&name]["counts"].clone()).unwrap();
        let want_shifted: Vec<u64> =
            serde_json::from_value(reference["shifted"][&name]["counts"].clone()).unwrap();
        assert_eq!(steady[&name], want_steady, "{name}: steady counts");
        // The second window is the difference of two scrapes, as `increase()` takes it.
        let window: Vec<u64> = total[&name]
            .iter()
            .zip(&steady[&name])
            .map(|(t, s)| t - s)
            .collect();
        assert_eq!(window, want_shifted, "{name}: shifted counts");
        let before = stability(d, &steady[&name], rule).unwrap();
        let after = stability(d, &window, rule).unwrap();
        let psi = |w: &str| reference[w][&name]["psi"].as_f64().unwrap();
        assert!((before.psi - psi("steady")).abs() <= 1e-12, "{name}");
        assert!((after.psi - psi("shifted")).abs() <= 1e-12, "{name}");
        let changed = ["mean_radius", "mean_texture", "mean_perimeter"].contains(&name.as_str());
        if changed {
            // Past the usual 0.25 (common practice, no single source), from below it.
            assert!(
                before.psi < 0.25 && after.psi > 0.25,
                "{name}: {before:?} -> {after:?}"
            );
        } else {
            assert_eq!(after.psi, before.psi, "{name}: unchanged rows, same PSI");
        }
    }
    server.shutdown().await;
}
