//! `probity evaluate` end to end through the real binary, against references computed by
//! `tests/fixtures/gen_evaluate.py` (scikit-learn 1.9.1, SciPy, NumPy; versions recorded in the fixture) on
//! scikit-learn's bundled `load_breast_cancer` (Street, Wolberg and Mangasarian 1993). Each check names its source.

#![allow(clippy::unwrap_used, clippy::expect_used)]

use std::path::PathBuf;
use std::process::{Command, Output};

use serde_json::Value;

fn fixture(name: &str) -> String {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/evaluate")
        .join(name)
        .to_string_lossy()
        .into_owned()
}

fn probity(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_probity"))
        .args(args)
        .output()
        .expect("run probity")
}

fn run_json(extra: &[&str]) -> Value {
    let (model, input) = (fixture("champion.json"), fixture("labelled.csv"));
    let mut args = vec![
        "evaluate",
        "--model",
        &model,
        "--input",
        &input,
        "--label-column",
        "y",
        "--json",
    ];
    args.extend_from_slice(extra);
    let out = probity(&args);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn expected() -> Value {
    serde_json::from_str(&std::fs::read_to_string(fixture("expected.json")).unwrap()).unwrap()
}

/// Within 1e-9, absolute for figures of order one, relative for p-values that can be tiny.
fn close(what: &str, got: &Value, want: &Value) {
    let (g, w) = (got.as_f64().unwrap(), want.as_f64().unwrap());
    assert!(
        (g - w).abs() <= 1e-9 * w.abs().max(1.0)
            && (w == 0.0 || (g - w).abs() / w.abs() <= 1e-9 || (g - w).abs() <= 1e-15),
        "{what}: got {g}, reference {w}"
    );
}

fn close_all(what: &str, got: impl Iterator<Item = Value>, want: &Value) {
    let got: Vec<Value> = got.collect();
    let want = want.as_array().unwrap();
    assert_eq!(got.len(), want.len(), "{what}: lengths");
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        close(&format!("{what}[{i}]"), g, w);
    }
}

fn check_model(got: &Value, want: &Value, setting: &str) {
    // sklearn.metrics.log_loss, brier_score_loss, roc_auc_score; scipy.stats.ks_2samp (statistic);
    // scipy.special.kolmogorov (asymptotic KS p-value).
    for k in [
        "log_loss",
        "brier",
        "auc",
        "ks",
        "ks_p_value",
        "mean_probability",
    ] {
        close(k, &got[k], &want[k]);
    }
    close(
        "log-loss from log-odds (scipy.special.log_expit)",
        &got["log_loss"],
        &want["log_loss_from_log_odds"],
    );
    let s = &want["settings"][setting];
    // sklearn.calibration.calibration_curve; ECE and MCE from its bins (Naeini, Cooper and Hauskrecht 2015).
    let bins = got["calibration"]["bins"].as_array().unwrap();
    close_all(
        "fraction positive",
        bins.iter().map(|b| b["fraction_positive"].clone()),
        &s["calibration"]["fraction_positive"],
    );
    close_all(
        "mean predicted",
        bins.iter().map(|b| b["mean_predicted"].clone()),
        &s["calibration"]["mean_predicted"],
    );
    close_all(
        "bin counts",
        bins.iter().map(|b| b["count"].clone()),
        &s["calibration"]["count"],
    );
    close("ECE", &got["calibration"]["ece"], &s["calibration"]["ece"]);
    close("MCE", &got["calibration"]["mce"], &s["calibration"]["mce"]);
    // Murphy (1973) with Stephenson, Coelho and Jolliffe (2008) within-bin terms (NumPy, gen_metrics.py).
    for k in [
        "reliability",
        "resolution",
        "uncertainty",
        "within_bin_variance",
        "within_bin_covariance",
    ] {
        close(
            k,
            &got["brier_decomposition"][k],
            &s["brier_decomposition"][k],
        );
    }
    // Hosmer and Lemeshow (1980) with scipy.stats.chi2.sf (NumPy, gen_metrics.py).
    close(
        "HL statistic",
        &got["hosmer_lemeshow"]["statistic"],
        &s["hosmer_lemeshow"]["statistic"],
    );
    close(
        "HL p-value",
        &got["hosmer_lemeshow"]["p_value"],
        &s["hosmer_lemeshow"]["p_value"],
    );
    assert_eq!(
        got["hosmer_lemeshow"]["degrees_of_freedom"],
        s["hosmer_lemeshow"]["df"]
    );
    // Gains and lift by decile (common practice, no single source; NumPy, gen_metrics.py).
    let gains = got["gains"].as_array().unwrap();
    for k in [
        "count",
        "positives",
        "cumulative_gain",
        "lift",
        "cumulative_lift",
    ] {
        close_all(k, gains.iter().map(|g| g[k].clone()), &want["gains"][k]);
    }
}

