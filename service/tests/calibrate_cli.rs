//! End-to-end tests of `probity calibrate`: the built binary fits a map from a holdout CSV and writes a model file
//! that loads and carries the map and base rate the library computes from the same rows.
//!
//! The fits themselves are checked against scikit-learn and statsmodels in `tests/tests/fit_reference.rs`; here the
//! holdout is the breast cancer fixture from there (scikit-learn `load_breast_cancer`, Street, Wolberg and
//! Mangasarian 1993), so the command is checked on open data against the library on the same rows.

// Helpers outside #[test] functions are test code too.
#![allow(clippy::unwrap_used)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use probity_models::fit::sampling::dal_pozzolo as dal_pozzolo_rate;
use probity_models::fit::Method;
use probity_models::{Calibration, Model, OutputSpec};
use serde_json::{json, Value};

fn probity(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(args)
        .output()
        .expect("run probity")
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

/// The breast cancer holdout: log-odds and labels.
fn holdout() -> (Vec<f64>, Vec<f64>) {
    let path =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures/fit/breast_cancer_weak.json");
    let doc: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let f = |k: &str| {
        doc[k]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect::<Vec<f64>>()
    };
    (f("log_odds"), f("labels"))
}

/// A one-feature linear model whose margin is the feature times 0.5 on the half-log-odds scale (so the log-odds
/// equal the feature), and the holdout written as CSV with that feature, a margin column and labels.
fn setup(dir: &Path, rows: &[(f64, String)]) -> (PathBuf, PathBuf) {
    let model = json!({
        "format": "probity.model", "format_version": 1, "name": "bc-weak", "version": "1",
        "features": [{"name": "h", "type": "numeric"}],
        "margin_scale": "half_log_odds", "base_rate": 0.5,
        "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": 0.5}}]},
        "calibration": {"temperature": {"t": 3.0}},
    });
    let model_path = dir.join("model.json");
    std::fs::write(&model_path, model.to_string()).unwrap();
    let mut csv = String::from("h,margin,label\n");
    for (h, label) in rows {
        csv.push_str(&format!("{h:?},{:?},{label}\n", h / 2.0));
    }
    let holdout_path = dir.join("holdout.csv");
    std::fs::write(&holdout_path, csv).unwrap();
    (model_path, holdout_path)
}

fn rows() -> Vec<(f64, String)> {
    let (h, y) = holdout();
    h.into_iter()
        .zip(y)
        .map(|(h, y)| (h, format!("{y}")))
        .collect()
}

