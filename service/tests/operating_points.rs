//! Operating points in live reports: `probity report` on a store in which one route's predictions were served
//! under threshold 0.3 and then 0.5, one under a cost rule and one under score bands. Each section shows one entry
//! per decision rule the predictions were served under (read from the rule the store kept with each, not from a
//! configuration), with its counts, and the figures equal
//! - the confusion counts taken by hand in this test from the same rows (declined when p > threshold), and
//! - scikit-learn's `sklearn.metrics.confusion_matrix`, `precision_score` and `recall_score` at thresholds 0.1,
//!   0.3, 0.5, 0.7 and 0.9, stored in `tests/fixtures/metrics/breast_cancer.json` by
//!   `tests/fixtures/gen_metrics.py` (scikit-learn 1.9.1; `load_breast_cancer`, Street, Wolberg and Mangasarian
//!   1993, scored by a LogisticRegression); the stored probabilities are the fixture's `predict_proba` to the bit;
//! - the expected cost per case `(c_fp FP + c_fn FN) / n` of the cost-matrix decision rule, whose threshold is
//!   `c_fp / (c_fp + c_fn)` (Elkan 2001, "The Foundations of Cost-Sensitive Learning", IJCAI), from
//!   scikit-learn's counts.

#![allow(clippy::unwrap_used)]

use std::collections::BTreeMap;
use std::process::Command;

use probity::store::sqlite::Durability;
use probity::store::{
    decision_words, ModelVersionInfo, OutcomeInput, PredictionRecord, Served, SqliteStore, Store,
};
use probity_models::DecisionRule;
use serde_json::Value;

const T0: i64 = 1_800_000_000_000;
const TOL: f64 = 1e-12;

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../tests/fixtures/metrics/breast_cancer.json"
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

fn num(v: &Value) -> f64 {
    v.as_f64().unwrap_or_else(|| panic!("not a number: {v}"))
}

fn close(actual: f64, expected: f64, what: &str) {
    assert!(
        (actual - expected).abs() <= TOL,
        "{what}: expected {expected:?}, got {actual:?}"
    );
}

struct Rows {
    h: Vec<f64>,
    p: Vec<f64>,
    y: Vec<bool>,
}

fn threshold(t: f64) -> String {
    decision_words(&DecisionRule::Threshold { threshold: t })
}

/// Writes the fixture's rows to a store: route `cards` twice (ids `a-*` under threshold 0.3, then `b-*` under 0.5,
/// all with outcomes) and ten more under 0.5 without outcome; `costs` under costs 3 and 7 (threshold 0.3); `bands`
/// under five edges; `plain` under no rule.
fn write_store(dir: &std::path::Path, rows: &Rows) {
    let mut store = SqliteStore::open(dir, Durability::Normal).unwrap();
    store
        .register_model(&ModelVersionInfo {
            model: "m".into(),
            version: "1".into(),
            base_rate: 0.5,
            reference: None,
            features: Vec::new(),
        })
        .unwrap();
    let record =
        |id: String, route: &str, time_ms: i64, i: usize, decision: String| PredictionRecord {
            prediction_id: id,
            route: route.into(),
            model: "m".into(),
            version: "1".into(),
            role: "champion".into(),
            time_ms,
            margin: rows.h[i],
            log_odds: rows.h[i],
            adjusted_log_odds: rows.h[i],
            probability: rows.p[i],
            subject_key: String::new(),
            tags: BTreeMap::new(),
            served: Served {
                prior: Some(0.5),
                decision,
            },
        };
    let n = rows.p.len();
    let costs = decision_words(&DecisionRule::Costs {
        false_positive: 3.0,
        false_negative: 7.0,
    });
    let bands = decision_words(&DecisionRule::Bands {
        edges: vec![0.1, 0.3, 0.5, 0.7, 0.9],
        labels: ["A", "B", "C", "D", "E", "F"].map(String::from).to_vec(),
    });
    let mut records = Vec::new();
    let mut outcomes = Vec::new();
    for i in 0..n {
        let t = T0 + i as i64;
        for (id, route, time, rule) in [
            (format!("a-{i}"), "cards", t, threshold(0.3)),
            (format!("b-{i}"), "cards", t + 10_000, threshold(0.5)),
            (format!("c-{i}"), "costs", t, costs.clone()),
            (format!("d-{i}"), "bands", t, bands.clone()),
            (format!("e-{i}"), "plain", t, String::new()),
        ] {
            outcomes.push(OutcomeInput {
                prediction_id: id.clone(),
                label: rows.y[i],
                time_ms: None,
            });
            records.push(record(id, route, time, i, rule));
        }
    }
    for i in 0..10 {
        records.push(record(
            format!("late-{i}"),
            "cards",
            T0 + 20_000 + i as i64,
            i,
            threshold(0.5),
        ));
    }
    store.insert_predictions(&records).unwrap();
    store.record_outcomes(&outcomes, T0 + 30_000).unwrap();
}