fn check_point(got: &Value, want: &Value) {
    // sklearn.metrics.confusion_matrix, precision_score, recall_score at `p > t`.
    for (g, w) in [
        ("true_positive", "tp"),
        ("false_positive", "fp"),
        ("true_negative", "tn"),
        ("false_negative", "fn"),
    ] {
        assert_eq!(got[g], want[w], "{g}");
    }
    for k in [
        "precision",
        "recall",
        "approval_rate",
        "decline_rate",
        "threshold",
    ] {
        close(k, &got[k], &want[k]);
    }
    if !want["expected_cost"].is_null() {
        close(
            "expected cost",
            &got["expected_cost"],
            &want["expected_cost"],
        );
    }
}

#[test]
fn default_choices_match_the_references() {
    let got = run_json(&["--threshold", "0.3"]);
    let want = expected();
    check_model(&got["champion"], &want["champion"], "default");
    check_point(&got["operating_point"], &want["threshold"]);
}

#[test]
fn equal_count_bins_and_quantile_groups_match_the_references() {
    let got = run_json(&[
        "--bins",
        "8",
        "--binning",
        "equal-count",
        "--hl-groups",
        "quantile",
    ]);
    check_model(&got["champion"], &expected()["champion"], "equal-count-8");
}

#[test]
fn costs_and_bands_give_the_reference_operating_points() {
    let got = run_json(&[
        "--cost-false-positive",
        "1",
        "--cost-false-negative",
        "5",
        "--bands",
        "0.1,0.5",
    ]);
    let want = expected();
    check_point(&got["operating_point"], &want["costs"]);
    let bands = got["bands"].as_array().unwrap();
    let cases: Vec<Value> = bands.iter().map(|b| b["cases"].clone()).collect();
    assert_eq!(Value::Array(cases), want["bands"]["cases"]);
    for (b, w) in bands[1..]
        .iter()
        .zip(want["bands"]["from_edge"].as_array().unwrap())
    {
        let mut w = w.clone();
        w["expected_cost"] = Value::Null;
        check_point(&b["declining_from_here"], &w);
    }
}

#[test]
fn challenger_comparison_matches_the_references() {
    let challenger = fixture("challenger.json");
    let got = run_json(&["--challenger", &challenger]);
    let want = expected();
    check_model(&got["challenger"], &want["challenger"], "default");
    let c = &got["comparison"];
    // DeLong, DeLong and Clarke-Pearson (1988), the O(m n) pair sum of gen_compare.py; p from scipy.stats.norm.sf.
    for k in [
        "auc_champion",
        "auc_challenger",
        "difference",
        "standard_error",
        "z",
        "p_value",
    ] {
        close(k, &c["delong"][k], &want["delong"][k]);
    }
    // scipy.stats.ttest_rel(challenger loss, champion loss): statistic and Student t p-value; normal p-value from
    // scipy.stats.norm.sf.
    let w = &want["paired_log_loss"];
    close(
        "mean difference",
        &c["log_loss"]["mean_difference"],
        &w["mean"],
    );
    close(
        "paired statistic",
        &c["log_loss"]["statistic"],
        &w["statistic"],
    );
    close(
        "Student t p",
        &c["log_loss"]["p_value_student_t"],
        &w["t_p_value"],
    );
    close(
        "normal p",
        &c["log_loss"]["p_value_normal"],
        &w["normal_p_value"],
    );
}

#[test]
fn text_svg_and_bad_labels() {
    let dir = tempfile::tempdir().unwrap();
    let (model, input) = (fixture("champion.json"), fixture("labelled.csv"));
    let svg = dir.path().join("svg");
    let out = probity(&[
        "evaluate",
        "--model",
        &model,
        "--input",
        &input,
        "--label-column",
        "y",
        "--svg-dir",
        svg.to_str().unwrap(),
    ]);
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("Hosmer-Lemeshow (10 groups by rank)"),
        "{text}"
    );
    assert!(
        text.contains("re-validate a model"),
        "cautions missing: {text}"
    );
    for name in ["reliability.svg", "histograms.svg", "gains.svg"] {
        let s = std::fs::read_to_string(svg.join(name)).unwrap();
        assert!(s.starts_with("<svg") || s.contains("<svg"), "{name}");
    }
    // A label other than 0/1 is refused, naming the row and the column.
    let body = std::fs::read_to_string(&input).unwrap();
    let mut lines: Vec<String> = body.lines().map(String::from).collect();
    let last = lines[3].rfind(',').unwrap();
    lines[3] = format!("{},yes", &lines[3][..last]);
    let bad = dir.path().join("bad.csv");
    std::fs::write(&bad, lines.join("\n") + "\n").unwrap();
    let out = probity(&[
        "evaluate",
        "--model",
        &model,
        "--input",
        bad.to_str().unwrap(),
        "--label-column",
        "y",
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("row 3") && err.contains("column `y`") && err.contains("`yes`"),
        "{err}"
    );
}

