//! The champion-challenger comparison of `probity_models::compare` against `tests/fixtures/gen_compare.py`.
//!
//! Data: scikit-learn's bundled `load_breast_cancer` (Street, Wolberg and Mangasarian 1993), held-out (5-fold) log-odds
//! of a LogisticRegression (champion) and a GradientBoostingClassifier (challenger) on four columns; "exact" uses them
//! as they are, "rounded" rounds both to one decimal, which creates ties. Library versions are recorded in the fixture
//! (scikit-learn 1.9.1, SciPy 1.17.1, NumPy 2.4.6, statsmodels 0.15.0).
//!
//! The generator's DeLong test is written from DeLong, DeLong and Clarke-Pearson (1988), Biometrics 44, with the
//! paper's O(m n) pair sum; ours uses the midrank form of Sun and Xu (2014), IEEE Signal Processing Letters 21. Its
//! paired log-loss test is Diebold and Mariano (1995), J. Business & Economic Statistics 13, and is also checked
//! against `scipy.stats.ttest_rel` (same statistic) and statsmodels' Newey-West (HAC) standard error.
//!
//! Tolerances: counts and rows exactly; real values `|a - e| <= 1e-9 max(1, |e|)`; p-values absolute 1e-9. The
//! bootstrap standard error (2,000 seeded resamples of the paired cases) must agree with DeLong's within 10%.

use probity_models::compare::{
    agreement, compare_outcomes, delong_test, diebold_mariano, log_loss_differences, share_hash,
    share_unit, AgreementOptions, Assignment, OutcomeOptions, SharePlan, VarianceEstimator,
};
use probity_models::metrics::{BinStrategy, EmptyBinRule};
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
    let path = format!("{}/fixtures/compare/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("reading {path}: {e}"));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("parsing {path}: {e}"))
}

fn f(v: &Value) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("expected a number in the fixture, found {v}"))
}

fn u(v: &Value) -> usize {
    let n = v
        .as_u64()
        .unwrap_or_else(|| panic!("expected a count in the fixture, found {v}"));
    usize::try_from(n).unwrap()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(f).collect()
}

struct Case {
    name: String,
    champion: Vec<f64>,
    challenger: Vec<f64>,
    labels: Vec<u8>,
    want: Value,
}

fn cases() -> Vec<Case> {
    let fixture = load("breast_cancer.json");
    let variants = fixture["variants"].as_object().unwrap();
    assert_eq!(variants.len(), 2);
    variants
        .iter()
        .map(|(name, v)| Case {
            name: name.clone(),
            champion: f64s(&v["champion_log_odds"]),
            challenger: f64s(&v["challenger_log_odds"]),
            labels: v["labels"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| u8::try_from(u(x)).unwrap())
                .collect(),
            want: v.clone(),
        })
        .collect()
}

#[test]
fn agreement_matches_scipy_and_numpy() {
    for c in cases() {
        let w = &c.want["agreement"];
        for flip in w["flips"].as_array().unwrap() {
            let opts = AgreementOptions {
                threshold: Some(f(&flip["threshold"])),
                psi_bins: u(&w["psi_bins"]),
                psi_rule: EmptyBinRule::Floor(f(&w["psi_floor"])),
            };
            let g = agreement(&c.champion, &c.challenger, &opts).unwrap();
            let ctx = format!("{} at threshold {}", c.name, flip["threshold"]);
            assert_eq!(g.cases, u(&w["cases"]), "{ctx}");
            // scipy.stats.spearmanr (average ranks for ties).
            assert_close!(g.spearman.unwrap(), f(&w["spearman"]), "{ctx}: spearman");
            assert_close!(
                g.mean_difference,
                f(&w["mean_difference"]),
                "{ctx}: mean diff"
            );
            assert_close!(
                g.mean_absolute_difference,
                f(&w["mean_absolute_difference"]),
                "{ctx}: mean |diff|"
            );
            assert_close!(
                g.max_absolute_difference,
                f(&w["max_absolute_difference"]),
                "{ctx}: max |diff|"
            );
            assert_eq!(g.max_difference_row, u(&w["max_difference_row"]), "{ctx}");
            let fl = g.flips.unwrap();
            assert_eq!(fl.champion_only, u(&flip["champion_only"]), "{ctx}");
            assert_eq!(fl.challenger_only, u(&flip["challenger_only"]), "{ctx}");
            assert_close!(fl.share, f(&flip["share"]), "{ctx}: flip share");
            // PSI at the champion's deciles (np.percentile), shares floored (Siddiqi 2006 formula).
            assert_eq!(g.psi_bins_used, u(&w["psi_bins_used"]), "{ctx}");
            assert_close!(g.psi, f(&w["psi"]), "{ctx}: psi");
        }
    }
}