fn report(dir: &std::path::Path, json: bool) -> String {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_probity"));
    cmd.arg("report").arg("--store").arg(dir);
    if json {
        cmd.arg("--json");
    }
    let out = cmd.output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// (tp, fp, tn, fn) by hand: declined when p > t.
fn hand_counts(rows: &Rows, t: f64) -> [usize; 4] {
    let mut c = [0usize; 4];
    for (&p, &y) in rows.p.iter().zip(&rows.y) {
        let i = match (p > t, y) {
            (true, true) => 0,
            (true, false) => 1,
            (false, false) => 2,
            (false, true) => 3,
        };
        c[i] += 1;
    }
    c
}

fn counts_of(point: &Value) -> [usize; 4] {
    [
        "true_positive",
        "false_positive",
        "true_negative",
        "false_negative",
    ]
    .map(|k| point[k].as_u64().unwrap() as usize)
}

/// The fixture's scikit-learn entry at threshold `t`: (tp, fp, tn, fn), precision, recall.
fn sklearn_at(fix: &Value, t: f64) -> ([usize; 4], f64, f64) {
    let e = fix["exact"]["thresholds"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| num(&e["threshold"]) == t)
        .unwrap();
    (
        ["tp", "fp", "tn", "fn"].map(|k| e[k].as_u64().unwrap() as usize),
        num(&e["precision"]),
        num(&e["recall"]),
    )
}

/// The point's counts equal the hand counts and scikit-learn's; its rates, precision and recall follow from them.
fn check_point(point: &Value, rows: &Rows, fix: &Value, t: f64, what: &str) {
    let n = rows.p.len() as f64;
    let counts = counts_of(point);
    assert_eq!(counts, hand_counts(rows, t), "{what}: hand counts");
    let (sk, precision, recall) = sklearn_at(fix, t);
    assert_eq!(counts, sk, "{what}: sklearn.metrics.confusion_matrix");
    close(
        num(&point["precision"]),
        precision,
        &format!("{what}: sklearn.metrics.precision_score"),
    );
    close(
        num(&point["recall"]),
        recall,
        &format!("{what}: sklearn.metrics.recall_score"),
    );
    let declined = (sk[0] + sk[1]) as f64;
    close(
        num(&point["decline_rate"]),
        declined / n,
        &format!("{what}: decline rate"),
    );
    close(
        num(&point["approval_rate"]),
        1.0 - declined / n,
        &format!("{what}: approval rate"),
    );
    close(num(&point["threshold"]), t, &format!("{what}: threshold"));
}

fn section<'a>(doc: &'a Value, route: &str) -> &'a Value {
    doc["series"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["route"] == route)
        .unwrap()
}

