//! End-to-end tests of the live `probity demo`: the built binary starts the real gRPC server on loopback, drives
//! the generated transactions through a gRPC client, and prints the summary.
//!
//! The answers are checked bit for bit against `probity score` on the same generated rows (whose output is checked
//! against `probity_models::Model::score` in `tests/cli.rs`, and the library against scikit-learn, LightGBM and
//! XGBoost in its own tests), and against the offline demo; the server's own prediction counter is checked against
//! the client's count.

#![allow(clippy::unwrap_used)]

use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

/// The demo's default generator seed (`DEMO_SEED` in `src/cli/demo/mod.rs`).
const DEMO_SEED: &str = "20251103";

fn probity(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(args)
        .output()
        .expect("run probity")
}

/// Runs probity and insists on success, showing stderr otherwise; returns stdout.
fn ok(args: &[&str]) -> String {
    let o = probity(args);
    assert!(
        o.status.success(),
        "probity {args:?} failed:\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    String::from_utf8(o.stdout).unwrap()
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

fn demo_model(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo")
        .join(name)
}

fn read_csv(path: &Path) -> (csv::StringRecord, Vec<csv::StringRecord>) {
    let mut r = csv::Reader::from_path(path).unwrap();
    let header = r.headers().unwrap().clone();
    let rows = r.records().map(|x| x.unwrap()).collect();
    (header, rows)
}

fn col(header: &csv::StringRecord, name: &str) -> usize {
    header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column {name} in {header:?}"))
}

/// The text after `key` (after `prefix` when `key` is empty) on the first line that starts with `prefix`.
fn after<'a>(text: &'a str, prefix: &str, key: &str) -> &'a str {
    let key = if key.is_empty() { prefix } else { key };
    let line = text
        .lines()
        .find(|l| l.starts_with(prefix))
        .unwrap_or_else(|| panic!("no line starting {prefix:?} in:\n{text}"));
    let at = line
        .find(key)
        .unwrap_or_else(|| panic!("no {key:?} in {line:?}"));
    line[at + key.len()..].trim()
}

#[test]
fn live_demo_answers_equal_probity_score_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let live = dir.path().join("live.csv");
    let text = ok(&[
        "demo",
        "--rows",
        "2000",
        "--exit-after-run",
        "--write-scored",
        s(&live),
    ]);
    // Addresses, traffic, no failures, every row answered on both routes, cautions last.
    assert!(
        after(&text, "gRPC server", "").starts_with("127.0.0.1:"),
        "{text}"
    );
    assert!(
        after(&text, "metrics", "").starts_with("http://127.0.0.1:"),
        "{text}"
    );
    assert!(
        after(&text, "requests", "").ends_with(", 0 failed"),
        "{text}"
    );
    assert!(
        after(&text, "rows", "").starts_with("4000 scored"),
        "{text}"
    );
    for want in [
        "p50",
        "p99",
        "ScoreBatch (100 rows)",
        "Score (1 row)",
        "AUC",
        "reflection is on",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }
    assert!(
        text.trim_end()
            .lines()
            .last()
            .unwrap()
            .contains("decision support"),
        "{text}"
    );

    // The offline demo scores the same rows in process: the files must be identical.
    let offline = dir.path().join("offline.csv");
    ok(&[
        "demo",
        "--offline",
        "--rows",
        "2000",
        "--write-scored",
        s(&offline),
    ]);
    assert!(
        std::fs::read(&live).unwrap() == std::fs::read(&offline).unwrap(),
        "live and offline scored files differ"
    );

    // `probity score` on the same generated rows, with the route's target base rate as printed (in full).
    let rate = after(&text, "route card-fraud ", "target base rate");
    let rate: f64 = rate.parse().unwrap();
    let input = dir.path().join("input.csv");
    ok(&[
        "generate-demo-data",
        "--rows",
        "2000",
        "--seed",
        DEMO_SEED,
        "--output",
        s(&input),
    ]);
    let (lh, lrows) = read_csv(&live);
    assert_eq!(lrows.len(), 2000);
    for model in ["harbourline-fraud-trees", "harbourline-fraud-scorecard"] {
        let out = dir.path().join(format!("{model}.csv"));
        ok(&[
            "score",
            "-q",
            "--model",
            s(&demo_model(&format!("{model}.json"))),
            "--input",
            s(&input),
            "--output",
            s(&out),
            "--target-base-rate",
            &rate.to_string(),
        ]);
        let (sh, srows) = read_csv(&out);
        assert_eq!(srows.len(), lrows.len());
        let columns: Vec<&str> = sh.iter().filter(|c| *c != "id").collect();
        assert!(columns.contains(&"probability"), "{sh:?}");
        for (i, (a, b)) in lrows.iter().zip(&srows).enumerate() {
            assert_eq!(&a[col(&lh, "id")], &b[col(&sh, "id")]);
            for c in &columns {
                // Both sides print the shortest text that reads back to the same bits.
                assert_eq!(
                    &a[col(&lh, &format!("{model}.{c}"))],
                    &b[col(&sh, c)],
                    "row {i}, {model}.{c}"
                );
            }
        }
    }
}

#[test]
fn live_demo_serves_given_models_on_routes_named_after_them() {
    let model = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/small-trees.json");
    let text = ok(&[
        "demo",
        "--rows",
        "300",
        "--exit-after-run",
        "--connections",
        "1",
        "--batch-rows",
        "7",
        "--model",
        s(&model),
    ]);
    assert!(
        after(&text, "route test-card-trees", "->").starts_with("test-card-trees"),
        "{text}"
    );
    assert!(
        after(&text, "requests", "").ends_with(", 0 failed"),
        "{text}"
    );
    assert!(after(&text, "rows", "").starts_with("300 scored"), "{text}");
    assert!(text.contains("ScoreBatch (7 rows)"), "{text}");
}

/// One plain HTTP/1.0 GET; returns the body.
fn http_get(addr: &str, path: &str) -> String {
    let mut stream = std::net::TcpStream::connect(addr).unwrap();
    write!(stream, "GET {path} HTTP/1.0\r\nHost: {addr}\r\n\r\n").unwrap();
    let mut response = String::new();
    stream.read_to_string(&mut response).unwrap();
    assert!(response.starts_with("HTTP/1."), "{response}");
    assert!(
        response.lines().next().unwrap().contains(" 200 "),
        "{response}"
    );
    response
        .split_once("\r\n\r\n")
        .map(|(_, body)| body.to_string())
        .unwrap_or_default()
}

#[test]
fn live_demo_keeps_serving_until_sigterm_then_stops_cleanly() {
    let mut child = Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(["demo", "--rows", "200"])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    let mut text = String::new();
    // The summary ends with the cautions line; the server is still up after it.
    for line in lines.by_ref() {
        let line = line.unwrap();
        text.push_str(&line);
        text.push('\n');
        if line.contains("decision support") {
            break;
        }
    }
    let metrics = after(&text, "metrics", "http://")
        .trim_end_matches("/metrics")
        .to_string();
    let body = http_get(&metrics, "/metrics");
    // The server counted the same predictions the client received: 200 rows on each of 2 routes.
    let served: f64 = body
        .lines()
        .filter(|l| l.starts_with("probity_predictions_total{"))
        .map(|l| l.rsplit(' ').next().unwrap().parse::<f64>().unwrap())
        .sum();
    assert_eq!(served, 400.0, "{body}");
    http_get(&metrics, "/readyz");

    let status = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(status.success());
    let exit = child.wait().unwrap();
    assert!(exit.success(), "demo exited with {exit:?} after SIGTERM");
}
