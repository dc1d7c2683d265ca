//! A full disk under a running server, on a real file system: the log directory is on a 16 MiB tmpfs mounted in
//! the server's own mount namespace, filled to the last page by a ballast file and freed again.
//!
//! While the disk is full: every scoring call is answered; every prediction is either in the log or counted as
//! dropped with `reason="disk_full"` (scored = written + dropped, exactly); an outcome call is refused with
//! RESOURCE_EXHAUSTED and records nothing; reports still answer; each kind of failure is logged once, however many
//! batches fail. When the ballast is removed the log resumes by itself: new predictions are written, the outcomes
//! refused before are accepted and match the predictions logged before the disk filled, and each recovery is logged
//! once.

use std::io::Write;
use std::time::Duration;

use probity::serve::proto as pb;

use crate::common::*;

/// Writes zeros to `path` until the file system says it is full; panics if it has not after `limit` bytes (so a
/// mistake in the mount can never fill the real disk).
fn fill(path: &std::path::Path, limit: u64) -> u64 {
    let mut file = std::fs::File::create(path).unwrap();
    let chunk = vec![0u8; 64 * 1024];
    let mut written = 0u64;
    loop {
        assert!(
            written <= limit,
            "wrote {written} bytes without filling the tmpfs: not on the test's mount"
        );
        match file.write(&chunk) {
            Ok(0) => panic!("zero-byte write"),
            Ok(n) => written += n as u64,
            Err(e) if e.kind() == std::io::ErrorKind::StorageFull => return written,
            Err(e) => panic!("ballast: {e}"),
        }
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "needs root to mount a tmpfs: .ci/run (as root) runs it with --ignored"]
async fn a_full_disk_is_a_counted_logging_failure_scoring_goes_on_and_the_log_resumes() {
    if !mounts_allowed("full disk") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    std::fs::write(models.join("linear.json"), linear_model("1")).unwrap();
    let mount = dir.path().join("disk");
    std::fs::create_dir(&mount).unwrap();
    let config = dir.path().join("probity.toml");
    write_config(
        &config,
        &models,
        &format!(
            "directory = {:?}\nflush_interval = \"5ms\"",
            mount.join("log").display().to_string()
        ),
        &["disk"],
    );
    let server = spawn(serve_on_tmpfs(&config, &mount, "16m", ""));
    let root = inside(server.pid(), &mount);
    assert!(
        root.join("log").join("predictions.db").exists() && !mount.join("log").exists(),
        "the log must be on the server's tmpfs, not on the test's disk"
    );
    let channel = server.channel().await;
    let scoring = pb::scoring_client::ScoringClient::new(channel.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(channel);
    let route = [("route", "disk")];
    let written = |text: &str| sample(text, "probity_store_predictions_written_total", &route);
    let dropped = |text: &str, reason: &str| {
        sample(
            text,
            "probity_store_predictions_dropped_total",
            &[("route", "disk"), ("reason", reason)],
        )
    };
    let score = |prefix: &'static str, range: std::ops::Range<usize>| {
        let mut scoring = scoring.clone();
        async move {
            for start in range.clone().step_by(100) {
                let end = (start + 100).min(range.end);
                let answer = scoring
                    .score_batch(pb::ScoreBatchRequest {
                        explain: 0,
                        route: "disk".into(),
                        rows: rows(prefix, start..end),
                    })
                    .await
                    .unwrap()
                    .into_inner();
                assert_eq!(answer.results.len(), end - start);
            }
        }
    };
    let limit = Duration::from_secs(120);

    // Before: 300 predictions logged.
    score("a", 0..300).await;
    wait_until("300 predictions written", limit, || async {
        written(&server.metrics().await) == 300.0
    })
    .await;

    // The disk fills up.
    let ballast = root.join("ballast");
    let filled = fill(&ballast, 17 * 1024 * 1024);
    assert!(filled > 8 * 1024 * 1024, "the ballast took {filled} bytes");

    // Scoring goes on; the log counts what it cannot write.
    score("b", 0..1000).await;
    wait_until("every prediction written or counted", limit, || async {
        let m = server.metrics().await;
        written(&m) + sample(&m, "probity_store_predictions_dropped_total", &route) == 1300.0
    })
    .await;
    let m = server.metrics().await;
    assert_eq!(written(&m), 300.0, "nothing written to a full disk");
    assert_eq!(dropped(&m, "disk_full"), 1000.0, "{m}");
    let failed_batches = sample(
        &m,
        "probity_store_write_failures_total",
        &[("operation", "predictions"), ("reason", "disk_full")],
    );
    assert!(failed_batches >= 1.0, "{m}");
    assert_eq!(
        sample(
            &m,
            "probity_store_write_failing",
            &[("operation", "predictions")]
        ),
        1.0
    );

    // An outcome call cannot be recorded: the caller is told, with a retryable code, and nothing is kept.
    let refused = outcomes.record_outcomes(outcomes_a()).await.unwrap_err();
    assert_eq!(
        refused.code(),
        tonic::Code::ResourceExhausted,
        "{refused:?}"
    );
    assert!(
        refused.message().contains("disk is full"),
        "{}",
        refused.message()
    );
    // Reports still answer from what was logged.
    let report = outcomes
        .report(pb::ReportRequest::default())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.series[0].predictions, 300);
    assert_eq!(report.series[0].with_outcome, 0);

    // More failing batches, still one line per kind.
    score("b", 1000..1500).await;
    wait_until("the second full-disk round counted", limit, || async {
        dropped(&server.metrics().await, "disk_full") == 1500.0
    })
    .await;
    let m = server.metrics().await;
    assert!(
        sample(
            &m,
            "probity_store_write_failures_total",
            &[("operation", "predictions")]
        ) > failed_batches,
        "more batches failed"
    );
    let failures = server.logged("prediction store write failed");
    assert_eq!(
        server.write_failure_kinds(),
        [
            ("outcomes".to_string(), "disk_full".to_string()),
            ("predictions".to_string(), "disk_full".to_string())
        ],
        "one line per failing operation and reason: {failures:?}"
    );
    assert!(failures.iter().all(|v| v["level"] == "ERROR"));

    // Space returns: the log resumes without a restart.
    std::fs::remove_file(&ballast).unwrap();
    score("c", 0..300).await;
    wait_until("the log resumed", limit, || async {
        written(&server.metrics().await) == 600.0
    })
    .await;
    let accepted = outcomes
        .record_outcomes(outcomes_a())
        .await
        .unwrap()
        .into_inner();
    assert!(accepted
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Matched as i32 && r.predictions_matched == 1));
    let report = outcomes
        .report(pb::ReportRequest::default())
        .await
        .unwrap()
        .into_inner();
    assert_eq!(report.series[0].predictions, 600, "A and C, none of B");
    assert_eq!(report.series[0].with_outcome, 300);
    let m = server.metrics().await;
    assert_eq!(dropped(&m, "disk_full"), 1500.0, "nothing more dropped");
    for op in ["predictions", "outcomes"] {
        assert_eq!(
            sample(&m, "probity_store_write_failing", &[("operation", op)]),
            0.0
        );
    }
    let resumed: Vec<String> = server
        .logged("prediction store writes succeed again")
        .iter()
        .map(|v| v["operation"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(resumed.len(), 2, "{resumed:?}");
    assert!(
        resumed.contains(&"predictions".to_string()) && resumed.contains(&"outcomes".to_string())
    );
    assert_eq!(server.logged("prediction store write failed").len(), 2);

    // No crash: a clean stop.
    assert!(server.terminate().success());
}

/// Outcomes for the 300 predictions `a-0..a-299`, every third positive.
fn outcomes_a() -> pb::RecordOutcomesRequest {
    pb::RecordOutcomesRequest {
        outcomes: (0..300)
            .map(|i| pb::Outcome {
                prediction_id: format!("a-{i}"),
                label: i % 3 == 0,
                outcome_time_unix_ms: 0,
            })
            .collect(),
    }
}
