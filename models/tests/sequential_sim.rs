//! Peeking at a champion-challenger comparison: the always-valid tests (`probity_models::monitor::sequential`)
//! against the fixed-sample ones read the same way.
//!
//! Simulated routes (seeded): a case's true log-odds `x ~ N(-1, 1.5^2)`, its outcome `y ~ Bernoulli(sigmoid(x))`;
//! each model sees `x` plus its own normal noise. Every comparison is looked at after every 100 outcomes, up to
//! 2,000; at each look the verdict is formed as the service forms it (30 positives and 30 negatives first, then the
//! paired log-loss test, then DeLong's AUC test): with the fixed-sample p-values (`VerdictRule::judge`) and with the
//! always-valid ones (`always_valid_verdict`). A comparison counts as a false "challenger better" when any look
//! says the challenger is better (by log-loss or by ranking) although both models are equally good.
//!
//! Margin: over `N` comparisons the share is a binomial proportion; at the nominal 0.05 its standard error is
//! sqrt(0.05 * 0.95 / N) (0.0049 for N = 2,000), and the test allows three of them (0.0646 for 2,000), so a correct
//! procedure fails it with probability about 0.001 (normal approximation to the binomial). The fixed-sample share is
//! printed, not asserted: its excess is a property of peeking, not of our code.

use probity_models::compare::{
    delong_test, diebold_mariano, log_loss_differences, Minimums, VarianceEstimator, VerdictRule,
};
use probity_models::link::sigmoid;
use probity_models::monitor::{
    always_valid_verdict, auc_sequence, loss_sequence, SequentialOptions,
};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Normal};

const LOOK_EVERY: usize = 100;

struct Outcome {
    fixed: Option<usize>,
    always_valid: Option<usize>,
}

/// One simulated comparison: the number of outcomes at the first look with a "challenger better" verdict, under
/// each reading.
fn run(rng: &mut StdRng, noise_champion: f64, noise_challenger: f64, max_cases: usize) -> Outcome {
    let truth = Normal::new(-1.0, 1.5).unwrap();
    let ea = Normal::new(0.0, noise_champion).unwrap();
    let eb = Normal::new(0.0, noise_challenger).unwrap();
    let (mut a, mut b, mut y) = (Vec::new(), Vec::new(), Vec::new());
    let rule = VerdictRule::default();
    let opts = SequentialOptions::default();
    let mut out = Outcome {
        fixed: None,
        always_valid: None,
    };
    while a.len() < max_cases && (out.fixed.is_none() || out.always_valid.is_none()) {
        for _ in 0..LOOK_EVERY {
            let x: f64 = truth.sample(rng);
            y.push(rng.random::<f64>() < sigmoid(x));
            a.push(x + ea.sample(rng));
            b.push(x + eb.sample(rng));
        }
        let positives = y.iter().filter(|&&v| v).count();
        let negatives = y.len() - positives;
        if positives < 30 || negatives < 30 {
            continue;
        }
        let d = log_loss_differences(&a, &b, y.as_slice()).unwrap();
        let ll = diebold_mariano(&d, VarianceEstimator::Independent).unwrap();
        let dl = delong_test(&a, &b, y.as_slice()).unwrap();
        let challenger =
            |code: &str| code == "challenger_better" || code == "challenger_ranks_better";
        if out.fixed.is_none()
            && challenger(
                rule.judge(positives, negatives, Some(&ll), Some(&dl))
                    .code(),
            )
        {
            out.fixed = Some(y.len());
        }
        let ls = loss_sequence(&ll, &opts).unwrap();
        let as_ = auc_sequence(&dl, &opts).unwrap();
        let v = always_valid_verdict(
            Minimums::default(),
            positives,
            negatives,
            Some((&ll, &ls)),
            Some((&dl, &as_)),
        );
        if out.always_valid.is_none() && challenger(v.code()) {
            out.always_valid = Some(y.len());
        }
    }
    out
}

fn false_verdict_shares(comparisons: usize) -> (f64, f64) {
    let mut rng = StdRng::seed_from_u64(20261203);
    let (mut fixed, mut valid) = (0usize, 0usize);
    for _ in 0..comparisons {
        // Both models see the truth through the same amount of noise: no difference.
        let o = run(&mut rng, 0.7, 0.7, 2000);
        fixed += usize::from(o.fixed.is_some());
        valid += usize::from(o.always_valid.is_some());
    }
    (
        fixed as f64 / comparisons as f64,
        valid as f64 / comparisons as f64,
    )
}

fn check_false_verdicts(comparisons: usize) {
    let (fixed, valid) = false_verdict_shares(comparisons);
    println!(
        "no difference, {comparisons} comparisons looked at every {LOOK_EVERY} outcomes up to 2,000: \
         false 'challenger better' share {valid:.4} always-valid, {fixed:.4} fixed-sample (nominal 0.05)"
    );
    let margin = 3.0 * (0.05f64 * 0.95 / comparisons as f64).sqrt();
    assert!(
        valid <= 0.05 + margin,
        "always-valid false share {valid} above 0.05 + {margin:.4}"
    );
}

/// The short form for every test run: 300 comparisons (margin 3 * 0.0126 = 0.0377).
#[test]
fn peeking_at_the_always_valid_test_keeps_false_verdicts_at_the_nominal_level() {
    check_false_verdicts(300);
}

/// The form: 2,000 comparisons. Ignored by default because it takes about 3 minutes in a debug build
/// (DeLong's test at each of 20 looks); run it with
/// `cargo test --release -p probity-models --test sequential_sim -- --ignored --nocapture`.
#[test]
#[ignore = "2,000 simulated comparisons: minutes in a debug build, seconds in release"]
fn peeking_over_2000_comparisons() {
    check_false_verdicts(2000);
}

#[test]
fn with_a_real_difference_a_verdict_comes() {
    // The challenger's noise is 0.5 against the champion's 1.0 (on the log-odds): a clear improvement.
    let mut rng = StdRng::seed_from_u64(7);
    let comparisons = 200;
    let cap = 10_000;
    let (mut fixed, mut valid) = (Vec::new(), Vec::new());
    for _ in 0..comparisons {
        let o = run(&mut rng, 1.0, 0.5, cap);
        fixed.push(o.fixed.unwrap_or(usize::MAX));
        valid.push(o.always_valid.unwrap_or(usize::MAX));
    }
    fixed.sort_unstable();
    valid.sort_unstable();
    let reached = valid.iter().filter(|&&n| n <= cap).count();
    println!(
        "challenger better (noise 0.5 vs 1.0), {comparisons} comparisons: median outcomes to a 'challenger better' \
         verdict {} always-valid, {} fixed-sample; {reached} of {comparisons} always-valid verdicts within {cap}",
        valid[comparisons / 2],
        fixed[comparisons / 2]
    );
    // Not a property of the method but a check that the simulation shows one: most comparisons end.
    assert!(reached * 10 >= comparisons * 9, "{reached}");
}
