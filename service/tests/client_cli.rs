//! `probity send-outcomes` and `probity score --server` end to end: the real binary against a real server started
//! in the test (prediction store on, the `tests/fixtures/evaluate` champion, a LogisticRegression exported from
//! scikit-learn on `load_breast_cancer`).

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::{Path, PathBuf};
use std::process::Output;

use probity::serve::config::{Config, Sources};

#[path = "support/parquet.rs"]
mod parquet_copy;
use probity::serve::proto as pb;

fn fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/evaluate")
        .join(name)
}

struct Served {
    server: probity::serve::RunningServer,
    _dirs: Vec<tempfile::TempDir>,
}

async fn serve() -> Served {
    let models = tempfile::tempdir().unwrap();
    std::fs::copy(
        fixture("champion.json"),
        models.path().join("champion.json"),
    )
    .unwrap();
    let data = tempfile::tempdir().unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [store]\ndirectory = {:?}\nflush_interval = \"5ms\"\nsweep_interval = \"20ms\"\noutcome_hold = \"1h\"\n\
             [routes.bc]\nmodel = \"breast_cancer_champion\"\n",
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
    Served {
        server,
        _dirs: vec![models, data, conf],
    }
}

/// Runs the binary off the runtime's threads, so the server keeps answering; the child is waited for.
async fn probity(args: Vec<String>) -> Output {
    tokio::task::spawn_blocking(move || {
        std::process::Command::new(env!("CARGO_BIN_EXE_probity"))
            .args(&args)
            .output()
            .unwrap()
    })
    .await
    .unwrap()
}

fn strings(xs: &[&str]) -> Vec<String> {
    xs.iter().map(|s| s.to_string()).collect()
}

