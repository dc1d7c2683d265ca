//! Calibration maps applied by probity agree with scikit-learn's own calibrators on the same log-odds.
//!
//! Fixtures: `tests/fixtures/calibration/*.json`, written by `tests/fixtures/gen_calibration.py` from
//! scikit-learn 1.9.1 (`CalibratedClassifierCV` with methods sigmoid, isotonic and temperature, and
//! `IsotonicRegression(out_of_bounds="clip")`) on `load_breast_cancer` (Street, Wolberg and Mangasarian 1993).
//! Each case is wrapped in a one-feature linear model whose margin is the log-odds itself, so the whole path
//! (model file -> engine -> calibration -> probability) is exercised.

use probity_models::{Model, OutputSpec};
use serde_json::{json, Value};
use std::path::PathBuf;

fn fixture(name: &str) -> Value {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures/calibration")
        .join(format!("{name}.json"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap()
}

fn wrap(calibration: &Value) -> Model {
    let doc = json!({
        "format": "probity.model",
        "format_version": 1,
        "name": "calibration-check",
        "version": "1",
        "features": [{"name": "h", "type": "numeric"}],
        "margin_scale": "log_odds",
        "base_rate": 0.5,
        "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": 1.0}}]},
        "calibration": calibration,
    });
    Model::from_json_str(&doc.to_string()).unwrap()
}

/// Largest absolute difference between probity's probabilities and the library's, over all rows.
fn max_difference(name: &str) -> f64 {
    let doc = fixture(name);
    let model = wrap(&doc["calibration"]);
    let h = doc["log_odds"].as_array().unwrap();
    let expected = doc["probabilities"].as_array().unwrap();
    assert_eq!(h.len(), expected.len());
    let mut worst: f64 = 0.0;
    for (i, (h, want)) in h.iter().zip(expected).enumerate() {
        let got = model
            .score(&[h.as_f64().unwrap()], &OutputSpec::default())
            .unwrap()
            .probability;
        let want = want.as_f64().unwrap();
        let d = (got - want).abs();
        assert!(
            d <= 1e-12,
            "{name} row {i}: probity {got:e}, scikit-learn {want:e}, difference {d:e}"
        );
        worst = worst.max(d);
    }
    worst
}

/// scikit-learn 1.9.1 `CalibratedClassifierCV(method="sigmoid")`: Platt (1999) sigmoid on the decision function.
#[test]
fn platt_matches_scikit_learn() {
    max_difference("platt");
}

/// scikit-learn 1.9.1 `CalibratedClassifierCV(method="isotonic")`: `IsotonicRegression` on the decision function,
/// predicting by linear interpolation and clipping outside the fitted range.
#[test]
fn isotonic_on_log_odds_matches_scikit_learn() {
    max_difference("isotonic_log_odds");
}

/// scikit-learn 1.9.1 `IsotonicRegression(out_of_bounds="clip")` fitted on the uncalibrated probabilities.
#[test]
fn isotonic_on_probability_matches_scikit_learn() {
    max_difference("isotonic_probability");
}

/// scikit-learn 1.9.1 `CalibratedClassifierCV(method="temperature")` (Guo et al. 2017), converted as
/// `t = 1 / (2 beta_)` because the library scales the pair (-h, h).
#[test]
fn temperature_matches_scikit_learn() {
    max_difference("temperature");
}