#[test]
fn gzip_and_delimiter_read_the_same_rows() {
    use std::io::Write as _;
    let dir = tempfile::tempdir().unwrap();
    let (model, input) = (fixture("champion.json"), fixture("labelled.csv"));
    let body = std::fs::read_to_string(&input).unwrap().replace(',', ";");
    let packed = dir.path().join("labelled.csv.gz");
    let mut gz = flate2::write::GzEncoder::new(
        std::fs::File::create(&packed).unwrap(),
        flate2::Compression::default(),
    );
    gz.write_all(body.as_bytes()).unwrap();
    gz.finish().unwrap();
    let packed = packed.to_string_lossy().into_owned();

    // evaluate: the same figures from the compressed, semicolon-separated copy.
    let plain = run_json(&[]);
    let out = probity(&[
        "evaluate",
        "--model",
        &model,
        "--input",
        &packed,
        "--label-column",
        "y",
        "--json",
        "--delimiter",
        ";",
    ]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let packed_json: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(plain["champion"], packed_json["champion"]);

    // score: the same output file.
    let (a, b) = (dir.path().join("a.csv"), dir.path().join("b.csv"));
    for (inp, outp, delim) in [(&input, &a, ","), (&packed, &b, ";")] {
        let out = probity(&[
            "score",
            "--model",
            &model,
            "--input",
            inp,
            "--output",
            outp.to_str().unwrap(),
            "--keep-training-base-rate",
            "--delimiter",
            delim,
            "-q",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());

    // Without --delimiter the message says what the file looks like and how to read it.
    let out = probity(&[
        "evaluate",
        "--model",
        &model,
        "--input",
        &packed,
        "--label-column",
        "y",
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("separated by `;`") && err.contains("--delimiter"),
        "{err}"
    );
    let out = probity(&[
        "score",
        "--model",
        &model,
        "--input",
        &packed,
        "--output",
        "x.csv",
        "--delimiter",
        "ab",
    ]);
    assert!(String::from_utf8_lossy(&out.stderr).contains("is not a field separator"));
}

/// The live report's calibration tests, offline: Spiegelhalter's z against a numpy computation of the 1986
/// formula, and logistic recalibration (Cox 1958) against statsmodels 0.15.0 `Logit(y, [1, h])` (slope, intercept,
/// standard errors, 95% Wald intervals) and `GLM(y, 1, Binomial, offset=h)` (calibration-in-the-large), with Cox's
/// joint likelihood-ratio test (tests/fixtures/gen_evaluate.py, through gen_monitor.py); within 1e-7 relative (the
/// two Newton fits stop at slightly different points).
#[test]
fn calibration_tests_match_statsmodels() {
    let got = run_json(&["--challenger", &fixture("challenger.json")]);
    let want = expected();
    let near = |what: &str, g: &Value, w: &Value| {
        let (g, w) = (g.as_f64().unwrap(), w.as_f64().unwrap());
        assert!(
            (g - w).abs() <= 1e-7 * w.abs().max(1e-3),
            "{what}: {g} vs {w}"
        );
    };
    for model in ["champion", "challenger"] {
        let (g, w) = (
            &got[model]["calibration_tests"],
            &want[model]["calibration_tests"],
        );
        near("z", &g["spiegelhalter"]["z"], &w["spiegelhalter"]["z"]);
        near(
            "z p",
            &g["spiegelhalter"]["p_value"],
            &w["spiegelhalter"]["p_value"],
        );
        for c in ["intercept", "slope", "in_the_large"] {
            for k in ["estimate", "standard_error", "lower", "upper"] {
                near(
                    &format!("{model} {c} {k}"),
                    &g["recalibration"][c][k],
                    &w["recalibration"][c][k],
                );
            }
        }
        near(
            "joint",
            &g["recalibration"]["joint_statistic"],
            &w["recalibration"]["joint_statistic"],
        );
    }
}

/// Per-feature stability of a labelled file against the model's training distributions, equal to the NumPy
/// reference of `tests/fixtures/gen_stability.py` (slot counts by `np.digitize(right=True)`, PSI by its formula,
/// sum (a - e) ln(a / e), Siddiqi 2006, shares floored at 1e-4), within 1e-12; and a model file without training
/// distributions prints no such section.
#[test]
fn feature_stability_matches_numpy() {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures/stability");
    let path = |n: &str| dir.join(n).to_string_lossy().into_owned();
    let reference: Value =
        serde_json::from_str(&std::fs::read_to_string(path("reference.json")).unwrap()).unwrap();
    for window in ["steady", "shifted"] {
        let (model, input) = (path("model.json"), path(&format!("{window}.csv")));
        let out = probity(&[
            "evaluate",
            "--model",
            &model,
            "--input",
            &input,
            "--label-column",
            "y",
            "--json",
        ]);
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        let got: Value = serde_json::from_slice(&out.stdout).unwrap();
        let features = got["champion"]["feature_stability"]["features"]
            .as_array()
            .unwrap();
        assert_eq!(features.len(), 6);
        for f in features {
            let name = f["feature"].as_str().unwrap();
            let want = &reference[window][name];
            for key in ["psi", "missing_rate"] {
                let (g, w) = (f[key].as_f64().unwrap(), want[key].as_f64().unwrap());
                assert!(
                    (g - w).abs() <= 1e-12 * w.abs().max(1.0),
                    "{window} {name} {key}: {g} vs {w}"
                );
            }
            assert_eq!(f["unknown_rate"], want["unknown_rate"], "{window} {name}");
        }
    }
    let plain = run_json(&[]);
    assert!(plain["champion"].get("feature_stability").is_none());
}
