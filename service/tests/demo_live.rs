//! End-to-end tests of the live `probity demo`: the built binary starts the real gRPC server on loopback, drives
//! the generated transactions through a gRPC client, and prints the summary.
//!
//! The answers are checked bit for bit against `probity score` on the same generated rows (whose output is checked
//! against `probity_models::Model::score` in `tests/cli.rs`, and the library against scikit-learn, LightGBM and
//! XGBoost in its own tests), and against the offline demo; the server's own prediction counter is checked against
//! the client's count. The outcome loop is checked against the log itself: every row is either matched or immature,
//! the printed report's figures equal `probity_models::metrics` on the scored rows that have an outcome in the log
//! (those functions are checked against scikit-learn in `tests/tests/metrics_reference.rs`) and equal
//! `probity report --json`; the printed verdict equals `probity compare --json`; the pictures parse as SVG.

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

/// The `n` numbers after `label` (a column per model) in the printed report.
fn columns(text: &str, label: &str) -> Vec<f64> {
    let line = text
        .lines()
        .find(|l| l.starts_with(&format!("  {label}  ")))
        .unwrap_or_else(|| panic!("no report line {label:?} in:\n{text}"));
    line[2 + label.len()..]
        .split_whitespace()
        .map(|v| v.parse().unwrap())
        .collect()
}

