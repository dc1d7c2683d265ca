//! The report's base-rate estimate on simulated predictions with a known shifted base rate.
//!
//! Scores follow two unit-variance normal distributions, mean +1.5 for positives and -1.5 for negatives, so the
//! likelihood ratio's log is exactly `3 x` (equal-variance normal discriminant; any statistics text) and the
//! calibrated probability under a prior `pi` is `sigmoid(3 x + logit(pi))`. The population is drawn with base rate
//! 0.05 while the probabilities are served under another prior; the Saerens, Latinne and Decaestecker (2002) EM
//! estimate must recover 0.05 (within 10% relative on 10,000 scores, as issue 6 asks).

use probity_models::fit::{estimate_prior, EmOptions};
use probity_models::link::{logit, sigmoid};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use super::{section, BaseRates};
use crate::store::LoggedPrediction;

const TRUTH: f64 = 0.05;
const ROWS: usize = 10_000;

/// Rows served under `served` drawn from a population with base rate [`TRUTH`]; every row has its outcome.
fn simulate(served: f64, seed: u64) -> Vec<LoggedPrediction> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0, 1.0).unwrap();
    (0..ROWS)
        .map(|i| {
            let label = rng.random::<f64>() < TRUTH;
            let x = if label { 1.5 } else { -1.5 } + noise.sample(&mut rng);
            let h = 3.0 * x + logit(served);
            LoggedPrediction {
                prediction_id: format!("p{i}"),
                route: "cards".into(),
                model: "m".into(),
                version: "1".into(),
                role: "champion".into(),
                time_ms: i as i64,
                adjusted_log_odds: h,
                probability: sigmoid(h),
                label: Some(label),
                by_maturity: false,
                corrected: false,
                served_prior: None,
                served_decision: String::new(),
                outcome_received_ms: Some(i as i64),
            }
        })
        .collect()
}

fn report(rows: &[LoggedPrediction], rates: BaseRates) -> super::SeriesReport {
    section(
        ("cards".into(), "m".into(), "1".into(), "champion".into()),
        rows,
        None,
        rates,
        (
            probity_models::metrics::BinStrategy::Uniform(super::CALIBRATION_BINS),
            None,
        ),
    )
}

#[test]
fn estimate_recovers_a_shifted_base_rate_served_under_the_model_prior() {
    let rows = simulate(0.2, 7);
    let rates = BaseRates {
        configured: None,
        model: Some(0.2),
    };
    let r = report(&rows, rates);
    let estimate = r.base_rate_estimate.unwrap();
    println!("report estimate {estimate}, truth {TRUTH}");
    assert!(
        (estimate - TRUTH).abs() / TRUTH < 0.1,
        "estimate {estimate}, truth {TRUTH}"
    );
    let p: Vec<f64> = rows.iter().map(|r| r.probability).collect();
    let direct = estimate_prior(&p, 0.2, EmOptions::default()).unwrap().prior;
    assert_eq!(estimate, direct);
    assert_eq!(r.served_base_rate, Some(0.2));
    assert_eq!(r.configured_base_rate, None);
    let positives = rows.iter().filter(|r| r.label == Some(true)).count();
    assert_eq!(r.observed_base_rate, Some(positives as f64 / ROWS as f64));
}

#[test]
fn estimate_uses_the_configured_target_when_one_was_applied() {
    // Served under a target of 0.01 although the model was fitted at 0.2: the EM must start from the target.
    let rows = simulate(0.01, 11);
    let rates = BaseRates {
        configured: Some(0.01),
        model: Some(0.2),
    };
    let r = report(&rows, rates);
    let estimate = r.base_rate_estimate.unwrap();
    println!("report estimate {estimate}, truth {TRUTH}");
    assert!(
        (estimate - TRUTH).abs() / TRUTH < 0.1,
        "estimate {estimate}, truth {TRUTH}"
    );
    let p: Vec<f64> = rows.iter().map(|r| r.probability).collect();
    assert_eq!(
        estimate,
        estimate_prior(&p, 0.01, EmOptions::default())
            .unwrap()
            .prior
    );
    assert_eq!(r.configured_base_rate, Some(0.01));
    assert_eq!(r.served_base_rate, Some(0.01));
    // Assuming the model's prior instead would be far off: the configured rate matters.
    let wrong = report(
        &rows,
        BaseRates {
            configured: None,
            model: Some(0.2),
        },
    );
    assert!((wrong.base_rate_estimate.unwrap() - TRUTH).abs() / TRUTH > 0.5);
}

#[test]
fn estimate_is_absent_with_a_note_when_no_prior_is_known() {
    let rows = simulate(0.2, 3);
    let r = report(&rows, BaseRates::default());
    assert_eq!(r.base_rate_estimate, None);
    assert!(r.notes.iter().any(|n| n.starts_with("base-rate estimate")));
}

/// The route's target moved half-way through the range: the first half served under 0.5, the second under 0.2,
/// each row with the prior the store kept. Nothing is configured: the report takes each row's own prior, shifts the
/// first half to the latest prior (Saerens et al. 2002, eq. 2.4) and recovers the population's base rate; the
/// estimate equals the EM over the same population served under 0.2 throughout, and a report that took one prior
/// for every row (the old behaviour) misses it.
#[test]
fn a_target_that_moved_in_the_range_uses_each_prediction_s_own_prior() {
    let mut moved = simulate(0.5, 11);
    let served_late = simulate(0.2, 11);
    for (i, (row, late)) in moved.iter_mut().zip(&served_late).enumerate() {
        if i >= ROWS / 2 {
            *row = late.clone();
            row.served_prior = Some(0.2);
        } else {
            row.served_prior = Some(0.5);
        }
    }
    let rates = BaseRates {
        configured: None,
        model: Some(0.3),
    };
    let r = report(&moved, rates);
    let estimate = r.base_rate_estimate.unwrap();
    assert!(
        (estimate - TRUTH).abs() / TRUTH < 0.1,
        "estimate {estimate}, truth {TRUTH}"
    );
    let p: Vec<f64> = served_late.iter().map(|r| r.probability).collect();
    let direct = estimate_prior(&p, 0.2, EmOptions::default()).unwrap().prior;
    assert!(
        (estimate - direct).abs() <= 1e-9 * direct,
        "{estimate} vs {direct}"
    );
    assert_eq!(r.served_base_rate, Some(0.2));
    assert!(
        r.notes.iter().any(|n| n.contains("5000 of 10000")),
        "{:?}",
        r.notes
    );
    // One prior for all rows (what the report did before the store kept them) is far off.
    let mut unknown = moved.clone();
    for row in &mut unknown {
        row.served_prior = None;
    }
    let blind = report(
        &unknown,
        BaseRates {
            configured: Some(0.2),
            model: Some(0.3),
        },
    );
    let off = blind.base_rate_estimate.unwrap();
    assert!((off - TRUTH).abs() / TRUTH > 0.3, "blind estimate {off}");
}