fn load(path: &Path) -> Model {
    Model::from_json_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

#[test]
fn writes_the_librarys_map_and_the_holdout_base_rate() {
    let dir = tempfile::tempdir().unwrap();
    let (model, holdout_csv) = setup(dir.path(), &rows());
    let (h, y) = holdout();
    let rate = y.iter().sum::<f64>() / y.len() as f64;
    for (method, via_margin) in [
        ("platt", false),
        ("beta", true),
        ("isotonic-strict", false),
        ("temperature", true),
    ] {
        let out = dir.path().join(format!("{method}.json"));
        let mut args = vec![
            "calibrate",
            "--model",
            s(&model),
            "--holdout",
            s(&holdout_csv),
            "--output",
            s(&out),
        ];
        args.extend(["--method", method, "--new-version", "2"]);
        if via_margin {
            args.extend(["--margin-column", "margin"]);
        }
        let o = probity(&args);
        assert!(
            o.status.success(),
            "{method}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
        let written = load(&out);
        // The old temperature map is replaced by one fitted on the raw log-odds.
        let want = Method::from_name(method).unwrap().fit(&h, &y).unwrap();
        assert_eq!(written.calibration(), Some(&want), "{method}");
        assert_eq!(written.base_rate(), rate);
        assert_eq!(written.version(), "2");
    }
}

#[test]
fn auto_explains_its_choice_and_writes_the_report_and_diagram() {
    let dir = tempfile::tempdir().unwrap();
    let (model, holdout_csv) = setup(dir.path(), &rows());
    let (out, report, svg) = (
        dir.path().join("out.json"),
        dir.path().join("r.json"),
        dir.path().join("r.svg"),
    );
    let o = probity(&[
        "calibrate",
        "--model",
        s(&model),
        "--holdout",
        s(&holdout_csv),
        "--output",
        s(&out),
        "--folds",
        "4",
        "--report",
        s(&report),
        "--reliability-svg",
        s(&svg),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    let (h, y) = holdout();
    let sel = probity_models::fit::auto_select(&h, &y, 4, &Method::ALL).unwrap();
    assert!(text.contains(&format!("why: {}", sel.reason)), "{text}");
    assert_eq!(load(&out).calibration(), Some(&sel.calibration));
    let r: Value = serde_json::from_str(&std::fs::read_to_string(report).unwrap()).unwrap();
    assert_eq!(r["method"], sel.method.as_str());
    let before = r["cross_validated"]["before"]["log_loss"].as_f64().unwrap();
    let after = r["cross_validated"]["after"]["log_loss"].as_f64().unwrap();
    assert!(after < before, "{after} vs {before}");
    assert!(std::fs::read_to_string(svg).unwrap().starts_with("<svg"));
}

/// Negative under-sampling at rate 0.1: the written base rate is Dal Pozzolo et al.'s (2015)
/// `beta p_s / (beta p_s - p_s + 1)` of the holdout's share, and the map is shifted by ln 0.1; probabilities of
/// the new file equal the formula applied to the unshifted map's.
#[test]
fn negative_sampling_rate_writes_the_population_base_rate() {
    let dir = tempfile::tempdir().unwrap();
    let (model, holdout_csv) = setup(dir.path(), &rows());
    let out = dir.path().join("out.json");
    let o = probity(&[
        "calibrate",
        "--model",
        s(&model),
        "--holdout",
        s(&holdout_csv),
        "--output",
        s(&out),
        "--method",
        "platt",
        "--negative-sampling-rate",
        "0.1",
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let (h, y) = holdout();
    let ps = y.iter().sum::<f64>() / y.len() as f64;
    let written = load(&out);
    assert!((written.base_rate() - dal_pozzolo_rate(ps, 0.1)).abs() < 1e-15);
    let unshifted = Method::Platt.fit(&h, &y).unwrap();
    for &hi in h.iter().take(20) {
        let p_s = probity_models::link::sigmoid(unshifted.apply(hi));
        let got = written
            .score(&[hi], &OutputSpec::default())
            .unwrap()
            .probability;
        assert!((got - dal_pozzolo_rate(p_s, 0.1)).abs() < 1e-12);
    }
    assert!(matches!(
        written.calibration(),
        Some(Calibration::Platt { .. })
    ));
}

#[test]
fn bad_holdouts_are_refused_with_the_row_named() {
    let dir = tempfile::tempdir().unwrap();
    let mut r = rows();
    r[6].1 = "nan".into();
    let (model, holdout_csv) = setup(dir.path(), &r);
    let out = dir.path().join("out.json");
    let o = probity(&[
        "calibrate",
        "--model",
        s(&model),
        "--holdout",
        s(&holdout_csv),
        "--output",
        s(&out),
    ]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !o.status.success() && err.contains("row 7 (line 8), column `label`"),
        "{err}"
    );
    assert!(!out.exists());

    let one_class: Vec<(f64, String)> = (0..10).map(|i| (f64::from(i), "1".to_string())).collect();
    let (model, holdout_csv) = setup(dir.path(), &one_class);
    let o = probity(&[
        "calibrate",
        "--model",
        s(&model),
        "--holdout",
        s(&holdout_csv),
        "--output",
        s(&out),
    ]);
    assert!(String::from_utf8_lossy(&o.stderr).contains("all 10 labels are 1"));

    let few: Vec<(f64, String)> = (0..3)
        .map(|i| (f64::from(i), format!("{}", i % 2)))
        .collect();
    let (model, holdout_csv) = setup(dir.path(), &few);
    let o = probity(&[
        "calibrate",
        "--model",
        s(&model),
        "--holdout",
        s(&holdout_csv),
        "--output",
        s(&out),
    ]);
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("5 folds for 3 rows"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}
