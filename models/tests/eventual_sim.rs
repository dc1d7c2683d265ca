//! Immature windows: the eventual log-loss, Brier score, positive rate and calibration table
//! (`probity_models::monitor::eventual_figures`) on simulated routes whose truth is known.
//!
//! Each simulated route (seeded) logs 300 predictions a day at uniform times over 50 days; today is day 50. A
//! prediction's log-odds are drawn from a normal distribution (mean -2.5, sd 1.2) and it is served with `p =
//! sigmoid(h)`, but the true chance of a positive is `sigmoid(-0.4 + 0.8 h)` (the model is over-confident, so the
//! calibration being estimated is not the model's claim). A positive arrives after a gamma delay (shape 2, mean 8
//! days) and counts within a 30-day horizon; the delay does not depend on the score (the method's assumption).
//! Windows of the last 3, 7 and 14 days are cut off (between about 0% and 75% of their eventual positives have
//! arrived, about 7%, 23% and 48% on average); the reference is every prediction at least 14 days old (so it holds
//! none of any window's predictions), right-censored by today.
//!
//! Truth of a window: the expected eventual figure of its predictions given their scores, with `q = P(gamma(2, 4)
//! <= 30) = 1 - e^-7.5 (1 + 7.5)` and `pi_i = q sigmoid(-0.4 + 0.8 h_i)` the chance of a positive within the
//! horizon: positive rate `mean pi_i`, log-loss `mean [pi_i softplus(-h_i) + (1 - pi_i) softplus(h_i)]`, Brier
//! `mean [pi_i (1 - p_i)^2 + (1 - pi_i) p_i^2]`, and per bin `mean_{i in b} pi_i`.
//!
//! Margins: coverage over `R` routes is a binomial proportion; at 0.95 its standard error is sqrt(0.95 * 0.05 / R)
//! (0.0126 for R = 300, the default run; `cargo test --release -p probity-models --test eventual_sim -- --ignored
//! --nocapture` runs 2,000 routes, 0.0049), and the test accepts coverage within three of them of 0.95 for the 7- and 14-day windows.
//! Bias: the mean error over the routes must be within three of its Monte Carlo standard errors of 0. The 3-day
//! window (about 6 positives arrived) is printed, not asserted: the delta-method intervals are asymptotic.

use probity_models::link::{sigmoid, softplus};
use probity_models::monitor::{
    eventual_figures, kaplan_meier, DelayObservation, Estimate, ScoredCase,
};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Gamma, Normal};

const DAYS: f64 = 50.0;
const PER_DAY: usize = 300;
const HORIZON: f64 = 30.0;
const WINDOWS: [f64; 3] = [3.0, 7.0, 14.0];
const EDGES: [f64; 11] = [0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0];

struct Prediction {
    age: f64,
    log_odds: f64,
    /// Chance of a positive within the horizon.
    pi: f64,
    /// Delay of its positive outcome, if it turns positive within the horizon.
    delay: Option<f64>,
}

fn simulate(rng: &mut StdRng, q: f64) -> Vec<Prediction> {
    let gamma = Gamma::new(2.0, 4.0).unwrap();
    let score = Normal::new(-2.5, 1.2).unwrap();
    (0..(PER_DAY as f64 * DAYS) as usize)
        .map(|_| {
            let age = DAYS * rng.random::<f64>();
            let log_odds: f64 = score.sample(rng);
            let truth = sigmoid(-0.4 + 0.8 * log_odds);
            let delay = (rng.random::<f64>() < truth)
                .then(|| gamma.sample(rng))
                .filter(|&d| d <= HORIZON);
            Prediction {
                age,
                log_odds,
                pi: q * truth,
                delay,
            }
        })
        .collect()
}

/// Coverage and error of one figure over the routes.
#[derive(Default)]
struct Tally {
    covered: usize,
    total: usize,
    /// Windows whose interval is unknown (no positive arrived: log-loss and Brier).
    unknown: usize,
    errors: Vec<f64>,
    truths: f64,
    so_far: f64,
}

impl Tally {
    fn add(&mut self, e: &Estimate, truth: f64, so_far: f64) {
        self.errors.push(e.estimate - truth);
        self.truths += truth;
        self.so_far += so_far;
        let (Some(lo), Some(hi)) = (e.lower, e.upper) else {
            self.unknown += 1;
            return;
        };
        self.covered += usize::from(lo <= truth && truth <= hi);
        self.total += 1;
    }
    fn coverage(&self) -> f64 {
        self.covered as f64 / self.total as f64
    }
    fn bias(&self) -> (f64, f64) {
        let n = self.errors.len() as f64;
        let mean = self.errors.iter().sum::<f64>() / n;
        let var = self.errors.iter().map(|e| (e - mean).powi(2)).sum::<f64>() / (n - 1.0);
        (mean, (var / n).sqrt())
    }
    fn line(&self, what: &str) -> String {
        let (bias, se) = self.bias();
        let n = self.errors.len() as f64;
        format!(
            "  {what:<13} coverage {:.3} ({} without interval)  mean truth {:.5}  bias {bias:+.6} (MC se {se:.6})  observed so far {:.5}",
            self.coverage(),
            self.unknown,
            self.truths / n,
            self.so_far / n,
        )
    }
}