#[test]
fn delong_matches_the_1988_pair_definition_and_sklearn_auc() {
    for c in cases() {
        let w = &c.want["delong"];
        let t = delong_test(&c.champion, &c.challenger, &c.labels).unwrap();
        let ctx = c.name.as_str();
        assert_eq!(
            (t.positives, t.negatives),
            (u(&w["positives"]), u(&w["negatives"]))
        );
        assert_close!(t.auc_champion, f(&w["auc_champion"]), "{ctx}: AUC champion");
        assert_close!(
            t.auc_challenger,
            f(&w["auc_challenger"]),
            "{ctx}: AUC challenger"
        );
        // sklearn.metrics.roc_auc_score as a second reference for the AUCs.
        assert_close!(
            t.auc_champion,
            f(&w["auc_champion_sklearn"]),
            "{ctx}: AUC vs sklearn"
        );
        assert_close!(
            t.auc_challenger,
            f(&w["auc_challenger_sklearn"]),
            "{ctx}: AUC vs sklearn"
        );
        assert_close!(t.se_champion, f(&w["se_champion"]), "{ctx}: se champion");
        assert_close!(
            t.se_challenger,
            f(&w["se_challenger"]),
            "{ctx}: se challenger"
        );
        assert_close!(t.covariance, f(&w["covariance"]), "{ctx}: covariance");
        assert_close!(t.difference, f(&w["difference"]), "{ctx}: difference");
        assert_close!(
            t.standard_error,
            f(&w["standard_error"]),
            "{ctx}: se of difference"
        );
        assert_close!(t.z.unwrap(), f(&w["z"]), "{ctx}: z");
        // 2 * scipy.stats.norm.sf(|z|).
        assert_close!(t.p_value.unwrap(), f(&w["p_value"]), "{ctx}: p");
    }
}

#[test]
fn bootstrap_agrees_with_the_delong_standard_error() {
    for c in cases() {
        let t = delong_test(&c.champion, &c.challenger, &c.labels).unwrap();
        let boot = f(&c.want["bootstrap"]["standard_error"]);
        let ratio = t.standard_error / boot;
        println!(
            "{}: DeLong se {:.6}, bootstrap se {boot:.6}, ratio {ratio:.4}",
            c.name, t.standard_error
        );
        assert!(
            (ratio - 1.0).abs() < 0.10,
            "{}: DeLong se {} vs bootstrap {boot}",
            c.name,
            t.standard_error
        );
    }
}

#[test]
fn paired_log_loss_test_matches_diebold_mariano_ttest_and_hac() {
    for c in cases() {
        let w = &c.want["log_loss"];
        let ctx = c.name.as_str();
        let d = log_loss_differences(&c.champion, &c.challenger, &c.labels).unwrap();
        let t = diebold_mariano(&d, VarianceEstimator::Independent).unwrap();
        assert_close!(t.mean, f(&w["mean"]), "{ctx}: mean");
        assert_close!(t.standard_error, f(&w["standard_error"]), "{ctx}: se");
        assert_close!(t.statistic.unwrap(), f(&w["statistic"]), "{ctx}: DM");
        // The independent-case DM statistic is the paired t statistic: scipy.stats.ttest_rel (SciPy 1.17.1).
        assert_close!(
            t.statistic.unwrap(),
            f(&w["ttest_rel_statistic"]),
            "{ctx}: ttest_rel"
        );
        assert_close!(t.p_value.unwrap(), f(&w["p_value"]), "{ctx}: p");
        // Newey and West (1987) with Bartlett weights: statsmodels OLS HAC, use_correction=False (0.15.0).
        let lag = u(&w["newey_west_lag"]);
        let nw = diebold_mariano(&d, VarianceEstimator::NeweyWest { lag }).unwrap();
        assert_close!(
            nw.standard_error,
            f(&w["newey_west_standard_error"]),
            "{ctx}: NW se"
        );
        assert_close!(
            nw.statistic.unwrap(),
            f(&w["newey_west_statistic"]),
            "{ctx}: NW z"
        );
        assert_close!(
            nw.p_value.unwrap(),
            f(&w["newey_west_p_value"]),
            "{ctx}: NW p"
        );
    }
}

