//! Explanations against the training libraries' own contributions.
//!
//! `tests/fixtures/gen_contrib.py` trains models on scikit-learn's `load_breast_cancer` (Street, Wolberg and
//! Mangasarian 1993), exports them with `probity_export` (format version 2, with cover), and records each
//! reference's per-feature contributions and bias on held-out rows (with missing values, unknown and missing
//! categories, and rows with every feature missing). Here every row is read as text, encoded with the model's
//! schema, explained by `Model::contributions`, and compared with the reference within the tolerance named
//! beside each case. Package versions are in `tests/fixtures/contrib/manifest.json`.

use probity_models::Model;
use serde_json::Value;

fn dir() -> String {
    format!("{}/fixtures/contrib", env!("CARGO_MANIFEST_DIR"))
}

fn read(path: &str) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("reading {path}: {e}"))
}

/// Header and cells of a generator's CSV (no quoting: the generator never needs it).
fn csv(path: &str) -> (Vec<String>, Vec<Vec<String>>) {
    let text = read(path);
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .unwrap_or_else(|| panic!("{path}: empty"))
        .split(',')
        .map(str::to_string)
        .collect();
    let rows = lines
        .map(|l| l.split(',').map(str::to_string).collect::<Vec<_>>())
        .collect();
    (header, rows)
}

fn case_entry(case: &str) -> Value {
    let path = format!("{}/manifest.json", dir());
    let m: Value = serde_json::from_str(&read(&path)).unwrap_or_else(|e| panic!("{path}: {e}"));
    m["cases"]
        .as_array()
        .and_then(|c| c.iter().find(|c| c["case"] == case).cloned())
        .unwrap_or_else(|| panic!("case {case} not in {path}; rerun tests/fixtures/gen_contrib.py"))
}

/// The largest absolute difference between ours and the reference over every row, feature and bias; the
/// check of the sum against our own log-odds; returns the difference so the test can report it.
fn max_difference(case: &str) -> f64 {
    let entry = case_entry(case);
    let model_path = format!("{}/{}", dir(), entry["model"].as_str().unwrap_or_default());
    let model =
        Model::from_json_str(&read(&model_path)).unwrap_or_else(|e| panic!("{model_path}: {e}"));
    let (header, rows) = csv(&format!("{}/{case}/rows.csv", dir()));
    let (c_header, expected) = csv(&format!("{}/{case}/contributions.csv", dir()));
    let schema = model.schema();
    assert_eq!(header[1..].len(), schema.len(), "{case}: rows.csv columns");
    assert_eq!(c_header.last().map(String::as_str), Some("bias"));
    assert_eq!(rows.len(), expected.len(), "{case}: row counts");
    assert!(rows.len() > 100, "{case}: too few rows to mean anything");
    let mut worst = 0.0f64;
    for (i, (cells, want)) in rows.iter().zip(&expected).enumerate() {
        let row: Vec<f64> = cells[1..]
            .iter()
            .enumerate()
            .map(|(f, t)| {
                schema
                    .encode_text(f, t)
                    .unwrap_or_else(|e| panic!("{case} row {i}: {e}"))
            })
            .collect();
        let c = model
            .contributions(&row)
            .unwrap_or_else(|e| panic!("{case} row {i}: {e}"));
        assert!(
            (c.total() - c.log_odds).abs() <= 1e-9,
            "{case} row {i}: contributions sum to {} but the log-odds is {}",
            c.total(),
            c.log_odds
        );
        let want: Vec<f64> = want[1..]
            .iter()
            .map(|t| t.parse().unwrap_or_else(|_| panic!("{case} row {i}: {t}")))
            .collect();
        let ours = c.features.iter().chain(std::iter::once(&c.bias));
        for (k, (o, w)) in ours.zip(&want).enumerate() {
            let d = (o - w).abs();
            assert!(d.is_finite(), "{case} row {i} column {k}: {o} vs {w}");
            worst = worst.max(d);
        }
    }
    eprintln!("{case}: max |contribution difference| = {worst:e}");
    worst
}

#[test]
fn lightgbm_missing_values_and_categories() {
    // LightGBM 4.7.0 `Booster.predict(pred_contrib=True)`: the same algorithm (Lundberg, Erion and Lee 2018,
    // Algorithm 2) in double precision, on integer data counts as cover.
    let d = max_difference("lightgbm_nan_cat");
    assert!(d <= 1e-9, "{d:e}");
}

#[test]
fn xgboost_missing_values() {
    // XGBoost 3.2.0 `Booster.predict(pred_contribs=True)` computes its path weights and sums in float32 (about
    // 7 significant digits), on float32 hessian sums; we use the same covers in f64. With contributions of
    // order 1 and 60 trees, float32 rounding gives differences of order 1e-6; 1e-5 bounds them.
    let d = max_difference("xgboost_nan");
    assert!(d <= 1e-5, "{d:e}");
}

#[test]
fn shap_gradient_boosting() {
    // shap 0.51.0 `TreeExplainer(feature_perturbation="tree_path_dependent")` on scikit-learn 1.9.1
    // `GradientBoostingClassifier` (cover: `tree_.weighted_n_node_samples`), in double precision.
    let d = max_difference("sklearn_gbc");
    assert!(d <= 1e-9, "{d:e}");
}

#[test]
fn shap_hist_gradient_boosting_missing_values() {
    // shap 0.51.0 `TreeExplainer(feature_perturbation="tree_path_dependent")` on scikit-learn 1.9.1
    // `HistGradientBoostingClassifier` (cover: node `count`), in double precision.
    let d = max_difference("sklearn_hgb_nan");
    assert!(d <= 1e-9, "{d:e}");
}
