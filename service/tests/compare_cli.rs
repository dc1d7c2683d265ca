//! `probity compare` on a log file written by the store: the champion's and challenger's predictions of the compare
//! fixture under shared ids (plus unpaired ones on each side), outcomes for all but the first 400 ids. The JSON
//! equals the reference values of `tests/fixtures/gen_compare.py` (independent NumPy/SciPy implementations of DeLong,
//! DeLong and Clarke-Pearson 1988 and Diebold and Mariano 1995, on scikit-learn's `load_breast_cancer`) computed on
//! the same cases; the table states the verdict, "not enough outcomes yet" included; the SVG is well-formed XML with
//! both reliability curves and the difference histogram.

#![allow(clippy::unwrap_used)]

use std::collections::BTreeMap;
use std::process::Command;

use probity::store::sqlite::Durability;
use probity::store::{ModelVersionInfo, OutcomeInput, PredictionRecord, SqliteStore, Store};
use serde_json::Value;

const TOL: f64 = 1e-9;

fn close(actual: f64, expected: f64, what: &str) {
    assert!(
        (actual - expected).abs() <= TOL * expected.abs().max(1.0),
        "{what}\n  expected {expected:?}\n  actual   {actual:?}"
    );
}

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../tests/fixtures/compare/breast_cancer.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

