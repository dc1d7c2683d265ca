//! Immature windows: the eventual positive rate estimated from a Kaplan-Meier delay reference
//! (`probity_models::monitor::delay`) on simulated routes whose truth is known.
//!
//! Each simulated route (seeded) logs predictions at uniform times over 120 days; a prediction turns positive with
//! probability 0.08 after a delay drawn from a gamma distribution (shape 2, mean 8 days), and outcomes count within
//! a 30-day horizon. Today is day 120. The window is the last 7 days (ages 0 to 7: between about 4% and 60% of its
//! positives have arrived), the reference every older prediction, right-censored by today. The interval is the
//! module's log-scale delta-method interval at 95%.
//!
//! Truth: the window's eventual rate parameter is 0.08 times the share of positives arriving within the horizon
//! (P(gamma(2, 4) <= 30) = 1 - e^-7.5 (1 + 7.5), computed here).
//!
//! Margin: coverage over `R` routes is a binomial proportion; at 0.95 its standard error is sqrt(0.95 * 0.05 / R)
//! (0.0069 for R = 1,000), and the test accepts coverage within three of them of 0.95.

use probity_models::monitor::{eventual_rate, kaplan_meier, DelayObservation, WindowCase};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Gamma};

const DAYS: f64 = 120.0;
const HORIZON: f64 = 30.0;
const WINDOW: f64 = 7.0;
const RATE: f64 = 0.08;

/// Every prediction of a simulated route: its age today and, if its positive outcome has arrived, the delay.
fn simulate(rng: &mut StdRng, per_day: usize) -> Vec<DelayObservation> {
    let gamma = Gamma::new(2.0, 4.0).unwrap();
    (0..(per_day as f64 * DAYS) as usize)
        .map(|_| {
            let age = DAYS * rng.random::<f64>();
            let delay = (rng.random::<f64>() < RATE).then(|| gamma.sample(rng));
            DelayObservation {
                age,
                positive_after: delay.filter(|&d| d <= age),
            }
        })
        .collect()
}

/// The reference (older than the window) and the window (the last 7 days).
fn split(all: Vec<DelayObservation>) -> (Vec<DelayObservation>, Vec<WindowCase>) {
    let (window, reference): (Vec<_>, Vec<_>) = all.into_iter().partition(|o| o.age < WINDOW);
    let window = window
        .into_iter()
        .map(|o| WindowCase {
            age: o.age,
            positive: o.positive_after.is_some_and(|d| d <= HORIZON),
        })
        .collect();
    (reference, window)
}

#[test]
fn eventual_rate_intervals_cover_the_truth() {
    let truth = RATE * (1.0 - (-7.5f64).exp() * (1.0 + 7.5));
    let routes = 1000;
    let mut rng = StdRng::seed_from_u64(20261203);
    let (mut covered, mut estimates, mut observed) = (0usize, 0.0, 0.0);
    for _ in 0..routes {
        let (reference, window) = split(simulate(&mut rng, 50));
        let km = kaplan_meier(&reference, HORIZON).unwrap();
        let e = eventual_rate(&km, &window, 0.95).unwrap();
        covered += usize::from(e.lower <= truth && truth <= e.upper);
        estimates += e.estimate;
        observed += e.observed_rate;
    }
    let coverage = covered as f64 / routes as f64;
    println!(
        "{routes} routes, 50 predictions a day, last 7 days: true eventual rate {truth:.4}, mean observed so far \
         {:.4}, mean estimate {:.4}, 95% interval coverage {coverage:.3}",
        observed / routes as f64,
        estimates / routes as f64
    );
    let margin = 3.0 * (0.95f64 * 0.05 / routes as f64).sqrt();
    assert!(
        (coverage - 0.95).abs() <= margin,
        "coverage {coverage} outside 0.95 +- {margin:.4}"
    );
}

/// The eventual positive share of a whole cohort, straight from the Kaplan-Meier estimate at the horizon with
/// Greenwood's variance (Wald interval): every prediction of the 120 days, censored by today and the horizon.
#[test]
fn eventual_share_of_a_cohort_covers_the_truth() {
    let truth = RATE * (1.0 - (-7.5f64).exp() * (1.0 + 7.5));
    let routes = 1000;
    let mut rng = StdRng::seed_from_u64(99);
    let mut covered = 0usize;
    for _ in 0..routes {
        let all = simulate(&mut rng, 20);
        let km = kaplan_meier(&all, HORIZON).unwrap();
        let (_, lower, upper) = km.eventual_share_interval(0.95).unwrap();
        covered += usize::from(lower <= truth && truth <= upper);
    }
    let coverage = covered as f64 / routes as f64;
    println!("{routes} cohorts of 2,400 predictions: Greenwood 95% interval coverage of the eventual share {coverage:.3}");
    let margin = 3.0 * (0.95f64 * 0.05 / routes as f64).sqrt();
    assert!(
        (coverage - 0.95).abs() <= margin,
        "coverage {coverage} outside 0.95 +- {margin:.4}"
    );
}
