//! The scoring rules and drift statistics of `probity_models::metrics` against reference values computed by
//! `tests/fixtures/gen_metrics.py` (scikit-learn 1.9.1, SciPy, NumPy; the versions are recorded in each fixture).
//!
//! Data: scikit-learn's bundled `load_breast_cancer` (Street, Wolberg and Mangasarian 1993), scored by a
//! LogisticRegression on three standardized columns; "exact" uses its log-odds and probabilities as they are,
//! "rounded" rounds both to one decimal, which creates ties and probabilities exactly on bin edges.
//!
//! Tolerances: counts, bin indices and bin edges must match exactly. Real values use `1e-9` as an absolute
//! tolerance for values up to 1 and a relative one above (`|a - e| <= 1e-9 max(1, |e|)`); the chi-square tail,
//! which spans many orders of magnitude, uses a purely relative `1e-9`.

use probity_models::metrics::{
    bin_counts, brier_decomposition, brier_score, calibration_table, chi2_sf,
    confusion_at_threshold, gains_lift, hosmer_lemeshow, ks_statistic, log_loss_from_log_odds,
    log_loss_term_pm1, psi_from_counts, psi_from_fractions, psi_from_samples, quantile_edges,
    roc_auc, BinStrategy, EmptyBinRule, HlGrouping, MetricsError,
};
use serde_json::Value;

const TOL: f64 = 1e-9;

/// Asserts `|actual - expected| <= tol * max(1, |expected|)`, printing both side by side.
macro_rules! assert_close {
    ($actual:expr, $expected:expr, $($ctx:tt)+) => {{
        let (a, e): (f64, f64) = ($actual, $expected);
        assert!(
            (a - e).abs() <= TOL * e.abs().max(1.0),
            "{}\n  expected {e:?}\n  actual   {a:?}\n  diff     {:e}",
            format!($($ctx)+),
            a - e
        );
    }};
}

fn load(name: &str) -> Value {
    let path = format!("{}/fixtures/metrics/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("reading {path}: {e}"));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {path}: {e}"))
}

fn array(v: &Value) -> &Vec<Value> {
    v.as_array()
        .unwrap_or_else(|| panic!("expected an array in the fixture, found {v}"))
}

fn f(v: &Value) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("expected a number in the fixture, found {v}"))
}

fn u(v: &Value) -> usize {
    let n = v
        .as_u64()
        .unwrap_or_else(|| panic!("expected a count in the fixture, found {v}"));
    usize::try_from(n).unwrap_or_else(|_| panic!("count {n} too large"))
}

fn f64s(v: &Value) -> Vec<f64> {
    array(v).iter().map(f).collect()
}

fn usizes(v: &Value) -> Vec<usize> {
    array(v).iter().map(u).collect()
}

struct Data {
    fixture: Value,
    labels: Vec<u8>,
}

impl Data {
    fn new() -> Self {
        let fixture = load("breast_cancer.json");
        let labels = usizes(&fixture["labels"])
            .into_iter()
            .map(|y| u8::try_from(y).unwrap_or(u8::MAX))
            .collect();
        Data { fixture, labels }
    }

