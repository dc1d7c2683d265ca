//! End-to-end tests of the offline `probity` commands: each runs the built binary, as a user would.
//!
//! Scores are compared bit for bit with `probity_models::Model::score` on the same rows (the library is checked
//! against scikit-learn, LightGBM and XGBoost in its own tests); the demo generator is checked against the
//! distribution of the number of successes in independent trials.

// Helpers outside #[test] functions are test code too.
#![allow(clippy::unwrap_used)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use probity_models::{Decision, DecisionRule, Model, OutputSpec};

fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data")
        .join(name)
}

fn probity(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(args)
        .output()
        .expect("run probity")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

/// Runs probity and insists on success, showing stderr otherwise.
fn ok(args: &[&str]) -> Output {
    let o = probity(args);
    assert!(
        o.status.success(),
        "probity {args:?} failed:\n{}",
        stderr(&o)
    );
    o
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf-8 path")
}

fn load(name: &str) -> Model {
    Model::from_json_str(&std::fs::read_to_string(data(name)).unwrap()).unwrap()
}

/// Writes `rows` demo transactions from `seed` into `dir`, returns the path.
fn demo_csv(dir: &Path, rows: u64, seed: u64, extra: &[&str]) -> PathBuf {
    let path = dir.join(format!("demo-{rows}-{seed}.csv"));
    let (rows, seed) = (rows.to_string(), seed.to_string());
    let mut args = vec![
        "generate-demo-data",
        "--rows",
        &rows,
        "--seed",
        &seed,
        "--output",
        s(&path),
    ];
    args.extend_from_slice(extra);
    ok(&args);
    path
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

#[test]
fn check_prints_a_summary_of_a_good_model() {
    let model = data("small-trees.json");
    let o = ok(&["check", s(&model)]);
    let text = stdout(&o);
    // The counts are those of the hand-made file: 2 trees of 5 nodes, 3 leaves each, depth 2.
    for want in [
        "test-card-trees 1.0.0",
        "2 trees, 10 nodes, 6 leaves, max depth 2",
        "channel",
        "4 categories: \"chip\", \"contactless\", \"online\", \"phone\"",
        "platt",
        // Metadata one key a line, not one long JSON line.
        "metadata\n  purpose: hand-made model for the command-line tests\n",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }

    let o = ok(&["check", "--json", s(&model)]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["name"], "test-card-trees");
    assert_eq!(v["body"]["kind"], "ensemble");
    assert_eq!(v["body"]["trees"], 2);
    assert_eq!(v["body"]["nodes"], 10);
    assert_eq!(v["body"]["leaves"], 6);
    assert_eq!(v["body"]["max_depth"], 2);
    assert_eq!(v["features"][2]["categories"], 4);
    assert_eq!(v["calibration"]["kind"], "platt");
    assert_eq!(v["calibration"]["a"], 0.9);
    assert_eq!(v["reference_distribution"]["bins"], 4);
    assert_eq!(v["score_scale"]["pdo"], 20.0);
    assert_eq!(v["base_rate"], 0.1);

    let o = ok(&["check", "--json", s(&data("small-scorecard.json"))]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["body"]["kind"], "linear");
    assert_eq!(v["body"]["terms"], 3);
    assert!(v["body"]["engine_bytes"].as_u64().unwrap() > 0);
    assert_eq!(v["margin_scale"], "half_log_odds");
    assert!(v["calibration"].is_null());
}

/// `probity check` names each feature's training distribution (tests/fixtures/stability/model.json, written by
/// tests/fixtures/gen_stability.py: 10 quantile bins; mean_radius has every 5th training value missing, 85 of 426).
#[test]
fn check_shows_training_distributions() {
    let model = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/stability/model.json");
    let text = stdout(&ok(&["check", s(&model)]));
    assert!(
        text.contains(
            "mean_radius       numeric; training distribution: 10 bins, missing 19.95%\n"
        ),
        "{text}"
    );
    assert!(
        text.contains("training distribution: missing 0.00%, unknown 0.00%"),
        "{text}"
    );
    let o = ok(&["check", "--json", s(&model)]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["features"][0]["training_distribution"]["bins"], 10);
    assert_eq!(
        v["features"][0]["training_distribution"]["missing"],
        85.0 / 426.0
    );
    // A file without distributions prints none.
    let o = ok(&["check", "--json", s(&data("small-trees.json"))]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(v["features"][0].get("training_distribution").is_none());
}

#[test]
fn check_refuses_a_broken_model_naming_the_json_path() {
    let o = probity(&["check", s(&data("broken-node.json"))]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert!(err.contains("ensemble.trees[1].nodes[1].left"), "{err}");
    assert!(err.contains("broken-node.json"), "{err}");
    assert!(o.stdout.is_empty());

    let o = probity(&["check", "/no/such/model.json"]);
    assert_eq!(o.status.code(), Some(1));
    assert!(stderr(&o).contains("/no/such/model.json"));
}

/// Scores `input` with the binary and with `Model::score` row by row; every float must agree to the bit.
fn assert_same_as_library(
    model_file: &str,
    input: &Path,
    out: &Path,
    spec: &OutputSpec,
    flags: &[&str],
) -> usize {
    let model_path = data(model_file);
    let mut args = vec![
        "score",
        "--quiet",
        "--full-precision",
        "--model",
        s(&model_path),
        "--input",
        s(input),
        "--output",
        s(out),
    ];
    args.extend_from_slice(flags);
    if !flags.contains(&"--target-base-rate") {
        args.push("--keep-training-base-rate");
    }
    ok(&args);
    let model = load(model_file);
    let (in_header, in_rows) = read_csv(input);
    let (out_header, out_rows) = read_csv(out);
    assert_eq!(in_rows.len(), out_rows.len());
    let schema = model.schema();
    let feature_cols: Vec<usize> = schema
        .features()
        .iter()
        .map(|f| col(&in_header, &f.name))
        .collect();
    let mut positives = 0;
    for (i, (input_row, output_row)) in in_rows.iter().zip(&out_rows).enumerate() {
        let dense: Vec<f64> = feature_cols
            .iter()
            .enumerate()
            .map(|(f, &c)| schema.encode_text(f, &input_row[c]).unwrap())
            .collect();
        let want = model.score(&dense, spec).unwrap();
        let got = |name: &str| output_row[col(&out_header, name)].parse::<f64>().unwrap();
        assert_eq!(
            &output_row[col(&out_header, "id")],
            &input_row[col(&in_header, "id")]
        );
        assert_eq!(got("margin").to_bits(), want.margin.to_bits(), "row {i}");
        assert_eq!(
            got("log_odds").to_bits(),
            want.log_odds.to_bits(),
            "row {i}"
        );
        assert_eq!(
            got("calibrated_log_odds").to_bits(),
            want.calibrated_log_odds.to_bits(),
            "row {i}"
        );
        assert_eq!(
            got("adjusted_log_odds").to_bits(),
            want.adjusted_log_odds.to_bits(),
            "row {i}"
        );
        assert_eq!(
            got("probability").to_bits(),
            want.probability.to_bits(),
            "row {i}"
        );
        match want.score {
            Some(score) => assert_eq!(got("score").to_bits(), score.to_bits(), "row {i}"),
            None => assert!(!out_header.iter().any(|h| h == "score")),
        }
        match &want.decision {
            Some(d) => {
                assert_eq!(
                    &output_row[col(&out_header, "decision")],
                    d.as_str(),
                    "row {i}"
                );
                positives += usize::from(*d == Decision::Positive);
            }
            None => assert!(!out_header.iter().any(|h| h == "decision")),
        }
    }
    positives
}

#[test]
fn score_output_equals_the_library_bit_for_bit() {
    let dir = tempfile::tempdir().unwrap();
    // 3000 rows span several 1024-row blocks and a partial last block.
    let input = demo_csv(dir.path(), 3000, 11, &[]);
    let out = dir.path().join("out.csv");

    let plain = OutputSpec::default();
    assert_same_as_library("small-trees.json", &input, &out, &plain, &[]);
    let shifted = OutputSpec {
        target_base_rate: Some(0.015),
        decision: None,
    };
    assert_same_as_library(
        "small-trees.json",
        &input,
        &out,
        &shifted,
        &["--target-base-rate", "0.015"],
    );
    // The linear model, on half log-odds, with missing card ages routed by its `missing` rule.
    assert_same_as_library(
        "small-scorecard.json",
        &input,
        &out,
        &shifted,
        &["--target-base-rate", "0.015"],
    );

    // --keep-columns copies every input column before the scores.
    ok(&[
        "score",
        "--keep-training-base-rate",
        "-q",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
        "--keep-columns",
    ]);
    let (in_header, in_rows) = read_csv(&input);
    let (out_header, out_rows) = read_csv(&out);
    assert_eq!(
        &out_header.iter().take(in_header.len()).collect::<Vec<_>>(),
        &in_header.iter().collect::<Vec<_>>()
    );
    for (a, b) in in_rows.iter().zip(&out_rows) {
        assert_eq!(
            a.iter().collect::<Vec<_>>(),
            b.iter().take(a.len()).collect::<Vec<_>>()
        );
    }
}

#[test]
fn threshold_and_cost_decisions() {
    let dir = tempfile::tempdir().unwrap();
    let input = demo_csv(dir.path(), 2000, 5, &[]);
    let out = dir.path().join("out.csv");

    // Positive exactly when the probability is above the threshold.
    let rule = DecisionRule::Threshold { threshold: 0.08 };
    let spec = OutputSpec {
        target_base_rate: None,
        decision: Some(rule),
    };
    let positives = assert_same_as_library(
        "small-trees.json",
        &input,
        &out,
        &spec,
        &["--threshold", "0.08"],
    );
    let (h, rows) = read_csv(&out);
    for r in &rows {
        let p: f64 = r[col(&h, "probability")].parse().unwrap();
        assert_eq!(
            &r[col(&h, "decision")],
            if p > 0.08 { "positive" } else { "negative" }
        );
    }
    assert!(
        positives > 0 && positives < rows.len(),
        "both decisions should occur: {positives}"
    );

    // Costs A (false positive) and B (false negative) give the threshold A / (A + B): Elkan (2001), "The
    // foundations of cost-sensitive learning", section 2. Here 1 / (1 + 20).
    let spec = OutputSpec {
        target_base_rate: Some(0.015),
        decision: Some(DecisionRule::Costs {
            false_positive: 1.0,
            false_negative: 20.0,
        }),
    };
    let flags = [
        "--target-base-rate",
        "0.015",
        "--cost-false-positive",
        "1",
        "--cost-false-negative",
        "20",
    ];
    let positives = assert_same_as_library("small-scorecard.json", &input, &out, &spec, &flags);
    let (h, rows) = read_csv(&out);
    for r in &rows {
        let p: f64 = r[col(&h, "probability")].parse().unwrap();
        assert_eq!(
            &r[col(&h, "decision")],
            if p > 1.0 / 21.0 {
                "positive"
            } else {
                "negative"
            }
        );
    }
    assert!(
        positives > 0 && positives < rows.len(),
        "both decisions should occur: {positives}"
    );

    // Rules that make no sense are refused before any row is read.
    let bad = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
        "--threshold",
        "1.5",
    ]);
    assert_eq!(bad.status.code(), Some(1));
    assert!(stderr(&bad).contains("threshold"), "{}", stderr(&bad));
    let both = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        "m",
        "--input",
        "i",
        "--output",
        "o",
        "--threshold",
        "0.5",
        "--cost-false-positive",
        "1",
        "--cost-false-negative",
        "2",
    ]);
    assert!(!both.status.success());
}

