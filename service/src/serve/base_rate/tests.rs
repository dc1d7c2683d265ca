use std::collections::BTreeMap;
use std::path::PathBuf;

use probity_models::fit::{estimate_prior, EmOptions};
use probity_models::link::{logit, sigmoid};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use super::*;
use crate::serve::config::{Config, ConfigError, Sources};
use crate::store::running::Windows;

fn load(text: &str) -> Result<Config, ConfigError> {
    let dir = tempfile::tempdir().unwrap();
    let path: PathBuf = dir.path().join("probity.toml");
    let text = format!("[server]\nplaintext = \"loopback\"\n{text}")
        .replace("LOGDIR", &dir.path().join("log").display().to_string());
    std::fs::write(&path, text).unwrap();
    Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
}

const ROUTES: &str = "[store]\ndirectory = \"LOGDIR\"\nprior_window = 10000\n\
    [routes.fraud]\nmodel = \"m\"\ntarget_base_rate = 0.02\n\
    [routes.plain]\nmodel = \"m\"\ntarget_base_rate = 0.02\n";

fn opted(extra: &str) -> Result<Config, ConfigError> {
    load(&format!(
        "{ROUTES}[routes.fraud.base_rate_from_estimate]\n{extra}"
    ))
}

#[test]
fn off_by_default_and_validated_with_the_key_named() {
    assert!(load(ROUTES).unwrap().base_rate_from_estimate.is_empty());
    let c = opted("min = 0.001\nmax = 0.05\nmin_predictions = 5000\n").unwrap();
    assert_eq!(
        c.base_rate_from_estimate["fraud"],
        EstimateBounds {
            min: 0.001,
            max: 0.05,
            min_predictions: 5000
        }
    );
    assert!(!c.base_rate_from_estimate.contains_key("plain"));
    // min_predictions defaults to the whole window.
    let c = opted("min = 0.001\nmax = 0.05\n").unwrap();
    assert_eq!(c.base_rate_from_estimate["fraud"].min_predictions, 10_000);
    for (extra, key) in [
        ("max = 0.05\n", "routes.fraud.base_rate_from_estimate.min"),
        (
            "min = 0.0\nmax = 0.05\n",
            "routes.fraud.base_rate_from_estimate.min",
        ),
        (
            "min = 0.01\nmax = 1.5\n",
            "routes.fraud.base_rate_from_estimate.max",
        ),
        (
            "min = 0.05\nmax = 0.01\n",
            "routes.fraud.base_rate_from_estimate.max",
        ),
        (
            "min = 0.01\nmax = 0.05\nmin_predictions = 20000\n",
            "routes.fraud.base_rate_from_estimate.min_predictions",
        ),
        (
            "min = 0.01\nmax = 0.05\nmin_predictions = 0\n",
            "routes.fraud.base_rate_from_estimate.min_predictions",
        ),
    ] {
        let e = opted(extra).unwrap_err().to_string();
        assert!(e.starts_with(&format!("{key}:")), "{extra:?}: {e}");
    }
    let e = opted("min = 0.01\nmax = 0.05\nwindow = 3\n")
        .unwrap_err()
        .to_string();
    assert!(e.contains("base_rate_from_estimate"), "{e}");
    // Without the log there is no window to estimate over.
    let e = load(
        "[routes.fraud]\nmodel = \"m\"\n[routes.fraud.base_rate_from_estimate]\nmin = 0.01\nmax = 0.05\n",
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.starts_with("routes.fraud.base_rate_from_estimate:") && e.contains("store.directory"),
        "{e}"
    );
}

fn table(c: &Config) -> RouteTable {
    RouteTable::new(c.routes.clone())
}

fn latest(
    route: &str,
    estimate: f64,
    count: usize,
) -> BTreeMap<(String, String, String), (f64, usize)> {
    BTreeMap::from([(
        (route.to_string(), "m".to_string(), String::new()),
        (estimate, count),
    )])
}