#[test]
fn eventual_figures_cover_the_truth() {
    simulate_routes(300);
}

#[test]
#[ignore = "2,000 routes: about 15 s in a release build, minutes in a debug one; the default run has 300"]
fn eventual_figures_cover_the_truth_2000_routes() {
    simulate_routes(2000);
}

fn simulate_routes(routes: usize) {
    let q = 1.0 - (-7.5f64).exp() * (1.0 + 7.5);
    let mut rng = StdRng::seed_from_u64(20261203);
    let mut tallies: Vec<[Tally; 4]> = WINDOWS.iter().map(|_| Default::default()).collect();
    let mut arrived = vec![0.0; WINDOWS.len()];
    for _ in 0..routes {
        let route = simulate(&mut rng, q);
        let oldest_window = WINDOWS[WINDOWS.len() - 1];
        let reference: Vec<DelayObservation> = route
            .iter()
            .filter(|p| p.age >= oldest_window)
            .map(|p| DelayObservation {
                age: p.age,
                positive_after: p.delay.filter(|&d| d <= p.age),
            })
            .collect();
        let km = kaplan_meier(&reference, HORIZON).unwrap();
        for (w, &days) in WINDOWS.iter().enumerate() {
            let window: Vec<&Prediction> = route.iter().filter(|p| p.age < days).collect();
            let cases: Vec<ScoredCase> = window
                .iter()
                .map(|p| ScoredCase {
                    age: p.age,
                    log_odds: p.log_odds,
                    probability: sigmoid(p.log_odds),
                    positive: p.delay.is_some_and(|d| d <= p.age),
                })
                .collect();
            let f = eventual_figures(&km, &cases, &EDGES, 0.95).unwrap();
            arrived[w] += f.arrived_share;
            let n = window.len() as f64;
            let mean =
                |g: &dyn Fn(&Prediction) -> f64| window.iter().map(|p| g(p)).sum::<f64>() / n;
            // Truths, and the figures as they stand today with every prediction not yet positive taken as negative.
            let rate = mean(&|p| p.pi);
            let log_loss =
                mean(&|p| p.pi * softplus(-p.log_odds) + (1.0 - p.pi) * softplus(p.log_odds));
            let brier = mean(&|p| {
                let s = sigmoid(p.log_odds);
                p.pi * (1.0 - s).powi(2) + (1.0 - p.pi) * s * s
            });
            let so_far = |c: &ScoredCase| if c.positive { 1.0 } else { 0.0 };
            let rate_now = cases.iter().map(so_far).sum::<f64>() / n;
            let ll_now = cases
                .iter()
                .map(|c| softplus(if c.positive { -c.log_odds } else { c.log_odds }))
                .sum::<f64>()
                / n;
            let brier_now = cases
                .iter()
                .map(|c| (c.probability - so_far(c)).powi(2))
                .sum::<f64>()
                / n;
            let t = &mut tallies[w];
            t[0].add(&f.positive_rate, rate, rate_now);
            t[1].add(&f.log_loss, log_loss, ll_now);
            t[2].add(&f.brier, brier, brier_now);
            for b in &f.bins {
                let members: Vec<&&Prediction> = window
                    .iter()
                    .filter(|p| {
                        let s = sigmoid(p.log_odds);
                        (b.index == 0 || s > b.lower) && s <= b.upper
                    })
                    .collect();
                assert_eq!(members.len(), b.count);
                let truth = members.iter().map(|p| p.pi).sum::<f64>() / b.count as f64;
                if let Some(r) = &b.rate {
                    t[3].add(r, truth, b.positives_so_far as f64 / b.count as f64);
                }
            }
        }
    }
    let margin = 3.0 * (0.95f64 * 0.05 / routes as f64).sqrt();
    let mut failures = Vec::new();
    for (w, &days) in WINDOWS.iter().enumerate() {
        println!(
            "last {days} days ({} predictions, mean arrived share {:.3}), {routes} routes, 95% intervals:",
            PER_DAY as f64 * days,
            arrived[w] / routes as f64
        );
        for (t, what) in
            tallies[w]
                .iter()
                .zip(["positive rate", "log-loss", "Brier", "bins' rates"])
        {
            println!("{}", t.line(what));
        }
        if days < 7.0 {
            continue;
        }
        for (t, what) in tallies[w][..3]
            .iter()
            .zip(["positive rate", "log-loss", "Brier"])
        {
            if t.unknown > 0 {
                failures.push(format!("{days}-day {what}: {} without interval", t.unknown));
            }
            if (t.coverage() - 0.95).abs() > margin {
                failures.push(format!(
                    "{days}-day {what}: coverage {} outside 0.95 +- {margin:.4}",
                    t.coverage()
                ));
            }
            let (bias, se) = t.bias();
            if bias.abs() > 3.0 * se {
                failures.push(format!(
                    "{days}-day {what}: mean error {bias} beyond 3 Monte Carlo se ({se})"
                ));
            }
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}