#[test]
fn a_bad_cell_is_named_by_row_line_and_column() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("bad.csv");
    std::fs::write(
        &input,
        "id,amount,hour,channel,foreign\na,12.5,3,chip,0\nb,12;5,4,online,1\n",
    )
    .unwrap();
    let out = dir.path().join("out.csv");
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert!(err.contains("row 2 (line 3)"), "{err}");
    assert!(err.contains("column `amount`"), "{err}");
    assert!(err.contains("`12;5`"), "{err}");
    assert!(
        !out.exists(),
        "a failed run must not leave a partial output"
    );

    // A linear term without a missing rule: the row is named too.
    std::fs::write(
        &input,
        "id,amount,channel,card_age_days\na,1,chip,4\nb,2,chip,5\nc,,phone,6\n",
    )
    .unwrap();
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&data("small-scorecard.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert!(
        err.contains("row 3 (line 4)") && err.contains("amount"),
        "{err}"
    );
}

#[test]
fn a_missing_feature_column_is_an_error_unless_allowed() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.csv");
    std::fs::write(
        &input,
        "id,amount,channel,extra\na,10,chip,x\nb,700,phone,y\n",
    )
    .unwrap();
    let out = dir.path().join("out.csv");
    let model = data("small-scorecard.json");
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    assert!(stderr(&o).contains("card_age_days"), "{}", stderr(&o));

    ok(&[
        "score",
        "--keep-training-base-rate",
        "-q",
        "--allow-missing-columns",
        "--full-precision",
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    let m = load("small-scorecard.json");
    let (h, rows) = read_csv(&out);
    for (r, (amount, channel)) in rows.iter().zip([(10.0, 0.0), (700.0, 3.0)]) {
        let want = m
            .score(&[amount, channel, f64::NAN], &OutputSpec::default())
            .unwrap();
        assert_eq!(
            r[col(&h, "probability")].parse::<f64>().unwrap().to_bits(),
            want.probability.to_bits()
        );
    }
}

#[test]
fn demo_data_is_deterministic_for_a_seed() {
    let dir = tempfile::tempdir().unwrap();
    let a = std::fs::read(demo_csv(dir.path(), 5000, 42, &[])).unwrap();
    let other = dir.path().join("again.csv");
    ok(&[
        "generate-demo-data",
        "--rows",
        "5000",
        "--seed",
        "42",
        "--output",
        s(&other),
    ]);
    assert_eq!(a, std::fs::read(&other).unwrap());
    let b = std::fs::read(demo_csv(dir.path(), 5000, 43, &[])).unwrap();
    assert_ne!(a, b);
    // The true-probability column is added without changing the other columns.
    let with_p = demo_csv(dir.path(), 5000, 42, &["--with-true-probability"]);
    let mut out = Vec::new();
    {
        let mut w = csv::Writer::from_writer(&mut out);
        let mut r = csv::Reader::from_path(&with_p).unwrap();
        let h = r.headers().unwrap().clone();
        w.write_record(h.iter().take(h.len() - 1)).unwrap();
        for rec in r.records() {
            let rec = rec.unwrap();
            w.write_record(rec.iter().take(rec.len() - 1)).unwrap();
        }
    }
    assert_eq!(a, out);
}

#[test]
fn demo_fraud_rate_matches_the_generating_model() {
    let dir = tempfile::tempdir().unwrap();
    let n = 200_000;
    let path = demo_csv(dir.path(), n, 7, &["--with-true-probability"]);
    let (h, rows) = read_csv(&path);
    let (label, p) = (col(&h, "label"), col(&h, "true_probability"));
    let (mut frauds, mut mean, mut var) = (0.0, 0.0, 0.0);
    for r in &rows {
        let pi: f64 = r[p].parse().unwrap();
        frauds += r[label].parse::<f64>().unwrap();
        mean += pi;
        var += pi * (1.0 - pi);
    }
    // The count of successes in independent Bernoulli(p_i) trials has mean sum p_i and variance sum p_i (1 - p_i)
    // (Wang 1993, "On the number of successes in independent trials", Statistica Sinica 3). A 4-sigma band is
    // common practice, no single source.
    let sd = var.sqrt();
    assert!(
        (frauds - mean).abs() < 4.0 * sd,
        "frauds {frauds}, expected {mean} +- {sd}"
    );
    // The brief asks for a base rate near 1.5%.
    assert!(
        (mean / n as f64 - 0.015).abs() < 0.003,
        "mean probability {}",
        mean / n as f64
    );

    // Marginals of the documented distributions, each within 4 standard errors (common practice, no single source).
    let nf = n as f64;
    let share = |pred: &dyn Fn(&csv::StringRecord) -> bool| {
        rows.iter().filter(|r| pred(r)).count() as f64 / nf
    };
    let within = |what: &str, got: f64, want: f64, se: f64| {
        assert!(
            (got - want).abs() < 4.0 * se,
            "{what}: got {got}, want {want} +- {se}"
        );
    };
    let bern_se = |q: f64| (q * (1.0 - q) / nf).sqrt();
    within(
        "missing card age",
        share(&|r| r[col(&h, "card_age_days")].is_empty()),
        0.04,
        bern_se(0.04),
    );
    within(
        "missing distance",
        share(&|r| r[col(&h, "distance_km")].is_empty()),
        0.10,
        bern_se(0.10),
    );
    within(
        "foreign",
        share(&|r| &r[col(&h, "foreign")] == "1"),
        0.07,
        bern_se(0.07),
    );
    // Poisson(2): mean 2, variance 2.
    let counts: f64 = rows
        .iter()
        .map(|r| r[col(&h, "txn_count_24h")].parse::<f64>().unwrap())
        .sum();
    within("mean txn_count_24h", counts / nf, 2.0, (2.0 / nf).sqrt());
    // ln amount ~ N(3.6, 1.1); rounding to cents moves the mean of ln amount by far less than one standard error.
    let ln_amount: f64 = rows
        .iter()
        .map(|r| r[col(&h, "amount")].parse::<f64>().unwrap().ln())
        .sum();
    within("mean ln amount", ln_amount / nf, 3.6, 1.1 / nf.sqrt());
}

#[test]
fn demo_runs_with_given_models_and_reports_metrics() {
    let dir = tempfile::tempdir().unwrap();
    let scored = dir.path().join("scored.csv");
    let o = ok(&[
        "demo",
        "--offline",
        "--rows",
        "3000",
        "--seed",
        "9",
        "--model",
        s(&data("small-trees.json")),
        "--model",
        s(&data("small-scorecard.json")),
        "--write-scored",
        s(&scored),
    ]);
    let text = stdout(&o);
    for want in [
        "test-card-trees",
        "test-card-scorecard",
        "log-loss",
        "Brier score",
        "AUC",
        "decision support",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }
    // The demo scores the same transactions that generate-demo-data writes for the seed.
    let input = demo_csv(dir.path(), 3000, 9, &[]);
    let (ih, irows) = read_csv(&input);
    let (sh, srows) = read_csv(&scored);
    assert_eq!(irows.len(), srows.len());
    let frauds = irows
        .iter()
        .filter(|r| &r[col(&ih, "label")] == "1")
        .count();
    assert!(text.contains(&format!("{frauds} labelled fraud")), "{text}");
    for (a, b) in irows.iter().zip(&srows) {
        assert_eq!(&a[col(&ih, "id")], &b[col(&sh, "id")]);
        assert_eq!(&a[col(&ih, "label")], &b[col(&sh, "label")]);
    }
    assert!(sh.iter().any(|c| c == "test-card-trees.probability"));
}

#[test]
fn demo_with_the_embedded_models_corrects_the_base_rate() {
    let o = ok(&["demo", "--offline", "--rows", "20000"]);
    let text = stdout(&o);
    for want in [
        "harbourline-fraud-trees",
        "harbourline-fraud-scorecard",
        "the generating model itself",
        // Reasons for declined transactions, from the demo models' reason families.
        "declined at probability > 1/41",
        "H06 Far from home or abroad",
    ] {
        assert!(text.contains(want), "missing {want:?} in:\n{text}");
    }
    // The models were fitted on re-sampled data (a base rate near 23%); after the prior shift of Elkan (2001),
    // Theorem 2, a calibrated model's mean probability on the live data should sit near the live base rate. A 25%
    // relative band is common practice, no single source.
    let percent = |line: &str, key: &str| -> f64 {
        let at = line.find(key).unwrap() + key.len();
        line[at..]
            .trim_start()
            .split('%')
            .next()
            .unwrap()
            .parse()
            .unwrap()
    };
    let live = text
        .lines()
        .find(|l| l.starts_with("live base rate"))
        .unwrap();
    let live = percent(live, "live base rate");
    let means: Vec<f64> = text
        .lines()
        .filter(|l| l.contains("mean predicted"))
        .map(|l| percent(l, "mean predicted"))
        .collect();
    assert_eq!(means.len(), 2, "{text}");
    for m in means {
        assert!(
            (m - live).abs() < 0.25 * live,
            "mean predicted {m}% vs live {live}%"
        );
    }
}

#[test]
fn an_explicit_id_column_must_exist() {
    let dir = tempfile::tempdir().unwrap();
    let input = demo_csv(dir.path(), 10, 1, &[]);
    let out = dir.path().join("out.csv");
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
        "--id-column",
        "txn_ref",
    ]);
    assert_eq!(o.status.code(), Some(1));
    assert!(stderr(&o).contains("txn_ref"), "{}", stderr(&o));
    ok(&[
        "score",
        "--keep-training-base-rate",
        "-q",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
        "--id-column",
        "channel",
    ]);
    let (h, _) = read_csv(&out);
    assert_eq!(&h[0], "channel");
}

