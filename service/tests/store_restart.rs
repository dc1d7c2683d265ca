//! Restart: the real `probity serve` binary is killed with SIGKILL after predictions (logged, as the Report call
//! confirms) and outcomes (acknowledged by RecordOutcomes, which answers after its commit), started again on the
//! same data directory, and the report is the same; sending the same outcomes again changes nothing, and a held
//! outcome still matches when its prediction finally arrives.
//!
//! Durability setting under test: `log.durability = "normal"` (WAL, no flush per commit), which keeps everything
//! committed across a killed process; only a power loss could cost the last commits (DEVELOPERS.md).

#![allow(clippy::unwrap_used)]

use std::process::{Child, Command, Stdio};
use std::time::Duration;

use probity::serve::proto as pb;
use serde_json::Value;

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

struct Server {
    child: Child,
    url: String,
}

async fn start(config: &std::path::Path) -> Server {
    let port = free_port();
    let mut child = Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(["serve", "--config"])
        .arg(config)
        .args(["--grpc-listen", &format!("127.0.0.1:{port}")])
        .args(["--metrics-listen", &format!("127.0.0.1:{}", free_port())])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let url = format!("http://127.0.0.1:{port}");
    for _ in 0..300 {
        if tonic::transport::Channel::from_shared(url.clone())
            .unwrap()
            .connect()
            .await
            .is_ok()
        {
            return Server { child, url };
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    child.kill().unwrap();
    child.wait().unwrap();
    panic!("the server did not start");
}

impl Server {
    async fn clients(
        &self,
    ) -> (
        pb::scoring_client::ScoringClient<tonic::transport::Channel>,
        pb::outcomes_client::OutcomesClient<tonic::transport::Channel>,
    ) {
        let ch = tonic::transport::Channel::from_shared(self.url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        (
            pb::scoring_client::ScoringClient::new(ch.clone()),
            pb::outcomes_client::OutcomesClient::new(ch),
        )
    }

    fn kill(mut self) {
        // SIGKILL: no drain, no flush.
        self.child.kill().unwrap();
        self.child.wait().unwrap();
    }
}

fn rows(range: std::ops::Range<usize>) -> Vec<pb::Row> {
    range
        .map(|i| pb::Row {
            prediction_id: format!("p-{i}"),
            features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                values: vec![(i as f64 - 100.0) / 40.0],
            })),
            ..Default::default()
        })
        .collect()
}

/// The rule that makes the labels: deterministic, both classes, not a function of the score alone.
fn label(i: usize) -> bool {
    i.is_multiple_of(3) || i > 150
}

fn outcomes(range: std::ops::Range<usize>) -> Vec<pb::Outcome> {
    range
        .map(|i| pb::Outcome {
            prediction_id: format!("p-{i}"),
            label: label(i),
            outcome_time_unix_ms: 0,
        })
        .collect()
}

async fn report(o: &mut pb::outcomes_client::OutcomesClient<tonic::transport::Channel>) -> Value {
    let r = o
        .report(pb::ReportRequest::default())
        .await
        .unwrap()
        .into_inner();
    serde_json::from_str(&r.json).unwrap()
}

#[tokio::test]
async fn sigkill_loses_nothing_acknowledged_and_matching_stays_exactly_once() {
    let models = tempfile::tempdir().unwrap();
    std::fs::write(
        models.path().join("linear.json"),
        r#"{"format": "probity.model", "format_version": 1, "name": "linear", "version": "1",
            "features": [{"name": "x", "type": "numeric"}], "margin_scale": "log_odds", "base_rate": 0.5,
            "linear": {"intercept": 0.25, "terms": [{"numeric": {"feature": 0, "coefficient": 1.5}}]}}"#,
    )
    .unwrap();
    let data = tempfile::tempdir().unwrap();
    let config = data.path().join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nplaintext = \"loopback\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n[log]\ndirectory = {:?}\nflush_interval = \"10ms\"\n\
             [routes.r]\nmodel = \"linear\"\n",
            models.path().display().to_string(),
            data.path().join("log").display().to_string()
        ),
    )
    .unwrap();

    let server = start(&config).await;
    let (mut scoring, mut out) = server.clients().await;
    // An outcome for a prediction that comes only after the restart.
    let held = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(199..200),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(held.results[0].status, pb::OutcomeStatus::Pending as i32);
    scoring
        .score_batch(pb::ScoreBatchRequest {
            route: "r".into(),
            rows: rows(0..199),
        })
        .await
        .unwrap();
    // Predictions are acknowledged by the log once the writer has committed them (within log.flush_interval).
    let mut before = report(&mut out).await;
    for _ in 0..200 {
        if before["series"][0]["predictions"] == 199 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
        before = report(&mut out).await;
    }
    assert_eq!(before["series"][0]["predictions"], 199);
    let first = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(0..150),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(first
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Matched as i32));
    let before = report(&mut out).await;
    server.kill();

    let server = start(&config).await;
    let (mut scoring, mut out) = server.clients().await;
    let after = report(&mut out).await;
    assert_eq!(
        after["series"], before["series"],
        "the same report after SIGKILL"
    );
    assert_eq!(after["series"][0]["with_outcome"], 150);
    assert_eq!(after["outcomes"]["pending"], 1);
    let again = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(0..150),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(again
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Duplicate as i32));
    assert_eq!(
        report(&mut out).await["series"],
        before["series"],
        "nothing counted twice"
    );

    // The held outcome matches its prediction, scored now.
    scoring
        .score_batch(pb::ScoreBatchRequest {
            route: "r".into(),
            rows: rows(199..200),
        })
        .await
        .unwrap();
    let mut last = report(&mut out).await;
    for _ in 0..200 {
        if last["series"][0]["with_outcome"] == 151 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
        last = report(&mut out).await;
    }
    assert_eq!(last["series"][0]["with_outcome"], 151);
    assert_eq!(last["outcomes"]["pending"], 0);
    server.kill();
}