fn write(dir: &Path, name: &str, body: &str) -> String {
    let p = dir.join(name);
    std::fs::write(&p, body).unwrap();
    p.to_string_lossy().into_owned()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn send_outcomes_reports_each_status_and_names_bad_rows() {
    let s = serve().await;
    let url = format!("http://{}", s.server.grpc_addr());
    let channel = tonic::transport::Channel::from_shared(url.clone())
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut scoring = pb::scoring_client::ScoringClient::new(channel);
    let rows = (0..3)
        .map(|i| pb::Row {
            prediction_id: format!("p-{i}"),
            features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                values: vec![18.0 + f64::from(i), 0.1, 0.18, 0.06],
            })),
            ..Default::default()
        })
        .collect();
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "bc".into(),
            rows,
        })
        .await
        .unwrap();
    let log = std::sync::Arc::clone(s.server.store().unwrap());
    tokio::task::spawn_blocking(move || log.flush().unwrap())
        .await
        .unwrap();

    let dir = tempfile::tempdir().unwrap();
    let input = write(
        dir.path(),
        "outcomes.csv",
        "prediction_id,label,outcome_time\n\
         p-0,1,2026-12-01T08:30:00Z\n\
         p-1,0,1764577800000\n\
         p-2,true,\n\
         p-0,1,\n\
         p-1,1,\n\
         never-scored,0,\n",
    );
    let out = probity(strings(&[
        "send-outcomes",
        "--server",
        &url,
        "--input",
        &input,
        "--batch-size",
        "2",
    ]))
    .await;
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        text.contains("sent 6 of 6 outcomes: matched 3, duplicate 1, corrected 1, pending 1"),
        "{text}"
    );

    // Bad rows: every one named by row and column, and nothing is sent (p-2 keeps its label: a resend of the good
    // rows would make it a duplicate, not a correction).
    let bad = write(
        dir.path(),
        "bad.csv",
        "prediction_id,label,outcome_time\np-2,0,\np-0,maybe,\n,1,\np-1,1,yesterday\n",
    );
    let out = probity(strings(&[
        "send-outcomes",
        "--server",
        &url,
        "--input",
        &bad,
    ]))
    .await;
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("3 bad rows; nothing was sent"), "{err}");
    assert!(
        err.contains("row 2 (line 3), column `label`: label `maybe`"),
        "{err}"
    );
    assert!(
        err.contains("row 3 (line 4), column `prediction_id`"),
        "{err}"
    );
    assert!(
        err.contains("row 4 (line 5), column `outcome_time`"),
        "{err}"
    );
    let again = write(dir.path(), "again.csv", "prediction_id,label\np-2,1\n");
    let out = probity(strings(&[
        "send-outcomes",
        "--server",
        &url,
        "--input",
        &again,
    ]))
    .await;
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("duplicate 1"), "{text}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn score_through_the_server_writes_what_offline_scoring_writes() {
    let s = serve().await;
    let url = format!("http://{}", s.server.grpc_addr());
    let dir = tempfile::tempdir().unwrap();
    let input = fixture("labelled.csv").to_string_lossy().into_owned();
    let model = fixture("champion.json").to_string_lossy().into_owned();
    let offline = dir
        .path()
        .join("offline.csv")
        .to_string_lossy()
        .into_owned();
    let remote = dir.path().join("remote.csv").to_string_lossy().into_owned();
    let out = probity(strings(&[
        "score",
        "--model",
        &model,
        "--input",
        &input,
        "--output",
        &offline,
        "--keep-training-base-rate",
        "--warnings-column",
        "-q",
    ]))
    .await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // 284 rows in batches of 100: three calls.
    let out = probity(strings(&[
        "score",
        "--server",
        &url,
        "--route",
        "bc",
        "--input",
        &input,
        "--output",
        &remote,
        "--batch-size",
        "100",
        "--warnings-column",
        "-q",
    ]))
    .await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let (a, b) = (
        std::fs::read_to_string(&offline).unwrap(),
        std::fs::read_to_string(&remote).unwrap(),
    );
    assert_eq!(a.lines().count(), 285);
    assert_eq!(a, b, "the server's output differs from offline scoring");

    // The same rows as Parquet, through the server: the same output.
    let pq = dir.path().join("labelled.parquet");
    parquet_copy::to_parquet(Path::new(&input), &pq, |name| match name {
        "id" | "y" => parquet_copy::As::Int,
        _ => parquet_copy::As::Float,
    });
    let remote_pq = dir
        .path()
        .join("remote_pq.csv")
        .to_string_lossy()
        .into_owned();
    let out = probity(strings(&[
        "score",
        "--server",
        &url,
        "--route",
        "bc",
        "--input",
        pq.to_str().unwrap(),
        "--output",
        &remote_pq,
        "--batch-size",
        "100",
        "--warnings-column",
        "-q",
    ]))
    .await;
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(a, std::fs::read_to_string(&remote_pq).unwrap());

    // A bad cell: the same error, naming row and column, from both; no output is left behind.
    let body = std::fs::read_to_string(&input).unwrap();
    let header = body.lines().next().unwrap();
    let col = header.split(',').position(|c| c == "mean_texture").unwrap();
    let mut lines: Vec<String> = body.lines().map(String::from).collect();
    let mut cells: Vec<&str> = lines[2].split(',').collect();
    cells[col] = "abc";
    lines[2] = cells.join(",");
    let bad = write(dir.path(), "bad.csv", &(lines.join("\n") + "\n"));
    let gone = dir.path().join("gone.csv").to_string_lossy().into_owned();
    let off = probity(strings(&[
        "score",
        "--model",
        &model,
        "--input",
        &bad,
        "--output",
        &gone,
        "--keep-training-base-rate",
    ]))
    .await;
    let rem = probity(strings(&[
        "score", "--server", &url, "--route", "bc", "--input", &bad, "--output", &gone,
    ]))
    .await;
    assert!(!off.status.success() && !rem.status.success());
    let (e1, e2) = (
        String::from_utf8_lossy(&off.stderr).into_owned(),
        String::from_utf8_lossy(&rem.stderr).into_owned(),
    );
    assert!(
        e1.contains("row 2 (line 3), column `mean_texture`: `abc` is not a number"),
        "{e1}"
    );
    assert!(
        e2.contains("row 2 (line 3), column `mean_texture`: `abc` is not a number"),
        "{e2}"
    );
    assert!(!Path::new(&gone).exists());

    // The bad cell in a Parquet string column: the same message, by row (a Parquet file has no lines).
    let bad_pq = dir.path().join("bad.parquet");
    parquet_copy::to_parquet(Path::new(&bad), &bad_pq, |name| match name {
        "id" | "y" => parquet_copy::As::Int,
        "mean_texture" => parquet_copy::As::Text,
        _ => parquet_copy::As::Float,
    });
    let bad_pq = bad_pq.to_string_lossy().into_owned();
    let off = probity(strings(&[
        "score",
        "--model",
        &model,
        "--input",
        &bad_pq,
        "--output",
        &gone,
        "--keep-training-base-rate",
    ]))
    .await;
    let rem = probity(strings(&[
        "score", "--server", &url, "--route", "bc", "--input", &bad_pq, "--output", &gone,
    ]))
    .await;
    for out in [off, rem] {
        assert!(!out.status.success());
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("row 2, column `mean_texture`: `abc` is not a number"),
            "{err}"
        );
    }
    assert!(!Path::new(&gone).exists());
}