#[test]
fn operating_points_per_served_rule_equal_hand_counts_and_scikit_learn() {
    let fix = fixture();
    let rows = Rows {
        h: f64s(&fix["exact"]["log_odds"]),
        p: f64s(&fix["exact"]["probability"]),
        y: fix["labels"]
            .as_array()
            .unwrap()
            .iter()
            .map(|y| y == 1)
            .collect(),
    };
    let n = rows.p.len();
    assert_eq!(n, 569);
    let dir = tempfile::tempdir().unwrap();
    write_store(dir.path(), &rows);
    let doc: Value = serde_json::from_str(&report(dir.path(), true)).unwrap();

    // Threshold 0.3 then 0.5: two entries in the order served, each with its own counts.
    let cards = section(&doc, "cards")["operating_points"]
        .as_array()
        .unwrap_or_else(|| panic!("no operating points in {}", section(&doc, "cards")));
    assert_eq!(cards.len(), 2, "{cards:?}");
    assert_eq!(cards[0]["rule"], "threshold 0.3");
    assert_eq!(cards[1]["rule"], "threshold 0.5");
    assert_eq!(cards[0]["predictions"], n);
    assert_eq!(cards[0]["with_outcome"], n);
    assert_eq!(cards[1]["predictions"], n + 10, "ten without outcome");
    assert_eq!(cards[1]["with_outcome"], n);
    let positives = rows.y.iter().filter(|&&y| y).count();
    assert_eq!(cards[0]["positives"], positives);
    assert_eq!(cards[0]["first_ms"], T0);
    assert_eq!(cards[1]["last_ms"], T0 + 20_009);
    check_point(&cards[0]["point"], &rows, &fix, 0.3, "threshold 0.3");
    check_point(&cards[1]["point"], &rows, &fix, 0.5, "threshold 0.5");
    // A threshold rule carries no costs: none is assumed.
    assert!(cards[0]["point"]["expected_cost"].is_null());
    assert!(cards[0]["costs"].is_null());

    // The cost rule: threshold 3 / (3 + 7) = 0.3 (Elkan 2001); expected cost (3 FP + 7 FN) / n from scikit-learn's
    // confusion matrix at 0.3.
    let costs = section(&doc, "costs")["operating_points"]
        .as_array()
        .unwrap();
    assert_eq!(costs.len(), 1);
    assert_eq!(costs[0]["rule"], "costs false_positive=3 false_negative=7");
    assert_eq!(num(&costs[0]["costs"]["false_positive"]), 3.0);
    assert_eq!(num(&costs[0]["costs"]["false_negative"]), 7.0);
    let point = &costs[0]["point"];
    check_point(point, &rows, &fix, 0.3, "costs 3, 7");
    let (sk, _, _) = sklearn_at(&fix, 0.3);
    close(
        num(&point["expected_cost"]),
        (3.0 * sk[1] as f64 + 7.0 * sk[3] as f64) / n as f64,
        "expected cost per case, Elkan 2001 with sklearn.metrics.confusion_matrix counts",
    );

    // Bands at 0.1, 0.3, 0.5, 0.7, 0.9: each band's cases and positives are differences of scikit-learn's counts at
    // its edges; declining a band and every band above is the point at its lower edge; declining from the first
    // declines everything.
    let bands = section(&doc, "bands")["operating_points"]
        .as_array()
        .unwrap();
    assert_eq!(bands.len(), 1);
    let b = bands[0]["bands"].as_array().unwrap();
    assert_eq!(b.len(), 6);
    assert!(bands[0]["point"].is_null());
    let edges = [0.1, 0.3, 0.5, 0.7, 0.9];
    // Declined (tp + fp) and tp above each edge, with everything above 0 and nothing above 1.
    let mut above = vec![(n, positives)];
    for &e in &edges {
        let (c, _, _) = sklearn_at(&fix, e);
        above.push((c[0] + c[1], c[0]));
    }
    above.push((0, 0));
    for i in 0..6 {
        let cases = above[i].0 - above[i + 1].0;
        let pos = above[i].1 - above[i + 1].1;
        assert_eq!(b[i]["count"], cases, "band {i} cases");
        assert_eq!(b[i]["positives"], pos, "band {i} positives");
        close(
            num(&b[i]["positive_rate"]),
            pos as f64 / cases as f64,
            "band positive rate",
        );
        if i > 0 {
            check_point(
                &b[i]["declining_from_here"],
                &rows,
                &fix,
                edges[i - 1],
                &format!("declining band {i} and above"),
            );
        }
    }
    let all = &b[0]["declining_from_here"];
    assert_eq!(num(&all["decline_rate"]), 1.0);
    assert_eq!(num(&all["recall"]), 1.0);
    close(
        num(&all["precision"]),
        positives as f64 / n as f64,
        "precision of declining everything = base rate",
    );

    // No rule served: no operating points.
    assert_eq!(
        section(&doc, "plain")["operating_points"]
            .as_array()
            .unwrap()
            .len(),
        0
    );

    // The table shows both thresholds of `cards` with their pair counts.
    let text = report(dir.path(), false);
    assert!(text.contains("operating points"), "{text}");
    let line = |rule: &str| {
        text.lines()
            .find(|l| l.trim_start().starts_with(rule))
            .unwrap_or_else(|| panic!("no line for {rule} in\n{text}"))
            .split_whitespace()
            .collect::<Vec<_>>()
            .join(" ")
    };
    let (c3, _, _) = sklearn_at(&fix, 0.3);
    let d3 = (c3[0] + c3[1]) as f64 / n as f64;
    assert_eq!(
        line("threshold 0.3"),
        format!(
            "threshold 0.3 {n} {:.4} {:.4} {:.4} {:.4} -",
            1.0 - d3,
            d3,
            num(&cards[0]["point"]["precision"]),
            num(&cards[0]["point"]["recall"])
        )
    );
    assert!(line("threshold 0.5").starts_with(&format!("threshold 0.5 {n} ")));
    assert!(line("costs false_positive=3")
        .ends_with(&format!("{:.6}", num(&costs[0]["point"]["expected_cost"]))));
}
