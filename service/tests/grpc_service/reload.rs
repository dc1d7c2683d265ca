//! Hot reload: a model file replaced while requests are in flight, by the Reload call and by the file watch; a
//! corrupt replacement keeps the old version serving and is reported.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use probity::serve::proto as pb;

use crate::fixtures::*;

/// Scores in a loop until told to stop (and at most `limit` times); returns the versions seen and the errors.
async fn hammer(
    t: &TestServer,
    stop: Arc<AtomicBool>,
    limit: usize,
) -> tokio::task::JoinHandle<(Vec<String>, Vec<String>)> {
    let mut client = t.scoring().await;
    tokio::spawn(async move {
        let (mut versions, mut errors) = (Vec::new(), Vec::new());
        for i in 0..limit {
            if stop.load(Ordering::Relaxed) && i > 0 {
                break;
            }
            match client
                .score(score_request("fraud", fraud_row(&format!("h{i}"))))
                .await
            {
                Ok(r) => versions.push(r.into_inner().model_version),
                Err(s) => errors.push(format!("{:?} {}", s.code(), s.message())),
            }
        }
        (versions, errors)
    })
}

async fn serving_version(
    models: &mut pb::models_client::ModelsClient<tonic::transport::Channel>,
) -> String {
    let list = models
        .list_routes(pb::ListRoutesRequest {})
        .await
        .unwrap()
        .into_inner();
    list.routes
        .into_iter()
        .find(|r| r.name == "fraud")
        .unwrap()
        .model_version
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn replacing_a_model_under_load() {
    let t = TestServer::start(true).await;
    let mut models = t.models_client().await;
    let mut scoring = t.scoring().await;
    let stop = Arc::new(AtomicBool::new(false));
    let mut workers = Vec::new();
    for _ in 0..4 {
        workers.push(hammer(&t, Arc::clone(&stop), 20_000).await);
    }

    // 1. A new version, written atomically over the same file name, taken in by the Reload call.
    t.put_model("grpc-fraud-v1.json", &fraud_model_text("v2", 2.0));
    let reload = models
        .reload(pb::ReloadRequest {})
        .await
        .unwrap()
        .into_inner();
    let line = reload
        .files
        .iter()
        .find(|f| f.file == "grpc-fraud-v1.json")
        .unwrap();
    // The watcher may have loaded it first; either way v2 is what the file holds now.
    assert!(
        line.outcome == pb::ReloadOutcome::Loaded as i32
            || line.outcome == pb::ReloadOutcome::Unchanged as i32,
        "{line:?}"
    );
    assert_eq!(line.model_version, "v2");
    let after = scoring
        .score(score_request("fraud", fraud_row("after-v2")))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(after.model_version, "v2");
    assert_eq!(after.margin, -2.0 + 2.0 + 0.75, "the new tree leaf is used");

    // 2. A corrupt replacement (cut short mid-document): reported, counted, and v2 keeps serving.
    let text = fraud_model_text("v3", 3.0);
    std::fs::write(
        t.models.path().join("grpc-fraud-v1.json"),
        &text[..text.len() / 2],
    )
    .unwrap();
    let reload = models
        .reload(pb::ReloadRequest {})
        .await
        .unwrap()
        .into_inner();
    let line = reload
        .files
        .iter()
        .find(|f| f.file == "grpc-fraud-v1.json")
        .unwrap();
    assert_eq!(line.outcome, pb::ReloadOutcome::Failed as i32, "{line:?}");
    assert!(
        line.error.contains("line"),
        "a syntax error names its line: {}",
        line.error
    );
    assert_eq!(
        (line.model.as_str(), line.model_version.as_str()),
        ("grpc-fraud", "v2"),
        "still serving"
    );
    let list = models
        .list_routes(pb::ListRoutesRequest {})
        .await
        .unwrap()
        .into_inner();
    assert_eq!(list.problems.len(), 1);
    assert_eq!(list.problems[0].file, "grpc-fraud-v1.json");
    let (_, metrics) = t.http_get("/metrics").await;
    assert!(
        metrics.lines().any(
            |l| l.starts_with("probity_model_load_failures_total{file=\"grpc-fraud-v1.json\"}")
        ),
        "failure counted"
    );

    // 3. Well-formed but breaking a rule: the error names the JSON path.
    let mut doc: serde_json::Value = serde_json::from_str(&fraud_model_text("v3", 3.0)).unwrap();
    doc["base_rate"] = 1.5.into();
    t.put_model("grpc-fraud-v1.json", &doc.to_string());
    let reload = models
        .reload(pb::ReloadRequest {})
        .await
        .unwrap()
        .into_inner();
    let line = reload
        .files
        .iter()
        .find(|f| f.file == "grpc-fraud-v1.json")
        .unwrap();
    assert_eq!(line.outcome, pb::ReloadOutcome::Failed as i32);
    assert!(line.error.contains("base_rate"), "{}", line.error);
    assert_eq!(serving_version(&mut models).await, "v2");

    // 4. A good file again, picked up by the file watch alone (no Reload call): poll until it serves.
    t.put_model("grpc-fraud-v1.json", &fraud_model_text("v4", 4.0));
    let mut seen = String::new();
    for _ in 0..200 {
        seen = serving_version(&mut models).await;
        if seen == "v4" {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(50)).await;
    }
    assert_eq!(seen, "v4", "the file watch picks up the new version");

    stop.store(true, Ordering::Relaxed);
    let mut total = 0;
    for w in workers {
        let (versions, errors) = w.await.unwrap();
        assert!(
            errors.is_empty(),
            "requests failed during reload: {errors:?}"
        );
        assert!(
            versions
                .iter()
                .all(|v| ["v1", "v2", "v4"].contains(&v.as_str())),
            "{versions:?}"
        );
        total += versions.len();
    }
    assert!(total > 0);
    let last = scoring
        .score(score_request("fraud", fraud_row("last")))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(last.model_version, "v4");
    t.server.shutdown().await;
}

#[tokio::test]
async fn a_second_file_with_the_same_model_name_is_a_reported_conflict() {
    let t = TestServer::start(false).await;
    t.put_model("grpc-fraud-copy.json", &fraud_model_text("v9", 9.0));
    let reports = t.server.reload().await.unwrap();
    let copy = reports
        .iter()
        .find(|r| r.file == "grpc-fraud-copy.json")
        .unwrap();
    assert!(
        copy.error
            .as_deref()
            .unwrap_or_default()
            .contains("also in file `grpc-fraud-v1.json`"),
        "{copy:?}"
    );
    let mut scoring = t.scoring().await;
    let r = scoring
        .score(score_request("fraud", fraud_row("")))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(
        r.model_version, "v1",
        "the file already serving keeps the name"
    );

    // Remove the serving file: the other one takes over.
    std::fs::remove_file(t.models.path().join("grpc-fraud-v1.json")).unwrap();
    t.server.reload().await.unwrap();
    let r = scoring
        .score(score_request("fraud", fraud_row("")))
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.model_version, "v9");
    t.server.shutdown().await;
}
