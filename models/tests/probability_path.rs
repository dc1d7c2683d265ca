//! The path from log-odds to probability, checked against published formulas and worked examples.

use probity_models::calibration::{Calibration, IsotonicInput};
use probity_models::link::{log_sigmoid, logit, sigmoid, softplus};
use probity_models::model::{OddsOf, ScoreScale};
use probity_models::transform::prior_shift;

fn close(a: f64, b: f64, tol: f64) -> bool {
    (a - b).abs() <= tol * b.abs().max(1.0)
}

/// Elkan (2001), "The foundations of cost-sensitive learning", IJCAI, section 4: a probability `p` estimated under
/// base rate `b` becomes `p' = b'(p - p b) / (b - p b + b' p - b b')` under base rate `b'`.
/// (Formula as printed in the paper, quoted from memory and re-derived here from Bayes' rule on the odds.)
fn elkan_prior_change(p: f64, b: f64, b_new: f64) -> f64 {
    b_new * (p - p * b) / (b - p * b + b_new * p - b * b_new)
}

#[test]
fn prior_shift_matches_elkans_closed_form() {
    for &(b, b_new) in &[(0.5, 0.02), (0.25, 0.0015), (0.02, 0.3), (0.1, 0.1)] {
        for &p in &[1e-6, 0.01, 0.2, 0.5, 0.77, 0.999] {
            let ours = sigmoid(logit(p) + prior_shift(b, b_new));
            let theirs = elkan_prior_change(p, b, b_new);
            assert!(
                close(ours, theirs, 1e-12),
                "b={b} b'={b_new} p={p}: ours {ours} vs Elkan {theirs}"
            );
        }
    }
}

/// Dal Pozzolo, Caelen, Johnson and Bontempi (2015), "Calibrating probability with undersampling for unbalanced
/// classification", IEEE SSCI, eq. 4: keeping every positive and a fraction `beta` of negatives turns the true
/// posterior `p` into `p_s`, and `p = beta p_s / (beta p_s - p_s + 1)`.
#[test]
fn undersampling_correction_matches_dal_pozzolo() {
    let true_rate: f64 = 0.004;
    for &beta in &[0.02, 0.1, 0.5] {
        // Base rate of the re-sampled training data.
        let sampled_rate = true_rate / (true_rate + beta * (1.0 - true_rate));
        for &p_s in &[0.001, 0.05, 0.3, 0.5, 0.9, 0.9999] {
            let theirs = beta * p_s / (beta * p_s - p_s + 1.0);
            let ours = sigmoid(logit(p_s) + prior_shift(sampled_rate, true_rate));
            assert!(
                close(ours, theirs, 1e-12),
                "beta={beta} p_s={p_s}: {ours} vs {theirs}"
            );
        }
    }
}

/// Friedman, Hastie and Tibshirani (2000), "Additive logistic regression", eq. for the population minimiser of the
/// exponential loss: `F = 1/2 ln(p / (1 - p))`, so `p = e^F / (e^-F + e^F)`.
#[test]
fn half_log_odds_follow_friedman_hastie_tibshirani() {
    use probity_models::MarginScale;
    for &f in &[-20.0, -3.0, -0.4, 0.0, 0.7, 5.0, 18.0] {
        let theirs = f64::exp(f) / (f64::exp(-f) + f64::exp(f));
        let ours = sigmoid(MarginScale::HalfLogOdds.to_log_odds(f));
        assert!(close(ours, theirs, 1e-14), "F={f}: {ours} vs {theirs}");
    }
}

/// Platt (1999): `P(y=1|f) = 1 / (1 + exp(A f + B))`. probity stores `a = -A`, `b = -B`.
#[test]
fn platt_map_matches_platts_form() {
    let (big_a, big_b) = (-1.7, 0.35);
    let map = Calibration::Platt {
        a: -big_a,
        b: -big_b,
    };
    for &f in &[-6.0, -1.0, 0.0, 0.5, 3.0] {
        let theirs = 1.0 / (1.0 + f64::exp(big_a * f + big_b));
        assert!(close(sigmoid(map.apply(f)), theirs, 1e-14));
    }
}