/// Checks the outcome loop of a demo run of `rows` rows with the embedded models (champion trees, silent
/// scorecard challenger on route `card-fraud`).
fn closes_the_loop(text: &str, scored: &Path, log_dir: &Path, svg_dir: &Path, rows: u64) {
    // Outcomes: every one sent got a result, none refused.
    let sent_line = after(text, "outcomes  ", "");
    let sent: u64 = sent_line.split(' ').next().unwrap().parse().unwrap();
    let transactions: u64 = after(text, "outcomes  ", "sent for")
        .split(' ')
        .next()
        .unwrap()
        .parse()
        .unwrap();
    assert_eq!(sent, 2 * transactions, "two routes: {sent_line}");
    let results = text
        .lines()
        .find(|l| l.contains("RecordOutcomeStream:"))
        .unwrap();
    let numbers: Vec<u64> = results
        .split(|c: char| !c.is_ascii_digit())
        .filter_map(|w| w.parse().ok())
        .collect();
    // batch, calls, stream, matched, held, other
    assert_eq!(numbers[0] + numbers[2], sent, "{results}");
    assert_eq!(numbers[3] + numbers[4], sent, "{results}");
    assert_eq!(numbers[5], 0, "{results}");

    // Champion and challenger: every prediction storeged, each matched or immature.
    let predictions = columns(text, "predictions");
    let matched = columns(text, "with outcome");
    let immature = columns(text, "immature (no outcome yet)");
    assert_eq!(predictions, vec![rows as f64; 2], "{text}");
    assert_eq!(matched, vec![transactions as f64; 2], "{text}");
    assert_eq!(immature, vec![(rows - transactions) as f64; 2], "{text}");

    // The labelled ids, straight from the log file.
    let db = rusqlite::Connection::open(log_dir.join("predictions.db")).unwrap();
    let mut q = db
        .prepare(
            "SELECT p.prediction_id, o.label FROM predictions p JOIN outcomes o USING (prediction_id)
             WHERE p.route = 'card-fraud' AND p.role = 'champion'",
        )
        .unwrap();
    let labelled: std::collections::HashMap<String, bool> = q
        .query_map([], |r| {
            Ok((r.get::<_, String>(0)?, r.get::<_, i64>(1)? == 1))
        })
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    assert_eq!(labelled.len() as u64, transactions);

    // The metrics module on the scored rows with an outcome, per model (trees answered, the scorecard silent
    // with the same target base rate as its own route, so the same bits).
    let (h, scored_rows) = read_csv(scored);
    let mut figures = Vec::new();
    for model in ["harbourline-fraud-trees", "harbourline-fraud-scorecard"] {
        let (mut z, mut p, mut y) = (Vec::new(), Vec::new(), Vec::new());
        for r in &scored_rows {
            let id = format!("card-fraud/{}", &r[col(&h, "id")]);
            if let Some(&label) = labelled.get(&id) {
                assert_eq!(&r[col(&h, "label")] == "1", label, "{id}");
                z.push(
                    r[col(&h, &format!("{model}.adjusted_log_odds"))]
                        .parse::<f64>()
                        .unwrap(),
                );
                p.push(
                    r[col(&h, &format!("{model}.probability"))]
                        .parse::<f64>()
                        .unwrap(),
                );
                y.push(label);
            }
        }
        use probity_models::metrics::{brier_score, log_loss_from_log_odds, roc_auc};
        figures.push([
            y.iter().filter(|&&v| v).count() as f64 / y.len() as f64,
            p.iter().sum::<f64>() / p.len() as f64,
            log_loss_from_log_odds(&z, &y).unwrap(),
            brier_score(&p, &y).unwrap(),
            roc_auc(&p, &y).unwrap(),
        ]);
    }
    for (k, label) in [
        "observed base rate",
        "predicted base rate",
        "log-loss (lower is better)",
        "Brier score (lower is better)",
        "AUC (ranking)",
    ]
    .iter()
    .enumerate()
    {
        let printed = columns(text, label);
        for (side, f) in figures.iter().enumerate() {
            // Printed with six decimals.
            assert!(
                (printed[side] - f[k]).abs() <= 5.1e-7,
                "{label}: {printed:?} vs {f:?}"
            );
        }
    }

    // `probity report` on the same log gives the same figures, KS and ECE included.
    let json: serde_json::Value = serde_json::from_str(&ok(&[
        "report",
        "--store",
        s(log_dir),
        "--route",
        "card-fraud",
        "--json",
    ]))
    .unwrap();
    let ks = columns(text, "KS");
    let ece = columns(text, "ECE (calibration error)");
    for (side, role) in ["champion", "challenger"].iter().enumerate() {
        let series = json["series"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["role"] == *role)
            .unwrap();
        assert_eq!(series["with_outcome"].as_u64(), Some(transactions));
        assert!((series["ks"].as_f64().unwrap() - ks[side]).abs() <= 5.1e-7);
        assert!((series["calibration"]["ece"].as_f64().unwrap() - ece[side]).abs() <= 5.1e-7);
        assert!((series["log_loss"].as_f64().unwrap() - figures[side][2]).abs() <= 1e-12);
    }

    // The comparison: the printed verdict is `probity compare`'s, on every paired id.
    let compare: serde_json::Value = serde_json::from_str(&ok(&[
        "compare",
        "--store",
        s(log_dir),
        "--route",
        "card-fraud",
        "--json",
    ]))
    .unwrap();
    assert_eq!(compare["paired"].as_u64(), Some(rows));
    assert_eq!(compare["paired_with_outcome"].as_u64(), Some(transactions));
    let verdict = compare["verdict"].as_str().unwrap();
    assert_eq!(after(text, "  verdict:", ""), verdict, "{text}");
    for want in [
        "Spearman",
        "log-loss     difference",
        "AUC (DeLong) difference",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }

    // Pictures: three per model and the comparison, each an SVG document.
    let mut names: Vec<String> = std::fs::read_dir(svg_dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    assert_eq!(names.len(), 7, "{names:?}");
    assert!(names.contains(&"card-fraud-compare.svg".to_string()));
    for name in &names {
        let body = std::fs::read_to_string(svg_dir.join(name)).unwrap();
        let doc = roxmltree::Document::parse(&body).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(doc.root_element().tag_name().name(), "svg", "{name}");
        assert!(text.contains(name.as_str()), "{name} not listed");
    }
}

#[test]
fn live_demo_answers_equal_probity_score_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    let live = dir.path().join("live.csv");
    let (log_dir, svg_dir) = (dir.path().join("log"), dir.path().join("svg"));
    let text = ok(&[
        "demo",
        "--rows",
        "2000",
        "--exit-after-run",
        "--write-scored",
        s(&live),
        "--data-dir",
        s(&log_dir),
        "--svg-dir",
        s(&svg_dir),
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
        "(reflection on)",
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

    closes_the_loop(&text, &live, &log_dir, &svg_dir, 2000);

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
            "--full-precision",
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
    let dir = tempfile::tempdir().unwrap();
    let svg_dir = dir.path().join("svg");
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
        "--svg-dir",
        s(&svg_dir),
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
    // One model, no challenger: its report, no comparison, its three pictures.
    assert!(after(&text, "  with outcome", "").parse::<u64>().unwrap() > 0);
    assert!(!text.contains("Challengers.Compare"), "{text}");
    assert_eq!(std::fs::read_dir(&svg_dir).unwrap().count(), 3);
    // After --exit-after-run without --data-dir, "where to look next" lists only what still exists.
    let next = text.split("where to look next").nth(1).unwrap();
    assert!(
        !next.contains("http://"),
        "a stopped server listed:\n{next}"
    );
    assert!(
        !next.contains("config ") && !next.contains("probity report --store"),
        "{next}"
    );
    assert!(next.contains("pictures  3 SVG files"), "{next}");
    assert!(next.contains("--data-dir keeps the store"), "{next}");
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
    let svg = tempfile::tempdir().unwrap();
    let mut child = Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(["demo", "--rows", "200", "--svg-dir"])
        .arg(svg.path())
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
