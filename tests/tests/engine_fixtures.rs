//! The scoring engine against the training libraries' own predictions.
//!
//! `tests/fixtures/generate.py` trains models with scikit-learn, LightGBM and XGBoost on open data shipped in
//! packages (scikit-learn's `load_breast_cancer`: Street, Wolberg and Mangasarian 1993; statsmodels'
//! `spector`: Spector and Mazzeo 1980), writes them with the Python exporter `probity_export`, and records each
//! library's raw margin and probability on a set of rows: held-out rows, rows with missing values and unknown
//! categories, and rows placed on and next to split thresholds. Here every row is read as text, encoded with
//! the model's schema, and scored by the engine; the margin and the probability must match the library's within
//! the tolerance named beside each case. Package versions are in `tests/fixtures/cases/manifest.json`.

use std::collections::BTreeSet;
use std::fmt::Write as _;

use probity_models::{Model, OutputSpec};
use serde_json::Value;

/// Allowed absolute differences for one case.
struct Tolerance {
    margin: f64,
    probability: f64,
}

fn fixtures_dir() -> String {
    format!("{}/fixtures", env!("CARGO_MANIFEST_DIR"))
}

fn read(path: &str) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("reading {path}: {e}"))
}

fn manifest() -> Value {
    let path = format!("{}/cases/manifest.json", fixtures_dir());
    serde_json::from_str(&read(&path)).unwrap_or_else(|e| panic!("parsing {path}: {e}"))
}

fn manifest_entry(case: &str) -> Value {
    let m = manifest();
    let cases = m["cases"]
        .as_array()
        .unwrap_or_else(|| panic!("manifest has no `cases` array"));
    cases
        .iter()
        .find(|c| c["case"] == case)
        .cloned()
        .unwrap_or_else(|| {
            panic!("case {case} is not in the manifest; rerun tests/fixtures/generate.py")
        })
}

/// A CSV file written by the generator: a header and rows of plain cells. The generator never needs quoting
/// (no commas, quotes or newlines in names or cells), so a quote here means the file is not one of ours.
struct Csv {
    header: Vec<String>,
    rows: Vec<Vec<String>>,
}

fn read_csv(path: &str) -> Csv {
    let text = read(path);
    assert!(
        !text.contains('"'),
        "{path}: quoted CSV cells are not expected in fixtures"
    );
    let mut lines = text.lines();
    let header: Vec<String> = lines
        .next()
        .unwrap_or_else(|| panic!("{path}: empty file"))
        .split(',')
        .map(str::to_string)
        .collect();
    let rows: Vec<Vec<String>> = lines
        .enumerate()
        .map(|(i, line)| {
            let cells: Vec<String> = line.split(',').map(str::to_string).collect();
            assert_eq!(
                cells.len(),
                header.len(),
                "{path}: line {} has {} cells, header has {}",
                i + 2,
                cells.len(),
                header.len()
            );
            cells
        })
        .collect();
    Csv { header, rows }
}

fn parse_f64(text: &str, what: &str) -> f64 {
    text.parse()
        .unwrap_or_else(|e| panic!("{what}: `{text}` is not a number: {e}"))
}

/// The largest differences seen in one case, for the report.
#[derive(Default)]
struct Worst {
    margin: f64,
    probability: f64,
}

fn check_case(case: &str, tol: &Tolerance) {
    let entry = manifest_entry(case);
    let dir = fixtures_dir();
    let field = |k: &str| {
        let rel = entry[k]
            .as_str()
            .unwrap_or_else(|| panic!("manifest entry {case}: no `{k}`"));
        format!("{dir}/{rel}")
    };
    let model_path = field("model");
    let model =
        Model::from_json_str(&read(&model_path)).unwrap_or_else(|e| panic!("{model_path}: {e}"));
    assert!(
        model.calibration().is_none(),
        "{case}: fixture models carry no calibration"
    );
    let schema = model.schema();

    let rows = read_csv(&field("rows"));
    let expected = read_csv(&field("expected"));
    assert_eq!(
        rows.header[0], "id",
        "{case}: rows.csv must start with an id column"
    );
    assert_eq!(
        expected.header,
        ["id", "margin", "probability"],
        "{case}: expected.csv header"
    );
    assert_eq!(
        rows.rows.len(),
        expected.rows.len(),
        "{case}: rows.csv and expected.csv differ in length"
    );
    assert_eq!(
        Some(rows.rows.len() as u64),
        entry["n_rows"].as_u64(),
        "{case}: row count differs from the manifest"
    );
    assert!(!rows.rows.is_empty(), "{case}: no rows");

    // CSV column -> feature index; every feature must have a column.
    let columns: Vec<usize> = rows.header[1..]
        .iter()
        .map(|name| {
            schema
                .index_of(name)
                .unwrap_or_else(|| panic!("{case}: column `{name}` is not a feature"))
        })
        .collect();
    let covered: BTreeSet<usize> = columns.iter().copied().collect();
    assert_eq!(
        covered.len(),
        schema.len(),
        "{case}: rows.csv must have one column per feature"
    );

    let mut worst = Worst::default();
    let mut failures = String::new();
    let mut n_failed = 0usize;
    for (row, exp) in rows.rows.iter().zip(&expected.rows) {
        let id = &row[0];
        assert_eq!(id, &exp[0], "{case}: ids out of step");
        let mut dense = vec![f64::NAN; schema.len()];
        for (cell, &feature) in row[1..].iter().zip(&columns) {
            dense[feature] = schema
                .encode_text(feature, cell)
                .unwrap_or_else(|e| panic!("{case}, row {id}: {e}"));
        }
        let want_margin = parse_f64(&exp[1], &format!("{case}, row {id}, expected margin"));
        let want_prob = parse_f64(&exp[2], &format!("{case}, row {id}, expected probability"));
        let margin = model
            .margin(&dense)
            .unwrap_or_else(|e| panic!("{case}, row {id}: {e}"));
        let scored = model
            .score(&dense, &OutputSpec::default())
            .unwrap_or_else(|e| panic!("{case}, row {id}: {e}"));
        assert_eq!(
            margin.to_bits(),
            scored.margin.to_bits(),
            "{case}, row {id}: margin and score disagree"
        );
        let dm = (margin - want_margin).abs();
        let dp = (scored.probability - want_prob).abs();
        worst.margin = worst.margin.max(dm);
        worst.probability = worst.probability.max(dp);
        // A NaN difference is a failure too.
        let outside = |d: f64, t: f64| d.is_nan() || d > t;
        if outside(dm, tol.margin) || outside(dp, tol.probability) {
            n_failed += 1;
            if n_failed <= 20 {
                let _ = writeln!(
                    failures,
                    "  row {id:>4}: margin expected {want_margin:<24?} actual {margin:<24?} | probability expected \
                     {want_prob:<24?} actual {:?}",
                    scored.probability
                );
            }
        }
    }
    println!(
        "{case}: {} rows, max |margin diff| {:e}, max |probability diff| {:e}",
        rows.rows.len(),
        worst.margin,
        worst.probability
    );
    assert!(
        n_failed == 0,
        "{case}: {n_failed} of {} rows outside the tolerance (margin {:e}, probability {:e}); first ones:\n{failures}",
        rows.rows.len(),
        tol.margin,
        tol.probability
    );
}