#[test]
fn a_route_without_the_option_is_never_changed() {
    let c = load(ROUTES).unwrap();
    let t = table(&c);
    let before = t.load();
    let changed = apply_once(
        &t,
        &c.base_rate_from_estimate,
        &latest("plain", 0.04, 10_000),
    );
    assert!(changed.is_empty());
    // Same table pointer: requests see exactly the configured routes, so served probabilities are unchanged.
    assert!(Arc::ptr_eq(&before, &t.load()));
    assert_eq!(t.load()["plain"].output.target_base_rate, Some(0.02));
}

#[test]
fn the_estimate_is_applied_clamped_once_the_window_is_full_enough() {
    let c = opted("min = 0.001\nmax = 0.05\nmin_predictions = 5000\n").unwrap();
    let t = table(&c);
    let b = &c.base_rate_from_estimate;
    // Too few predictions: the configured target stays.
    assert!(apply_once(&t, b, &latest("fraud", 0.03, 4999)).is_empty());
    assert_eq!(t.load()["fraud"].output.target_base_rate, Some(0.02));
    let before = t.load();
    assert_eq!(
        apply_once(&t, b, &latest("fraud", 0.03, 5000)),
        vec![("fraud".to_string(), 0.03)]
    );
    assert_eq!(t.load()["fraud"].output.target_base_rate, Some(0.03));
    // A request that resolved its route before the swap keeps the old target.
    assert_eq!(before["fraud"].output.target_base_rate, Some(0.02));
    // Clamped to the bounds; an unchanged value is not swapped again.
    assert_eq!(
        apply_once(&t, b, &latest("fraud", 0.2, 8000)),
        vec![("fraud".to_string(), 0.05)]
    );
    let now = t.load();
    assert!(apply_once(&t, b, &latest("fraud", 0.07, 8000)).is_empty());
    assert!(Arc::ptr_eq(&now, &t.load()));
    assert_eq!(
        apply_once(&t, b, &latest("fraud", 1e-6, 8000)),
        vec![("fraud".to_string(), 0.001)]
    );
    // Only the champion's estimate counts.
    let other = BTreeMap::from([(
        ("fraud".to_string(), "other".to_string(), String::new()),
        (0.03, 9000),
    )]);
    assert!(apply_once(&t, b, &other).is_empty());
    // The other route was never touched.
    assert_eq!(t.load()["plain"].output.target_base_rate, Some(0.02));
}

#[test]
fn the_window_keeps_one_prior_when_the_served_target_changes() {
    // Half the window served under 0.2, half under 0.01 (as when an applied estimate moves the target). The
    // published estimate must equal the Saerens, Latinne and Decaestecker (2002) EM over all rows expressed under
    // the first prior, and recover the population's base rate 0.05 within 10% (scores: unit-variance normals at
    // +-1.5, so the log likelihood ratio is 3 x).
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let noise = Normal::new(0.0, 1.0).unwrap();
    let mut w = Windows::new(100, 10_000);
    let mut under_first = Vec::new();
    for i in 0..10_000 {
        let label = rng.random::<f64>() < 0.05;
        let x = if label { 1.5 } else { -1.5 } + noise.sample(&mut rng);
        let prior = if i < 5_000 { 0.2 } else { 0.01 };
        let h = 3.0 * x + logit(prior);
        w.add(("fraud", "m", "1"), sigmoid(h), h, || None, prior);
        under_first.push(sigmoid(3.0 * x + logit(0.2)));
    }
    w.publish();
    let latest = w.latest().lock().unwrap().clone();
    let key = |v: &str| ("fraud".to_string(), "m".to_string(), v.to_string());
    // Kept by version, and as the model's latest for routes naming it without one.
    assert_eq!(latest[&key("1")], latest[&key("")]);
    let (estimate, count) = latest[&key("")];
    assert_eq!(count, 10_000);
    let direct = estimate_prior(&under_first, 0.2, EmOptions::default())
        .unwrap()
        .prior;
    println!("window estimate {estimate}, direct {direct}, truth 0.05");
    assert!((estimate - direct).abs() < 1e-9, "{estimate} vs {direct}");
    assert!((estimate - 0.05).abs() / 0.05 < 0.1, "{estimate}");
}