#[test]
fn score_without_a_base_rate_is_refused_naming_the_training_rate() {
    let dir = tempfile::tempdir().unwrap();
    let input = demo_csv(dir.path(), 50, 3, &[]);
    let out = dir.path().join("out.csv");
    let model = data("small-trees.json");
    let o = probity(&[
        "score",
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    let rate = load("small-trees.json").base_rate().to_string();
    assert!(err.contains(&rate), "{err}");
    assert!(
        err.contains("--target-base-rate") && err.contains("--keep-training-base-rate"),
        "{err}"
    );
    assert!(!out.exists());
}

#[test]
fn score_never_writes_over_its_input_and_a_failed_run_leaves_the_old_output() {
    let dir = tempfile::tempdir().unwrap();
    let input = demo_csv(dir.path(), 50, 4, &[]);
    let before = std::fs::read(&input).unwrap();
    let model = data("small-trees.json");
    let same = |output: &Path| {
        probity(&[
            "score",
            "--keep-training-base-rate",
            "--model",
            s(&model),
            "--input",
            s(&input),
            "--output",
            s(output),
        ])
    };
    // The same path, another spelling of it, and a hard link: all refused, the input unchanged.
    let spelled = dir.path().join(".").join(input.file_name().unwrap());
    let linked = dir.path().join("linked.csv");
    std::fs::hard_link(&input, &linked).unwrap();
    for output in [&input, &spelled, &linked] {
        let o = same(output);
        assert_eq!(o.status.code(), Some(1), "{}", output.display());
        assert!(stderr(&o).contains("is the --input file"), "{}", stderr(&o));
        assert_eq!(
            std::fs::read(&input).unwrap(),
            before,
            "the input was changed"
        );
    }

    // A run that fails half-way keeps an existing output as it was, and leaves no temporary file.
    let out = dir.path().join("out.csv");
    std::fs::write(&out, "an earlier result\n").unwrap();
    let bad = dir.path().join("bad.csv");
    let mut text = String::from_utf8(before.clone()).unwrap();
    text.push_str(&text.lines().nth(1).unwrap().replacen(',', ",x", 1));
    text.push('\n');
    std::fs::write(&bad, &text).unwrap();
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--model",
        s(&model),
        "--input",
        s(&bad),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    assert_eq!(
        std::fs::read_to_string(&out).unwrap(),
        "an earlier result\n"
    );
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty(), "{leftovers:?}");
}

#[test]
fn skip_policy_scores_the_good_rows_and_lists_the_bad_ones() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.csv");
    std::fs::write(
        &input,
        "id,amount,hour,channel,foreign\na,12.5,3,chip,0\nb,12;5,4,online,1\nc,40,22,online,1\nd,7,zz,chip,0\n",
    )
    .unwrap();
    let out = dir.path().join("out.csv");
    let model = data("small-trees.json");
    let o = ok(&[
        "score",
        "--keep-training-base-rate",
        "--on-error",
        "skip",
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    let (_, rows) = read_csv(&out);
    let ids: Vec<&str> = rows.iter().map(|r| r.get(0).unwrap()).collect();
    assert_eq!(ids, ["a", "c"]);
    let rejects = dir.path().join("out.rejects.csv");
    let (h, bad) = read_csv(&rejects);
    assert_eq!(h.iter().collect::<Vec<_>>(), ["row", "line", "reason"]);
    assert_eq!(bad.len(), 2);
    assert_eq!((&bad[0][0], &bad[0][1]), ("2", "3"));
    assert!(bad[0][2].contains("column `amount`"), "{:?}", &bad[0]);
    assert_eq!((&bad[1][0], &bad[1][1]), ("4", "5"));
    assert!(bad[1][2].contains("column `hour`"), "{:?}", &bad[1]);
    assert!(stderr(&o).contains("left out 2 rows"), "{}", stderr(&o));
    // The scores of the good rows are those of a clean run on them alone.
    let clean = dir.path().join("clean.csv");
    std::fs::write(
        &clean,
        "id,amount,hour,channel,foreign\na,12.5,3,chip,0\nc,40,22,online,1\n",
    )
    .unwrap();
    let clean_out = dir.path().join("clean-out.csv");
    ok(&[
        "score",
        "-q",
        "--keep-training-base-rate",
        "--model",
        s(&model),
        "--input",
        s(&clean),
        "--output",
        s(&clean_out),
    ]);
    assert_eq!(
        std::fs::read_to_string(&out).unwrap(),
        std::fs::read_to_string(&clean_out).unwrap()
    );
    // --rejects without skip is refused.
    let o = probity(&[
        "score",
        "--keep-training-base-rate",
        "--rejects",
        s(&dir.path().join("r.csv")),
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
}

/// Log lines to a pipe (a process manager's journal, a file) carry no terminal colour codes.
#[test]
fn serve_logs_plain_text_when_stderr_is_not_a_terminal() {
    use std::io::BufRead as _;
    let config = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/probity.toml");
    let mut child = Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(["serve", "--config", s(&config)])
        .args([
            "--grpc-listen",
            "127.0.0.1:0",
            "--metrics-listen",
            "127.0.0.1:0",
        ])
        .current_dir(Path::new(env!("CARGO_MANIFEST_DIR")).join(".."))
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let mut lines = std::io::BufReader::new(child.stderr.take().unwrap()).lines();
    let first: Vec<String> = lines.by_ref().take(2).map(|l| l.unwrap()).collect();
    let _ = child.kill();
    let _ = child.wait();
    assert_eq!(first.len(), 2, "{first:?}");
    for line in &first {
        assert!(!line.contains('\u{1b}'), "colour codes in {line:?}");
        assert!(line.contains("INFO") || line.contains("WARN"), "{line:?}");
    }
}

/// A refused configuration is said once, naming the key (it was printed twice, once per error in the chain).
#[test]
fn a_refused_configuration_is_said_once() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("bad.toml");
    std::fs::write(&config, "[limits]\nmax_batch_row = 5\n").unwrap();
    let o = probity(&["serve", "--config", s(&config)]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert_eq!(err.matches("max_batch_row`").count(), 1, "{err}");
    assert!(
        err.starts_with("error: invalid configuration: limits.max_batch_row"),
        "{err}"
    );
}

/// One rule for a cell offline and over gRPC (`Schema::read_text`): a number that is not finite is read as
/// missing, a category in the wrong case is an unknown category, and both are said: in a summary by kind and column,
/// and with --warnings-column on each row.
#[test]
fn bad_cells_are_read_by_the_grpc_rule_and_said() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("in.csv");
    std::fs::write(
        &input,
        "id,amount,hour,channel,foreign\n\
         a,inf,3,chip,0\n\
         b,,3,chip,0\n\
         c,12,4,CHIP,1\n\
         d,12,4,atm,1\n\
         e,,,,\n",
    )
    .unwrap();
    let out = dir.path().join("out.csv");
    let o = ok(&[
        "score",
        "--keep-training-base-rate",
        "--warnings-column",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    let (h, rows) = read_csv(&out);
    let p = col(&h, "probability");
    let w = col(&h, "warnings");
    // `inf` scores exactly as an empty (missing) cell; `CHIP` exactly as the unknown `atm`.
    assert_eq!(&rows[0][p], &rows[1][p]);
    assert_eq!(&rows[2][p], &rows[3][p]);
    assert_eq!(&rows[0][w], "amount: not finite, read as missing");
    assert_eq!(&rows[1][w], "amount: missing");
    assert_eq!(&rows[2][w], "channel: unknown category");
    assert_eq!(
        &rows[4][w],
        "amount: missing; hour: missing; channel: missing; foreign: missing; every feature missing"
    );
    let err = stderr(&o);
    for line in [
        "2 rows: column `channel`: unknown category",
        "1 row: column `amount`: not finite, read as missing",
        "2 rows: column `amount`: missing",
        "1 row with every feature missing",
    ] {
        assert!(err.contains(line), "{line:?} not in:\n{err}");
    }
}

/// Files that are not what `score` and `check` expect get a message saying what they look like.
#[test]
fn a_wrong_kind_of_file_is_named_for_what_it_looks_like() {
    let dir = tempfile::tempdir().unwrap();
    let model = data("small-trees.json");
    let out = dir.path().join("out.csv");
    let score = |input: &Path| {
        probity(&[
            "score",
            "--keep-training-base-rate",
            "--model",
            s(&model),
            "--input",
            s(input),
            "--output",
            s(&out),
        ])
    };
    let semi = dir.path().join("semi.csv");
    std::fs::write(&semi, "id;amount;hour;channel;foreign\na;1;2;chip;0\n").unwrap();
    let err = stderr(&score(&semi));
    assert!(err.contains("looks separated by `;`"), "{err}");
    let tabs = dir.path().join("tabs.csv");
    std::fs::write(
        &tabs,
        "id\tamount\thour\tchannel\tforeign\na\t1\t2\tchip\t0\n",
    )
    .unwrap();
    let err = stderr(&score(&tabs));
    assert!(err.contains("looks separated by tabs"), "{err}");
    let empty = dir.path().join("empty.csv");
    std::fs::write(&empty, "").unwrap();
    let err = stderr(&score(&empty));
    assert!(err.contains("the input is empty"), "{err}");

    let commented = dir.path().join("commented.json");
    let text = std::fs::read_to_string(&model).unwrap();
    std::fs::write(&commented, format!("// the test model\n{text}")).unwrap();
    let o = probity(&["check", s(&commented)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(
        stderr(&o).contains("line 1, column 1") && stderr(&o).contains("no comments"),
        "{}",
        stderr(&o)
    );
    std::fs::write(&commented, text.replacen("{", "{ # the test model\n", 1)).unwrap();
    let o = probity(&["check", s(&commented)]);
    assert!(stderr(&o).contains("no comments"), "{}", stderr(&o));
}

/// A model file may state the base rate it serves at; `score` then shifts to it without an option (saying so), the
/// option still wins, and `check` says which rate applies.
#[test]
fn a_serving_base_rate_in_the_model_file_is_used_and_shown() {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(data("small-trees.json")).unwrap();
    let mut doc: serde_json::Value = serde_json::from_str(&text).unwrap();
    doc["serving_base_rate"] = serde_json::json!(0.015);
    let model = dir.path().join("serving.json");
    std::fs::write(&model, doc.to_string()).unwrap();
    let input = demo_csv(dir.path(), 40, 9, &[]);
    let (a, b) = (dir.path().join("a.csv"), dir.path().join("b.csv"));
    let o = ok(&[
        "score",
        "--model",
        s(&model),
        "--input",
        s(&input),
        "--output",
        s(&a),
    ]);
    assert!(
        stderr(&o).contains("serving_base_rate 0.015"),
        "{}",
        stderr(&o)
    );
    ok(&[
        "score",
        "-q",
        "--target-base-rate",
        "0.015",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&input),
        "--output",
        s(&b),
    ]);
    assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());
    let shown = stdout(&ok(&["check", s(&model)]));
    assert!(
        shown.contains(
            "trained at 0.1; `probity score` serves at the file's serving_base_rate 0.015"
        ),
        "{shown}"
    );
    let shown = stdout(&ok(&["check", s(&data("small-trees.json"))]));
    assert!(
        shown.contains("no serving_base_rate in the file"),
        "{shown}"
    );
    // Out of range: refused naming the key.
    doc["serving_base_rate"] = serde_json::json!(1.5);
    std::fs::write(&model, doc.to_string()).unwrap();
    let o = probity(&["check", s(&model)]);
    assert!(stderr(&o).contains("serving_base_rate"), "{}", stderr(&o));
}

/// By default the score columns carry 6 significant digits and points are whole; --digits and --full-precision
/// choose otherwise (the latter reads back to the library's bits, as the bit-for-bit tests above check).
#[test]
fn score_prints_readable_digits_unless_asked_for_full_precision() {
    let dir = tempfile::tempdir().unwrap();
    let input = demo_csv(dir.path(), 200, 21, &[]);
    let out = dir.path().join("out.csv");
    // small-trees.json has a points scale.
    let model = data("small-trees.json");
    let run = |extra: &[&str]| {
        let mut args = vec![
            "score",
            "-q",
            "--target-base-rate",
            "0.015",
            "--model",
            s(&model),
            "--input",
            s(&input),
            "--output",
            s(&out),
        ];
        args.extend_from_slice(extra);
        ok(&args);
        read_csv(&out)
    };
    let digits = |text: &str| {
        text.trim_start_matches('-')
            .replace('.', "")
            .trim_start_matches('0')
            .trim_end_matches('0')
            .len()
    };
    let (h, rows) = run(&[]);
    let (p, points) = (col(&h, "probability"), col(&h, "score"));
    let mut longest = 0;
    for r in &rows {
        longest = longest.max(digits(&r[p]));
        assert!(!r[points].contains('.'), "points {}", &r[points]);
    }
    assert!((1..=6).contains(&longest), "{longest}");
    let (_, rows3) = run(&["--digits", "3"]);
    assert!(rows3.iter().all(|r| digits(&r[p]) <= 3));
    let (_, full) = run(&["--full-precision"]);
    assert!(full.iter().map(|r| digits(&r[p])).max().unwrap() > 6);
    // Rounded and full agree to the rounding.
    for (a, b) in rows.iter().zip(&full) {
        let (a, b): (f64, f64) = (a[p].parse().unwrap(), b[p].parse().unwrap());
        assert!((a - b).abs() <= b.abs() * 5e-6, "{a} vs {b}");
    }
}

fn contrib_fixture(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/contrib")
        .join(rel)
}

#[test]
fn explain_writes_the_reference_contributions_and_reasons() {
    // The rows and contributions of LightGBM 4.7.0 `Booster.predict(pred_contrib=True)` recorded by
    // tests/fixtures/gen_contrib.py (missing values, unknown and missing categories, all-missing rows).
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("explained.csv");
    let model_path = contrib_fixture("models/lightgbm_nan_cat.json");
    ok(&[
        "explain",
        "--model",
        s(&model_path),
        "--input",
        s(&contrib_fixture("lightgbm_nan_cat/rows.csv")),
        "--output",
        s(&out),
        "--reasons",
        "3",
    ]);
    let (header, rows) = read_csv(&out);
    let (want_header, want) = read_csv(&contrib_fixture("lightgbm_nan_cat/contributions.csv"));
    assert_eq!(rows.len(), want.len());
    let model = Model::from_json_str(&std::fs::read_to_string(&model_path).unwrap()).unwrap();
    let names: Vec<String> = model
        .schema()
        .features()
        .iter()
        .map(|f| f.name.clone())
        .collect();
    let num = |r: &csv::StringRecord, i: usize| r[i].parse::<f64>().unwrap();
    for (r, w) in rows.iter().zip(&want) {
        assert_eq!(r[0], w[0], "ids in order");
        for name in &names {
            let ours = num(r, col(&header, &format!("contribution.{name}")));
            let theirs = num(w, col(&want_header, name));
            assert!((ours - theirs).abs() <= 1e-9, "{name}: {ours} vs {theirs}");
        }
        let bias = num(r, col(&header, "bias"));
        assert!((bias - num(w, col(&want_header, "bias"))).abs() <= 1e-9);
        // The reasons: the (at most 3) features of largest positive contribution, largest first.
        let mut positive: Vec<(f64, &str)> = names
            .iter()
            .map(|n| {
                (
                    num(r, col(&header, &format!("contribution.{n}"))),
                    n.as_str(),
                )
            })
            .filter(|(v, _)| *v > 0.0)
            .collect();
        positive.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(b.1)));
        let expected: Vec<&str> = positive.iter().take(3).map(|(_, n)| *n).collect();
        assert_eq!(&r[col(&header, "reasons")], expected.join(";"));
    }
}

#[test]
fn explain_refuses_bad_input_like_score() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.csv");
    // A tree model without cover (format version 1): the missing key is named, nothing is written.
    let o = probity(&[
        "explain",
        "--model",
        s(&data("small-trees.json")),
        "--input",
        s(&data("small-trees.json")),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert!(
        err.contains("`ensemble.trees[0].nodes[0].cover` is missing"),
        "{err}"
    );
    assert!(!out.exists());
    // A bad cell: row, line and column named, no partial output.
    let input = dir.path().join("bad.csv");
    std::fs::write(
        &input,
        "id,amount,channel,card_age_days\na,1,chip,4\nb,2;0,chip,5\n",
    )
    .unwrap();
    let o = probity(&[
        "explain",
        "--model",
        s(&data("small-scorecard.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
    ]);
    assert_eq!(o.status.code(), Some(1));
    let err = stderr(&o);
    assert!(
        err.contains("row 2 (line 3)") && err.contains("column `amount`"),
        "{err}"
    );
    assert!(!out.exists());
}

#[test]
fn explain_a_scorecard_by_points_below_the_best_bin() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("rows.csv");
    // card_age_days 10 is in the worst bin (0.6 against the best -0.2); amount 140 adds 0.3 * 1.0;
    // channel online adds 0.4. Half log-odds model: contributions are doubled to the log-odds.
    std::fs::write(&input, "id,amount,channel,card_age_days\nx,140,online,10\n").unwrap();
    let out = dir.path().join("out.csv");
    ok(&[
        "explain",
        "--model",
        s(&data("small-scorecard.json")),
        "--input",
        s(&input),
        "--output",
        s(&out),
        "--quiet",
    ]);
    let (header, rows) = read_csv(&out);
    let r = &rows[0];
    let num = |name: &str| r[col(&header, name)].parse::<f64>().unwrap();
    assert!((num("contribution.card_age_days") - 1.2).abs() < 1e-12);
    assert!((num("contribution.amount") - 0.6).abs() < 1e-12);
    assert!((num("contribution.channel") - 0.8).abs() < 1e-12);
    assert_eq!(num("bias"), -2.8);
    let total = num("bias")
        + num("contribution.card_age_days")
        + num("contribution.amount")
        + num("contribution.channel");
    assert!((total - num("log_odds")).abs() < 1e-12);
    // Shortfalls: card age 2 * (0.6 - -0.2) = 1.6, channel 0.8, amount 0.6.
    assert_eq!(&r[col(&header, "reasons")], "card_age_days;channel;amount");
}

/// The names of one `Commands:` or `Options:` block of clap's short help: a command's name, or a long flag.
fn help_entries(help: &str, block: &str) -> Vec<String> {
    let mut inside = false;
    let mut out = Vec::new();
    for line in help.lines() {
        if !line.starts_with(' ') && line.ends_with(':') {
            inside = line == format!("{block}:");
            continue;
        }
        let mut words = line.split_whitespace();
        let (Some(first), true) = (words.next(), inside) else {
            continue;
        };
        match block {
            "Commands" if line.starts_with("  ") && !line.starts_with("   ") => {
                out.push(first.to_string())
            }
            "Options" => {
                // `-q, --quiet` or `--model <MODEL>`; a wrapped line of help text starts with neither.
                let long = if first.len() == 3 && first.starts_with('-') && first.ends_with(',') {
                    words.next().unwrap_or_default()
                } else {
                    first
                };
                if long.starts_with("--") && line.trim_start().starts_with('-') {
                    out.push(long.to_string());
                }
            }
            _ => {}
        }
    }
    out
}

#[test]
fn the_vocabulary_page_names_every_command_flag_grpc_name_and_config_key() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let page = std::fs::read_to_string(root.join("docs/vocabulary.md")).unwrap();
    let mut missing = Vec::new();

    // Commands and their flags, each flag in its command's own section.
    let commands = help_entries(&stdout(&ok(&["-h"])), "Commands");
    assert!(commands.len() >= 10, "{commands:?}");
    for command in commands.iter().filter(|c| *c != "help") {
        let heading = format!("### `probity {command}`");
        let Some(start) = page.find(&heading) else {
            missing.push(heading);
            continue;
        };
        let rest = &page[start + heading.len()..];
        let section = &rest[..rest.find("\n#").unwrap_or(rest.len())];
        let help = stdout(&ok(&[command, "-h"]));
        for flag in help_entries(&help, "Options") {
            if flag.starts_with("--") && flag != "--help" && flag != "--version" {
                let flag = flag.split(['=', ' ']).next().unwrap().to_string();
                if !section.contains(&format!("`{flag}`")) {
                    missing.push(format!("probity {command} {flag}"));
                }
            }
        }
    }

    // Calls, messages, enums, their fields and values, from the proto files.
    let declaration = |line: &str| -> Option<String> {
        let line = line.trim();
        let words: Vec<&str> = line.split_whitespace().collect();
        match words.as_slice() {
            ["service" | "message" | "enum" | "rpc" | "oneof", name, ..] => {
                Some(name.split('(').next().unwrap().to_string())
            }
            _ if !line.starts_with("//") => {
                // `string route = 1;`, `map<string, string> tags = 3;`, `FEATURE_TYPE_NUMERIC = 1;`
                let at = words.iter().position(|w| *w == "=")?;
                at.checked_sub(1).map(|i| words[i].to_string())
            }
            _ => None,
        }
    };
    for file in std::fs::read_dir(root.join("proto/probity/v1")).unwrap() {
        let text = std::fs::read_to_string(file.unwrap().path()).unwrap();
        for name in text.lines().filter_map(declaration) {
            if name != "syntax" && !page.contains(&format!("`{name}`")) {
                missing.push(format!("proto {name}"));
            }
        }
    }

    // Every key the example configuration sets or shows (commented out), routes as `<route>`.
    let example = std::fs::read_to_string(root.join("deploy/probity.toml")).unwrap();
    let mut table = String::new();
    for line in example.lines() {
        let line = line.trim_start_matches('#').trim();
        let line = line.split(" #").next().unwrap().trim();
        let header = line.starts_with('[')
            && line.ends_with(']')
            && line
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || "[]._-".contains(c));
        if header {
            let name = line.trim_matches(|c| c == '[' || c == ']');
            let parts: Vec<&str> = name.split('.').collect();
            table = match parts.as_slice() {
                ["routes", _, rest @ ..] => {
                    let mut t = "routes.<route>".to_string();
                    for p in rest {
                        t += &format!(".{p}");
                    }
                    t
                }
                _ => name.to_string(),
            };
            if line.starts_with("[[") {
                table += "[]";
            }
            continue;
        }
        let Some((key, value)) = line.split_once(" = ") else {
            continue;
        };
        if !key
            .chars()
            .all(|c| c.is_ascii_lowercase() || c == '_' || c == '-')
        {
            continue;
        }
        let mut keys = Vec::new();
        if let Some(inner) = value.trim().strip_prefix('{') {
            for part in inner.trim_end_matches('}').split(", ") {
                if let Some((k, _)) = part.split_once(" = ") {
                    keys.push(format!("{table}.{key}.{}", k.trim()));
                }
            }
        } else if table == "store.maturity" {
            keys.push("store.maturity.<route>".to_string());
        } else {
            keys.push(format!("{table}.{key}"));
        }
        for k in keys {
            if !page.contains(&format!("`{k}`")) {
                missing.push(format!("config {k}"));
            }
        }
    }
    assert!(
        missing.is_empty(),
        "names missing from docs/vocabulary.md (regenerate it with tools/vocabulary.py):\n  {}",
        missing.join("\n  ")
    );
}
