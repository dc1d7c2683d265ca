//! `probity score`, the binary, on every reference fixture case reproduces the training library's own margin and
//! probability.
//!
//! Fixtures: `tests/fixtures/cases/` and `tests/fixtures/models/`, written by `tests/fixtures/generate.py` with the
//! package versions recorded in `tests/fixtures/cases/manifest.json` (scikit-learn 1.9.1, LightGBM 4.7.0,
//! XGBoost 3.2.0). Expected values are each library's own predict output: scikit-learn `decision_function` and
//! `predict_proba`, LightGBM `Booster.predict(raw_score=True)` and `predict`, XGBoost
//! `Booster.predict(output_margin=True)` and `predict`.

use std::path::{Path, PathBuf};
use std::process::Command;

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures")
}

fn read_csv(path: &Path) -> (csv::StringRecord, Vec<csv::StringRecord>) {
    let mut reader = csv::Reader::from_path(path).unwrap();
    let header = reader.headers().unwrap().clone();
    let rows = reader.records().map(|r| r.unwrap()).collect();
    (header, rows)
}

fn column(header: &csv::StringRecord, name: &str) -> usize {
    header
        .iter()
        .position(|h| h == name)
        .unwrap_or_else(|| panic!("no column {name}"))
}

/// Tolerances: 1e-9 where the library computes in float64 (scikit-learn, LightGBM); 1e-5 for XGBoost, which sums
/// its trees in float32.
fn tolerance(library: &str) -> f64 {
    if library == "xgboost" {
        1e-5
    } else {
        1e-9
    }
}

#[test]
fn probity_score_reproduces_every_library_on_the_fixture_rows() {
    let root = fixtures();
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(root.join("cases/manifest.json")).unwrap())
            .unwrap();
    let cases = manifest["cases"].as_array().unwrap();
    assert!(
        cases.len() >= 9,
        "expected every exporter-supported kind in the manifest"
    );
    let dir = tempfile::tempdir().unwrap();
    let mut report = Vec::new();
    for case in cases {
        let name = case["case"].as_str().unwrap();
        let library = case["library"].as_str().unwrap().to_lowercase();
        let tol = tolerance(&library);
        let out = dir.path().join(format!("{name}.csv"));
        let status = Command::new(env!("CARGO_BIN_EXE_probity"))
            .args([
                "score",
                "--quiet",
                "--keep-training-base-rate",
                "--full-precision",
                "--model",
            ])
            .arg(root.join(case["model"].as_str().unwrap()))
            .arg("--input")
            .arg(root.join(case["rows"].as_str().unwrap()))
            .arg("--output")
            .arg(&out)
            .status()
            .unwrap();
        assert!(status.success(), "{name}: probity score failed");

        let (got_header, got) = read_csv(&out);
        let (want_header, want) = read_csv(&root.join(case["expected"].as_str().unwrap()));
        assert_eq!(got.len(), want.len(), "{name}: row count");
        let (gid, gm, gp) = (
            column(&got_header, "id"),
            column(&got_header, "margin"),
            column(&got_header, "probability"),
        );
        let (wid, wm, wp) = (
            column(&want_header, "id"),
            column(&want_header, "margin"),
            column(&want_header, "probability"),
        );
        let mut worst = (0.0_f64, 0.0_f64);
        for (g, w) in got.iter().zip(&want) {
            assert_eq!(&g[gid], &w[wid], "{name}: row order");
            let dm = (g[gm].parse::<f64>().unwrap() - w[wm].parse::<f64>().unwrap()).abs();
            let dp = (g[gp].parse::<f64>().unwrap() - w[wp].parse::<f64>().unwrap()).abs();
            assert!(
                dm <= tol && dp <= tol,
                "{name} row {}: probity margin {} probability {}, {library} margin {} probability {}",
                &g[gid], &g[gm], &g[gp], &w[wm], &w[wp]
            );
            worst = (worst.0.max(dm), worst.1.max(dp));
        }
        report.push(format!(
            "{name}: {} rows, max |margin diff| {:e}, max |prob diff| {:e}",
            got.len(),
            worst.0,
            worst.1
        ));
    }
    eprintln!("{}", report.join("\n"));
}