/// Temperature scaling (Guo, Pleiss, Sun and Weinberger 2017): `softmax(z / T)`; for two classes with logits
/// `(0, h)` that is `sigmoid(h / T)`.
#[test]
fn temperature_divides_the_log_odds() {
    let map = Calibration::Temperature { t: 2.5 };
    for &h in &[-4.0, 0.0, 1.0, 9.0] {
        let softmax = f64::exp(h / 2.5) / (1.0 + f64::exp(h / 2.5));
        assert!(close(sigmoid(map.apply(h)), softmax, 1e-14));
    }
}

/// Isotonic application is piecewise linear between the fitted points and clipped outside them, the behaviour of
/// scikit-learn's `IsotonicRegression(out_of_bounds="clip").predict` (hand-computed values; a cross-check against
/// the library itself is in the fixture tests).
#[test]
fn isotonic_interpolates_and_clips() {
    let map = Calibration::Isotonic {
        input: IsotonicInput::Probability,
        x: vec![0.1, 0.4, 0.8],
        y: vec![0.0, 0.3, 1.0],
    };
    let at = |p: f64| sigmoid(map.apply(logit(p)));
    assert_eq!(at(0.05), 0.0); // clipped to y[0] = 0: calibrated log-odds -inf, probability exactly 0
    assert_eq!(at(0.95), 1.0);
    assert!(close(at(0.25), 0.15, 1e-12));
    assert!(close(at(0.6), 0.65, 1e-12));
    assert!(!map.apply(f64::INFINITY).is_nan());
}

/// Siddiqi (2006), "Credit Risk Scorecards", ch. 10 (scaling): 600 points at odds 50:1 with 20 points to double the
/// odds gives factor = 20 / ln 2 = 28.8539 and offset = 600 - 28.8539 ln 50 = 487.123; odds 100:1 score 620 and
/// 25:1 score 580 (the worked numbers as remembered from the book; they follow from the formula).
#[test]
fn points_to_double_the_odds_worked_example() {
    let scale = ScoreScale {
        points: 600.0,
        at_odds: 50.0,
        pdo: 20.0,
        odds_of: OddsOf::Negative,
    };
    // Odds of the negative ("good") class g:1 means log-odds of the positive class h = -ln g.
    let score_at = |good_odds: f64| scale.score(-f64::ln(good_odds));
    assert!(close(score_at(50.0), 600.0, 1e-12));
    assert!(close(score_at(100.0), 620.0, 1e-12));
    assert!(close(score_at(25.0), 580.0, 1e-12));
    let factor = 20.0 / std::f64::consts::LN_2;
    assert!((factor - 28.8539).abs() < 5e-5);
    assert!(
        (score_at(1.0) - 487.123).abs() < 5e-4,
        "offset {}",
        score_at(1.0)
    );
}

/// Stability at extreme margins: no NaN, and 0 or 1 only where the float really rounds there.
#[test]
fn extreme_margins_stay_finite() {
    assert_eq!(sigmoid(800.0), 1.0);
    assert_eq!(sigmoid(-800.0), 0.0); // true value about 1e-348, below the smallest subnormal
    assert!(sigmoid(-700.0) > 0.0); // about 9.9e-305, representable
    assert!(sigmoid(-37.0) < 1.0 && 1.0 - sigmoid(36.0) > 0.0);
    // ln(1 + e^-800) = e^-800 rounds to 0; ln(1 + e^800) = 800 exactly in f64.
    assert_eq!(softplus(800.0), 800.0);
    assert_eq!(log_sigmoid(-800.0), -800.0);
    assert!((softplus(-40.0) - 4.248354255291589e-18).abs() < 1e-30); // e^-40, from the series ln(1+x) ~ x
    let beta = Calibration::Beta {
        a: 0.8,
        b: 1.3,
        c: 0.1,
    };
    for h in [-800.0, 800.0, f64::INFINITY, f64::NEG_INFINITY] {
        assert!(!beta.apply(h).is_nan(), "beta at {h}");
        assert!(!sigmoid(beta.apply(h)).is_nan());
    }
}