#[test]
fn outcome_comparison_matches_log_loss_brier_and_ece_references() {
    for c in cases() {
        let ctx = c.name.as_str();
        let opts = OutcomeOptions {
            ece_bins: BinStrategy::Uniform(u(&c.want["ece"]["bins"])),
            ..OutcomeOptions::default()
        };
        let r = compare_outcomes(&c.champion, &c.challenger, &c.labels, &opts).unwrap();
        let (a, b) = (r.champion.unwrap(), r.challenger.unwrap());
        let (ll, br, ece) = (&c.want["log_loss"], &c.want["brier"], &c.want["ece"]);
        // Mean of -scipy.special.log_expit(s h).
        assert_close!(a.log_loss, f(&ll["champion"]), "{ctx}: log-loss champion");
        assert_close!(
            b.log_loss,
            f(&ll["challenger"]),
            "{ctx}: log-loss challenger"
        );
        assert_close!(r.log_loss.as_ref().unwrap().mean, f(&ll["mean"]), "{ctx}");
        // sklearn.metrics.brier_score_loss; the paired squared-error test as for the log-loss.
        assert_close!(a.brier, f(&br["champion"]), "{ctx}: Brier champion");
        assert_close!(b.brier, f(&br["challenger"]), "{ctx}: Brier challenger");
        let bt = r.brier.as_ref().unwrap();
        assert_close!(bt.mean, f(&br["mean"]), "{ctx}: Brier diff");
        assert_close!(
            bt.statistic.unwrap(),
            f(&br["statistic"]),
            "{ctx}: Brier DM"
        );
        assert_close!(bt.p_value.unwrap(), f(&br["p_value"]), "{ctx}: Brier p");
        // ECE on calibration_curve's uniform bins (Naeini, Cooper and Hauskrecht 2015).
        assert_close!(a.ece, f(&ece["champion"]), "{ctx}: ECE champion");
        assert_close!(b.ece, f(&ece["challenger"]), "{ctx}: ECE challenger");
        let dl = r.delong.as_ref().unwrap();
        assert_close!(
            dl.p_value.unwrap(),
            f(&c.want["delong"]["p_value"]),
            "{ctx}"
        );
        // Both p-values are about 0.4 on this data: with 357 positives and 212 negatives the verdict is given,
        // and it is that there is no clear difference.
        assert_eq!(
            r.verdict.code(),
            "no_clear_difference",
            "{ctx}: {}",
            r.verdict
        );
        println!("{ctx}: {}", r.verdict);
    }
}

#[test]
fn share_hashes_match_the_python_implementation() {
    let fixture = load("share_hashes.json");
    let fractions = f64s(&fixture["fractions"]);
    let plan = SharePlan::new(
        fractions
            .iter()
            .enumerate()
            .map(|(i, &x)| (format!("c{i}"), x)),
    )
    .unwrap();
    for case in fixture["cases"].as_array().unwrap() {
        let (route, key) = (
            case["route"].as_str().unwrap(),
            case["key"].as_str().unwrap(),
        );
        let ctx = format!("route {route:?}, key {key:?}");
        assert_eq!(
            format!("{:016x}", share_hash(route, key)),
            case["hash_hex"].as_str().unwrap(),
            "{ctx}"
        );
        assert_eq!(share_unit(route, key), f(&case["unit"]), "{ctx}");
        let want = match case["assignment"].as_u64() {
            Some(i) => Assignment::Challenger(usize::try_from(i).unwrap()),
            None => Assignment::Champion,
        };
        assert_eq!(plan.assign(route, key), want, "{ctx}");
    }
}

#[test]
fn split_shares_are_within_binomial_tolerance_and_sticky() {
    // 100,000 synthetic subject keys; each challenger's count must lie within 4 binomial standard deviations of
    // n f (4 sd: a two-sided normal tail of about 6e-5; common practice, no single source).
    let n = 100_000usize;
    for fractions in [vec![0.1], vec![0.01], vec![0.5], vec![0.1, 0.25]] {
        let plan = SharePlan::new(
            fractions
                .iter()
                .enumerate()
                .map(|(i, &x)| (format!("c{i}"), x)),
        )
        .unwrap();
        let mut counts = vec![0usize; fractions.len()];
        for i in 0..n {
            let key = format!("cust-{i:06}");
            let first = plan.assign("fraud", &key);
            // Sticky: the same key meets the same model on every call (and, by the pinned hashes above, on every
            // platform and after a restart).
            assert_eq!(plan.assign("fraud", &key), first);
            if let Assignment::Challenger(k) = first {
                counts[k] += 1;
            }
        }
        for (k, &frac) in fractions.iter().enumerate() {
            let mean = n as f64 * frac;
            let sd = (n as f64 * frac * (1.0 - frac)).sqrt();
            let got = counts[k] as f64;
            println!(
                "fractions {fractions:?}: challenger {k} got {got} (expected {mean}, sd {sd:.1})"
            );
            assert!(
                (got - mean).abs() <= 4.0 * sd,
                "fractions {fractions:?}: challenger {k} answered {got} of {n}, expected {mean} +- {}",
                4.0 * sd
            );
        }
    }
    // Two routes assign subjects independently: the keys routed to the challenger on one route are not those of the other.
    let plan = SharePlan::new([("c", 0.5)]).unwrap();
    let same = (0..10_000)
        .filter(|i| {
            let key = format!("cust-{i:06}");
            plan.assign("fraud", &key) == plan.assign("limits", &key)
        })
        .count();
    assert!(
        (4_600..=5_400).contains(&same),
        "{same} of 10000 agree across routes"
    );
}