/// Declares the fixture cases: one `#[test]` each, and [`CASES`] for the manifest check.
macro_rules! fixture_cases {
    ($($name:ident => $tol:expr),+ $(,)?) => {
        /// Every case the fixtures must contain, with its tolerances. A case in the manifest but not here fails
        /// [`manifest_lists_exactly_the_known_cases`], so a new case cannot go unchecked.
        const CASES: &[(&str, Tolerance)] = &[$((stringify!($name), $tol)),+];
        $(
            #[test]
            fn $name() {
                check_case(stringify!($name), &$tol);
            }
        )+
    };
}

fixture_cases! {
    // scikit-learn 1.9.1 GradientBoostingClassifier.decision_function / predict_proba: float64 sums of
    // learning_rate * leaf value in tree order, features compared as float32 (split_precision float32).
    sklearn_gbc_logloss_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // Same estimator with loss="exponential": margin on the half-log-odds scale, predict_proba = expit(2 raw).
    sklearn_gbc_exponential_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // scikit-learn 1.9.1 HistGradientBoostingClassifier.decision_function / predict_proba: float64, NaN and
    // native categorical splits, unknown categories sent with the missing values.
    sklearn_hgb_nan_cat_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    sklearn_hgb_nan_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // A feature present or missing (1.0 or NaN): its splits send non-missing values left with threshold +inf,
    // written "inf" in the file.
    sklearn_hgb_present_flag_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // scikit-learn 1.9.1 LogisticRegression.decision_function / predict_proba: a BLAS dot product in float64,
    // summed in another order than the engine's, so equal to rounding only.
    sklearn_logreg_spector => Tolerance { margin: 1e-9, probability: 1e-9 },
    // scikit-learn 1.9.1 Pipeline(StandardScaler, LogisticRegression).decision_function / predict_proba.
    sklearn_logreg_scaled_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // LightGBM 4.7.0 Booster.predict(raw_score=True) / Booster.predict: double-precision leaf sums, NaN to the
    // default side (missing_type NaN), categorical splits with NaN, negative and unseen codes to the right.
    lightgbm_nan_cat_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // Same with use_missing=false (missing_type None): LightGBM replaces NaN by 0.0 before comparing.
    lightgbm_nan_as_zero_cat_breast_cancer => Tolerance { margin: 1e-9, probability: 1e-9 },
    // XGBoost 3.2.0 Booster.predict(output_margin=True) / Booster.predict: float32 features and thresholds
    // (`x < t`), but the margin is accumulated in float32, so it differs from the engine's float64 sum by float32
    // rounding (about 1e-7 relative per term over 40 trees); the probability is float32 too.
    xgboost_nan_breast_cancer => Tolerance { margin: 1e-5, probability: 1e-5 },
}

#[test]
fn manifest_lists_exactly_the_known_cases() {
    let m = manifest();
    let in_manifest: BTreeSet<String> = m["cases"]
        .as_array()
        .unwrap_or_else(|| panic!("manifest has no `cases` array"))
        .iter()
        .map(|c| {
            c["case"]
                .as_str()
                .unwrap_or_else(|| panic!("case without a name: {c}"))
                .to_string()
        })
        .collect();
    let known: BTreeSet<String> = CASES.iter().map(|(n, _)| (*n).to_string()).collect();
    assert_eq!(
        in_manifest, known,
        "fixture cases and the tolerance table differ"
    );
}