    fn variants(&self) -> [(&'static str, &Value); 2] {
        [
            ("exact", &self.fixture["exact"]),
            ("rounded", &self.fixture["rounded"]),
        ]
    }
}

#[test]
fn fixture_is_the_expected_data() {
    // 569 cases, 357 benign (target 1) in load_breast_cancer (Street, Wolberg and Mangasarian 1993).
    let d = Data::new();
    assert_eq!(d.labels.len(), 569);
    assert_eq!(d.labels.iter().filter(|&&y| y == 1).count(), 357);
}

#[test]
fn log_loss_matches_sklearn_log_loss() {
    // sklearn.metrics.log_loss on expit(log-odds); no probability here is near the library's clipping.
    let d = Data::new();
    for (name, v) in d.variants() {
        let h = f64s(&v["log_odds"]);
        assert_close!(
            log_loss_from_log_odds(&h, &d.labels).unwrap(),
            f(&v["log_loss"]),
            "{name} log-loss"
        );
        let as_bool: Vec<bool> = d.labels.iter().map(|&y| y == 1).collect();
        assert_eq!(
            log_loss_from_log_odds(&h, &as_bool),
            log_loss_from_log_odds(&h, &d.labels)
        );
    }
}

#[test]
fn log_loss_at_large_margins_matches_scipy_log_expit() {
    // scipy.special.log_expit: loss = -log_expit((2y - 1) h). sklearn.metrics.log_loss is not the reference here:
    // it clips probabilities and so caps one example's loss near 36.
    for case in load("log_loss_margins.json")["cases"].as_array().unwrap() {
        let (h, y, want) = (f(&case["log_odds"]), case["label"] == 1, f(&case["loss"]));
        let got = log_loss_term_pm1(h, y);
        assert!(
            (got - want).abs() <= 1e-12 * want.abs(),
            "h = {h}, y = {y}: expected {want:e}, got {got:e}"
        );
    }
}

#[test]
fn log_loss_at_large_margins_matches_the_formula() {
    // ln(1 + e^-m) = e^-m (1 - e^-m / 2 + ...) for the correct side at margin m = 40: e^-40 to 1e-15 relative;
    // the wrong side costs m + ln(1 + e^-m), which is 40 and 800 in f64. At m = 800 the correct side's e^-800
    // is below the smallest f64, so 0 is the exactly rounded value.
    let tiny = (-40.0f64).exp();
    for (h, y) in [(40.0, true), (-40.0, false)] {
        let got = log_loss_term_pm1(h, y);
        assert!(
            (got / tiny - 1.0).abs() < 1e-15,
            "h = {h}: {got:e} vs {tiny:e}"
        );
    }
    assert_eq!(log_loss_term_pm1(-40.0, true), 40.0);
    assert_eq!(log_loss_term_pm1(40.0, false), 40.0);
    assert_eq!(log_loss_term_pm1(800.0, true), 0.0);
    assert_eq!(log_loss_term_pm1(-800.0, false), 0.0);
    assert_eq!(log_loss_term_pm1(-800.0, true), 800.0);
    assert_eq!(log_loss_term_pm1(800.0, false), 800.0);
    let mean = log_loss_from_log_odds(&[800.0, -800.0], &[1u8, 1]).unwrap();
    assert_eq!(mean, 400.0);
}

#[test]
fn brier_score_and_decomposition_match_references() {
    // Brier score: sklearn.metrics.brier_score_loss. Parts: NumPy from Murphy (1973) with the within-bin terms of
    // Stephenson, Coelho and Jolliffe (2008), on calibration_curve's bins.
    let d = Data::new();
    for (name, v) in d.variants() {
        let p = f64s(&v["probability"]);
        assert_close!(
            brier_score(&p, &d.labels).unwrap(),
            f(&v["brier"]),
            "{name} Brier"
        );
        for want in v["brier_decomposition"].as_array().unwrap() {
            let n = want["n_bins"].as_u64().unwrap() as usize;
            let strategy = match want["strategy"].as_str().unwrap() {
                "uniform" => BinStrategy::Uniform(n),
                _ => BinStrategy::Quantile(n),
            };
            let got = brier_decomposition(&p, &d.labels, strategy).unwrap();
            let ctx = format!("{name} {strategy:?}");
            assert_close!(
                got.reliability,
                f(&want["reliability"]),
                "{ctx} reliability"
            );
            assert_close!(got.resolution, f(&want["resolution"]), "{ctx} resolution");
            assert_close!(
                got.uncertainty,
                f(&want["uncertainty"]),
                "{ctx} uncertainty"
            );
            assert_close!(
                got.within_bin_variance,
                f(&want["within_bin_variance"]),
                "{ctx} within-bin variance"
            );
            assert_close!(
                got.within_bin_covariance,
                f(&want["within_bin_covariance"]),
                "{ctx} within-bin cov."
            );
        }
    }
}

#[test]
fn brier_decomposition_adds_up_exactly() {
    // The identity BS = REL - RES + UNC + WBV - WBC (Stephenson, Coelho and Jolliffe 2008) holds for any binning;
    // without the two within-bin terms it would be off by about their difference.
    let d = Data::new();
    for (name, v) in d.variants() {
        let p = f64s(&v["probability"]);
        for n in [1, 2, 3, 5, 10, 15, 20, 50] {
            for strategy in [BinStrategy::Uniform(n), BinStrategy::Quantile(n)] {
                let got = brier_decomposition(&p, &d.labels, strategy).unwrap();
                assert!(
                    (got.recomposed() - got.brier).abs() < 1e-14,
                    "{name} {strategy:?}: parts {} vs Brier {}",
                    got.recomposed(),
                    got.brier
                );
            }
        }
        let ten = brier_decomposition(&p, &d.labels, BinStrategy::Uniform(10)).unwrap();
        let murphy_only = ten.reliability - ten.resolution + ten.uncertainty;
        assert!(
            (murphy_only - ten.brier).abs() > 1e-6,
            "{name}: the within-bin terms should matter here"
        );
    }
}

#[test]
fn calibration_table_matches_sklearn_calibration_curve() {
    // sklearn.calibration.calibration_curve(strategy="uniform" | "quantile"): right-closed bins, np.linspace /
    // np.percentile edges, empty bins dropped. Counts and ECE/MCE from the same bins (Naeini et al. 2015).
    let d = Data::new();
    for (name, v) in d.variants() {
        let p = f64s(&v["probability"]);
        for want in v["calibration"].as_array().unwrap() {
            let n = want["n_bins"].as_u64().unwrap() as usize;
            let strategy = match want["strategy"].as_str().unwrap() {
                "uniform" => BinStrategy::Uniform(n),
                _ => BinStrategy::Quantile(n),
            };
            let ctx = format!("{name} {strategy:?}");
            let t = calibration_table(&p, &d.labels, strategy).unwrap();
            assert_eq!(t.edges, f64s(&want["edges"]), "{ctx} edges");
            assert_eq!(
                t.bins.iter().map(|b| b.index).collect::<Vec<_>>(),
                usizes(&want["bin_index"]),
                "{ctx}"
            );
            assert_eq!(
                t.bins.iter().map(|b| b.count).collect::<Vec<_>>(),
                usizes(&want["count"]),
                "{ctx}"
            );
            for (k, (b, (fp, mp))) in t
                .bins
                .iter()
                .zip(
                    f64s(&want["fraction_positive"])
                        .into_iter()
                        .zip(f64s(&want["mean_predicted"])),
                )
                .enumerate()
            {
                assert_close!(b.fraction_positive, fp, "{ctx} bin {k} fraction positive");
                assert_close!(b.mean_predicted, mp, "{ctx} bin {k} mean predicted");
            }
            assert_close!(t.ece, f(&want["ece"]), "{ctx} ECE");
            assert_close!(t.mce, f(&want["mce"]), "{ctx} MCE");
        }
    }
}

#[test]
fn hosmer_lemeshow_matches_numpy_and_scipy_chi2() {
    // Statistic from Hosmer and Lemeshow (1980) in NumPy; p-value scipy.stats.chi2.sf(C, g - 2).
    let d = Data::new();
    for (name, v) in d.variants() {
        let p = f64s(&v["probability"]);
        for want in v["hosmer_lemeshow"].as_array().unwrap() {
            let g = want["groups"].as_u64().unwrap() as usize;
            let grouping = match want["rule"].as_str().unwrap() {
                "rank" => HlGrouping::ByRank(g),
                _ => HlGrouping::ByQuantile(g),
            };
            let ctx = format!("{name} {grouping:?}");
            let got = hosmer_lemeshow(&p, &d.labels, grouping);
            if let Some(undefined) = want.get("undefined") {
                // The reference found a group whose probabilities are all 1 (or 0): the statistic is undefined.
                let expected = MetricsError::ZeroExpected {
                    group: undefined["group"].as_u64().unwrap() as usize,
                    class: undefined["class"].as_u64().unwrap() as u8,
                };
                assert_eq!(got, Err(expected), "{ctx}");
                continue;
            }
            let got = got.unwrap();
            assert_eq!(
                got.degrees_of_freedom,
                want["df"].as_u64().unwrap() as usize,
                "{ctx} df"
            );
            assert_eq!(
                got.groups.iter().map(|g| g.count).collect::<Vec<_>>(),
                usizes(&want["count"]),
                "{ctx}"
            );
            assert_eq!(
                got.groups
                    .iter()
                    .map(|g| g.observed_positive)
                    .collect::<Vec<_>>(),
                usizes(&want["observed_positive"]),
                "{ctx}"
            );
            for (k, (grp, e1)) in got
                .groups
                .iter()
                .zip(f64s(&want["expected_positive"]))
                .enumerate()
            {
                assert_close!(grp.expected_positive, e1, "{ctx} group {k} E1");
            }
            assert_close!(got.statistic, f(&want["statistic"]), "{ctx} statistic");
            assert_close!(got.p_value, f(&want["p_value"]), "{ctx} p-value");
        }
    }
}

#[test]
fn chi2_sf_matches_scipy() {
    // scipy.stats.chi2.sf on a grid from 1e-300-scale tails to values near 1; relative tolerance 1e-9.
    for case in load("chi2_sf.json")["cases"].as_array().unwrap() {
        let (x, df, want) = (f(&case["x"]), f(&case["df"]), f(&case["sf"]));
        let got = chi2_sf(x, df).unwrap();
        let ok = if want == 0.0 {
            got < 1e-300
        } else {
            ((got - want) / want).abs() <= TOL
        };
        assert!(ok, "chi2.sf({x}, {df}): expected {want:e}, got {got:e}");
    }
}

#[test]
fn roc_auc_matches_sklearn_roc_auc_score() {
    // sklearn.metrics.roc_auc_score, ties counted one half (Hanley and McNeil 1982); the rounded variant has ties.
    let d = Data::new();
    for (name, v) in d.variants() {
        let h = f64s(&v["log_odds"]);
        let p = f64s(&v["probability"]);
        assert_close!(
            roc_auc(&h, &d.labels).unwrap(),
            f(&v["roc_auc_log_odds"]),
            "{name} AUC on log-odds"
        );
        assert_close!(
            roc_auc(&p, &d.labels).unwrap(),
            f(&v["roc_auc_probability"]),
            "{name} AUC on probability"
        );
    }
}

#[test]
fn ks_statistic_matches_scipy_ks_2samp() {
    // scipy.stats.ks_2samp(log-odds of positives, log-odds of negatives).statistic.
    let d = Data::new();
    for (name, v) in d.variants() {
        let h = f64s(&v["log_odds"]);
        assert_close!(
            ks_statistic(&h, &d.labels).unwrap(),
            f(&v["ks_statistic"]),
            "{name} KS"
        );
    }
}

#[test]
fn gains_and_lift_match_numpy() {
    // Common practice, no single source; reference: NumPy stable descending argsort + np.array_split.
    let d = Data::new();
    for (name, v) in d.variants() {
        let h = f64s(&v["log_odds"]);
        for want in v["gains"].as_array().unwrap() {
            let g = want["groups"].as_u64().unwrap() as usize;
            let rows = gains_lift(&h, &d.labels, g).unwrap();
            let ctx = format!("{name} {g} groups");
            assert_eq!(
                rows.iter().map(|r| r.count).collect::<Vec<_>>(),
                usizes(&want["count"]),
                "{ctx}"
            );
            assert_eq!(
                rows.iter().map(|r| r.positives).collect::<Vec<_>>(),
                usizes(&want["positives"]),
                "{ctx}"
            );
            for (k, r) in rows.iter().enumerate() {
                assert_close!(
                    r.cumulative_gain,
                    f64s(&want["cumulative_gain"])[k],
                    "{ctx} group {k} gain"
                );
                assert_close!(r.lift, f64s(&want["lift"])[k], "{ctx} group {k} lift");
                assert_close!(
                    r.cumulative_lift,
                    f64s(&want["cumulative_lift"])[k],
                    "{ctx} group {k} cum. lift"
                );
            }
        }
    }
}

#[test]
fn counts_at_threshold_match_sklearn() {
    // sklearn.metrics.confusion_matrix, precision_score (zero_division=0) and recall_score on labels predicted
    // with the same strict rule p > t. In the rounded variant many probabilities sit exactly on the threshold.
    let d = Data::new();
    for (name, v) in d.variants() {
        let p = f64s(&v["probability"]);
        for want in v["thresholds"].as_array().unwrap() {
            let t = f(&want["threshold"]);
            let c = confusion_at_threshold(&p, &d.labels, t).unwrap();
            let ctx = format!("{name} t = {t}");
            let counts = [
                c.true_positive,
                c.false_positive,
                c.true_negative,
                c.false_negative,
            ];
            let expected = ["tp", "fp", "tn", "fn"].map(|k| want[k].as_u64().unwrap() as usize);
            assert_eq!(counts, expected, "{ctx} (tp, fp, tn, fn)");
            assert_close!(
                c.precision().unwrap_or(0.0),
                f(&want["precision"]),
                "{ctx} precision"
            );
            assert_close!(c.recall().unwrap(), f(&want["recall"]), "{ctx} recall");
        }
    }
}

#[test]
fn psi_matches_numpy_with_both_empty_bin_rules() {
    // PSI = sum (a_i - e_i) ln(a_i / e_i) (Siddiqi 2006) in NumPy; decile edges np.percentile of the reference.
    let d = Data::new();
    let psi = &d.fixture["psi"];
    let reference = f64s(&psi["reference"]);
    let edges = quantile_edges(&reference, 10).unwrap();
    assert_eq!(edges, f64s(&psi["edges"]), "decile edges vs np.percentile");
    for case in psi["cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let actual = f64s(&case["actual"]);
        let e_counts: Vec<u64> = usizes(&case["expected_counts"])
            .into_iter()
            .map(|c| c as u64)
            .collect();
        let a_counts: Vec<u64> = usizes(&case["actual_counts"])
            .into_iter()
            .map(|c| c as u64)
            .collect();
        assert_eq!(
            bin_counts(&reference, &edges).unwrap(),
            e_counts,
            "{name} expected counts"
        );
        assert_eq!(
            bin_counts(&actual, &edges).unwrap(),
            a_counts,
            "{name} actual counts"
        );
        let floor = EmptyBinRule::Floor(1e-4);
        let add = EmptyBinRule::AddCount(0.5);
        assert_eq!(EmptyBinRule::default(), floor);
        assert_close!(
            psi_from_counts(&e_counts, &a_counts, floor).unwrap(),
            f(&case["psi_floor_1e-4"]),
            "{name}"
        );
        assert_close!(
            psi_from_counts(&e_counts, &a_counts, add).unwrap(),
            f(&case["psi_add_0.5"]),
            "{name}"
        );
        assert_close!(
            psi_from_samples(&reference, &actual, &edges, add).unwrap(),
            f(&case["psi_add_0.5"]),
            "{name} from samples"
        );
        let n = reference.len() as f64;
        let fractions: Vec<f64> = e_counts.iter().map(|&c| c as f64 / n).collect();
        assert_close!(
            psi_from_fractions(&fractions, &a_counts, floor).unwrap(),
            f(&case["psi_fractions_floor_1e-4"]),
            "{name} from fractions"
        );
    }
    // With empty actual bins (the +6 shift) the two rules differ by far more than the tolerance: the rule matters.
    let shifted = &psi["cases"][3];
    assert!(shifted["actual_counts"]
        .as_array()
        .unwrap()
        .iter()
        .any(|c| c == 0));
    assert!((f(&shifted["psi_floor_1e-4"]) - f(&shifted["psi_add_0.5"])).abs() > 1.0);
}

/// Wilson (1927) score interval against statsmodels 0.15.0
/// `statsmodels.stats.proportion.proportion_confint(count, nobs, alpha=0.05, method="wilson")`
/// (tests/fixtures/gen_intervals.py), counts 0 and n included.
#[test]
fn wilson_interval_equals_statsmodels() {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/fixtures/intervals/wilson.json"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    let cases = doc["cases"].as_array().unwrap();
    assert!(cases.len() > 20);
    for c in cases {
        let (k, n) = (c["positives"].as_u64().unwrap(), c["n"].as_u64().unwrap());
        let (lo, hi) =
            probity_models::metrics::wilson_interval(k, n, probity_models::metrics::Z_95).unwrap();
        let (want_lo, want_hi) = (c["lower"].as_f64().unwrap(), c["upper"].as_f64().unwrap());
        assert!(
            (lo - want_lo).abs() <= 1e-12,
            "{k}/{n}: lower {lo} vs {want_lo}"
        );
        assert!(
            (hi - want_hi).abs() <= 1e-12,
            "{k}/{n}: upper {hi} vs {want_hi}"
        );
    }
}