fn write_log(dir: &std::path::Path, labelled_from: usize) -> Value {
    let fix = fixture();
    let v = fix["variants"]["exact"].clone();
    let (ha, hb) = (
        f64s(&v["champion_log_odds"]),
        f64s(&v["challenger_log_odds"]),
    );
    let y: Vec<bool> = v["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x == 1)
        .collect();
    let mut store = SqliteStore::open(dir, Durability::Normal).unwrap();
    for m in ["lr", "gb"] {
        store
            .register_model(&ModelVersionInfo {
                model: m.into(),
                version: "1".into(),
                base_rate: 0.5,
                reference: None,
                features: Vec::new(),
            })
            .unwrap();
    }
    let record = |id: String, model: &str, role: &str, h: f64| PredictionRecord {
        prediction_id: id,
        route: "fraud".into(),
        model: model.into(),
        version: "1".into(),
        role: role.into(),
        time_ms: 1_800_000_000_000,
        margin: h,
        log_odds: h,
        adjusted_log_odds: h,
        probability: 1.0 / (1.0 + (-h).exp()),
        subject_key: String::new(),
        tags: BTreeMap::new(),
        served: Default::default(),
    };
    let mut records = Vec::new();
    for i in 0..ha.len() {
        records.push(record(format!("id-{i}"), "lr", "champion", ha[i]));
        records.push(record(format!("id-{i}"), "gb", "challenger", hb[i]));
    }
    // Unpaired predictions on each side are counted, not compared.
    records.push(record("only-champion".into(), "lr", "champion", 0.3));
    records.push(record("only-challenger".into(), "gb", "challenger", -0.3));
    store.insert_predictions(&records).unwrap();
    let outcomes: Vec<OutcomeInput> = (labelled_from..ha.len())
        .map(|i| OutcomeInput {
            prediction_id: format!("id-{i}"),
            label: y[i],
            time_ms: None,
        })
        .collect();
    store.record_outcomes(&outcomes, 1_800_000_100_000).unwrap();
    v
}

fn compare(args: &[&str]) -> (String, std::process::Output) {
    let out = Command::new(env!("CARGO_BIN_EXE_probity"))
        .arg("compare")
        .args(args)
        .output()
        .unwrap();
    (String::from_utf8_lossy(&out.stdout).into_owned(), out)
}

#[test]
fn compare_json_table_and_svg() {
    let dir = tempfile::tempdir().unwrap();
    let v = write_log(dir.path(), 0);
    let log = dir.path().to_str().unwrap();
    let (stdout, out) = compare(&[
        "--store",
        log,
        "--route",
        "fraud",
        "--threshold",
        "0.5",
        "--json",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let r: Value = serde_json::from_str(&stdout).unwrap();
    assert_eq!(
        (r["champion"].as_str(), r["challenger"].as_str()),
        (Some("lr"), Some("gb"))
    );
    assert_eq!(
        (r["paired"].as_u64(), r["paired_with_outcome"].as_u64()),
        (Some(569), Some(569))
    );
    assert_eq!(r["champion_predictions"].as_u64(), Some(570));
    let g = &r["agreement"];
    // scipy.stats.spearmanr; numpy PSI at the champion's deciles with shares floored at 1e-4.
    close(
        g["spearman"].as_f64().unwrap(),
        v["agreement"]["spearman"].as_f64().unwrap(),
        "spearman",
    );
    close(
        g["psi"].as_f64().unwrap(),
        v["agreement"]["psi"].as_f64().unwrap(),
        "psi",
    );
    close(
        g["decision_flips"]["share"].as_f64().unwrap(),
        v["agreement"]["flips"][1]["share"].as_f64().unwrap(),
        "flips at 0.5",
    );
    let o = &r["outcomes"];
    // DeLong et al. (1988) by the pair sum; Diebold and Mariano (1995); sklearn brier_score_loss.
    close(
        o["delong"]["z"].as_f64().unwrap(),
        v["delong"]["z"].as_f64().unwrap(),
        "DeLong z",
    );
    close(
        o["log_loss_test"]["p_value"].as_f64().unwrap(),
        v["log_loss"]["p_value"].as_f64().unwrap(),
        "DM p",
    );
    close(
        o["challenger"]["brier"].as_f64().unwrap(),
        v["brier"]["challenger"].as_f64().unwrap(),
        "Brier",
    );
    assert_eq!(r["verdict_code"], "no_clear_difference");
    assert_eq!(r["fixed_sample_verdict_code"], "no_clear_difference");
    // The always-valid figures come from the reference tests' estimates and standard errors through the
    // normal-mixture boundary (probity_models::monitor::normal_mixture; its formula is written out against the
    // fixture in challenger_grpc.rs).
    let options = probity_models::monitor::SequentialOptions::default();
    let cases = o["cases"].as_u64().unwrap() as usize;
    let ll = probity_models::monitor::normal_mixture(
        v["log_loss"]["mean"].as_f64().unwrap(),
        v["log_loss"]["standard_error"].as_f64().unwrap(),
        cases,
        &options,
    )
    .unwrap();
    let av = &r["always_valid"];
    close(
        av["log_loss"]["lower"].as_f64().unwrap(),
        ll.lower,
        "always-valid lower",
    );
    close(
        av["log_loss"]["upper"].as_f64().unwrap(),
        ll.upper,
        "always-valid upper",
    );
    assert!(av["auc"]["p_value"].as_f64().unwrap() >= v["delong"]["p_value"].as_f64().unwrap());

    // The Newey-West variant: statsmodels OLS HAC with 4 lags, use_correction=False.
    let (stdout, _) = compare(&[
        "--store",
        log,
        "--route",
        "fraud",
        "--newey-west-lag",
        "4",
        "--json",
    ]);
    let r: Value = serde_json::from_str(&stdout).unwrap();
    close(
        r["outcomes"]["log_loss_test"]["standard_error"]
            .as_f64()
            .unwrap(),
        v["log_loss"]["newey_west_standard_error"].as_f64().unwrap(),
        "NW se",
    );

    let svg_path = dir.path().join("cmp.svg");
    let (table, out) = compare(&[
        "--store",
        log,
        "--route",
        "fraud",
        "--svg",
        svg_path.to_str().unwrap(),
    ]);
    assert!(out.status.success());
    assert!(table.contains("verdict: no clear difference"), "{table}");
    assert!(table.contains("always valid"), "{table}");
    assert!(table.contains("Spearman rank correlation"), "{table}");
    let svg = std::fs::read_to_string(&svg_path).unwrap();
    let doc = roxmltree::Document::parse(&svg).unwrap();
    let class = |c: &str| {
        doc.descendants()
            .filter(|n| n.attribute("class") == Some(c))
            .count()
    };
    assert_eq!(
        (class("champion"), class("challenger"), class("diagonal")),
        (1, 1, 1)
    );
    assert_eq!(class("bar"), 30);
    assert_eq!(class("zero"), 1);
}

#[test]
fn few_outcomes_say_so_and_unknown_models_are_named() {
    let dir = tempfile::tempdir().unwrap();
    // Outcomes only for the last 40 ids: fewer than 30 of one class at least.
    write_log(dir.path(), 529);
    let log = dir.path().to_str().unwrap();
    let (table, out) = compare(&["--store", log, "--route", "fraud"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        table.contains("verdict: not enough outcomes yet"),
        "{table}"
    );
    let (_, out) = compare(&["--store", log, "--route", "fraud", "--challenger", "nope"]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("no challenger prediction") || err.contains("nope"),
        "{err}"
    );
    let (_, out) = compare(&["--store", log, "--route", "fraud", "--threshold", "2"]);
    assert!(String::from_utf8_lossy(&out.stderr).contains("--threshold"));
}
