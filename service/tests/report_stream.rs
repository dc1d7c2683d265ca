//! The streamed report (bounded memory, `report::stream`) equals the report computed from the whole range loaded
//! at once (`report::build_loaded`, whose figures the scikit-learn/SciPy reference tests check), on the same rows,
//! on both store backends: every count equal, every real within 1e-12 relative.
//!
//! The rows are made to reach the edge cases of the streamed arithmetic: tied log-odds and probabilities across
//! classes and across group boundaries, corrected labels, labels settled by maturity, predictions served under two
//! base rates, outcomes received at many delays, a reference distribution for the PSI, and a series too small for
//! most figures (whose notes must match too). PostgreSQL as in `tests/support/postgres.rs` (`PROBITY_TEST_POSTGRES`,
//! `PROBITY_SKIP_POSTGRES=1`).

use std::collections::BTreeMap;

use probity::compare::CompareRequest;
use probity::report::stream::build as build_binned;
use probity::report::{build_loaded, Horizons};
use probity::store::{
    ModelVersionInfo, OutcomeInput, PredictionRecord, Reference, ReportFilter, SqliteStore, Store,
};
use probity_models::metrics::BinStrategy;
use rand::{Rng, SeedableRng};
use serde_json::Value;

#[path = "support/postgres.rs"]
mod pg;

const NOW: i64 = 1_780_000_000_000;

/// Writes the same made-up rows into `store`.
fn fill(store: &mut dyn Store) {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(13);
    store
        .register_model(&ModelVersionInfo {
            model: "m".into(),
            version: "v1".into(),
            base_rate: 0.05,
            reference: Some(Reference {
                on: "probability".into(),
                edges: vec![0.01, 0.02, 0.05, 0.1, 0.2, 0.5],
                fractions: vec![0.3, 0.2, 0.2, 0.1, 0.1, 0.05, 0.05],
            }),
            features: Vec::new(),
        })
        .unwrap();
    let mut records = Vec::new();
    let mut outcomes = Vec::new();
    for i in 0..3000i64 {
        let route = if i % 3 == 0 { "limits" } else { "fraud" };
        // Log-odds on a grid of 1/8 so that many tie; two served base rates on "fraud".
        let h = (rng.random_range(-48..16) as f64) / 8.0;
        let prior = if route == "fraud" && i < 1500 {
            0.02
        } else {
            0.05
        };
        let time_ms = NOW - 20 * 86_400_000 + i * 500_000;
        // The decision rule moves during the range (a threshold, costs, bands; a few rows without one, a few with
        // words no rule reads).
        let decision = match i {
            _ if i % 97 == 0 => "",
            _ if i % 89 == 0 => "threshold 2",
            0..=999 => "threshold 0.5",
            1000..=1999 => "costs false_positive=1 false_negative=5",
            _ => "bands 0.2,0.6 low,medium,high",
        };
        for (role, model, shift) in [("champion", "m", 0.0), ("challenger", "c", 0.25)] {
            let h = h + if rng.random_bool(0.3) { shift } else { 0.0 };
            records.push(PredictionRecord {
                prediction_id: format!("p{i}"),
                route: route.into(),
                model: model.into(),
                version: "v1".into(),
                role: role.into(),
                time_ms,
                margin: h,
                log_odds: h,
                adjusted_log_odds: h,
                probability: 1.0 / (1.0 + (-h).exp()),
                subject_key: String::new(),
                tags: BTreeMap::new(),
                served: probity::store::Served {
                    prior: Some(prior),
                    decision: decision.into(),
                },
            });
        }
        if rng.random_bool(0.5) {
            let p = 1.0 / (1.0 + (-h).exp());
            outcomes.push((
                time_ms + rng.random_range(0..10) * 3_600_000,
                OutcomeInput {
                    prediction_id: format!("p{i}"),
                    label: rng.random_bool(p.clamp(0.02, 0.98)),
                    time_ms: Some(time_ms + 1000),
                },
            ));
        }
    }
    // Route "versions": the challenger is the next version of the champion's own model.
    for i in 0..400i64 {
        let h = (rng.random_range(-40..16) as f64) / 8.0;
        let time_ms = NOW - 10 * 86_400_000 + i * 1_000_000;
        for (role, version, shift) in [("champion", "v1", 0.0), ("challenger", "v2", 0.5)] {
            let h = h + if rng.random_bool(0.5) { shift } else { 0.0 };
            records.push(PredictionRecord {
                prediction_id: format!("w{i}"),
                route: "versions".into(),
                model: "m".into(),
                version: version.into(),
                role: role.into(),
                time_ms,
                margin: h,
                log_odds: h,
                adjusted_log_odds: h,
                probability: 1.0 / (1.0 + (-h).exp()),
                subject_key: String::new(),
                tags: BTreeMap::new(),
                served: probity::store::Served {
                    prior: Some(0.05),
                    decision: "threshold 0.3".into(),
                },
            });
        }
        if rng.random_bool(0.6) {
            let p = 1.0 / (1.0 + (-h).exp());
            outcomes.push((
                time_ms + rng.random_range(1..40) * 3_600_000,
                OutcomeInput {
                    prediction_id: format!("w{i}"),
                    label: rng.random_bool(p.clamp(0.05, 0.95)),
                    time_ms: Some(time_ms + 1000),
                },
            ));
        }
    }
    // A series too small for most figures: 5 predictions, 3 negative outcomes.
    for i in 0..5i64 {
        records.push(PredictionRecord {
            prediction_id: format!("t{i}"),
            route: "tiny".into(),
            model: "m".into(),
            version: "v1".into(),
            role: "champion".into(),
            time_ms: NOW - 86_400_000 + i,
            margin: 0.0,
            log_odds: 0.0,
            adjusted_log_odds: -1.0 - i as f64,
            probability: 1.0 / (1.0 + (1.0 + i as f64).exp()),
            subject_key: String::new(),
            tags: BTreeMap::new(),
            served: probity::store::Served {
                prior: None,
                decision: String::new(),
            },
        });
        if i < 3 {
            outcomes.push((
                NOW - 1000,
                OutcomeInput {
                    prediction_id: format!("t{i}"),
                    label: false,
                    time_ms: None,
                },
            ));
        }
    }
    for chunk in records.chunks(500) {
        store.insert_predictions(chunk).unwrap();
    }
    outcomes.sort_by_key(|o| o.0);
    for (received, o) in &outcomes {
        store
            .record_outcomes(std::slice::from_ref(o), *received)
            .unwrap();
    }
    // Corrections of a few labels.
    for (received, o) in outcomes.iter().step_by(37) {
        let corrected = OutcomeInput {
            label: !o.label,
            ..o.clone()
        };
        store
            .record_outcomes(&[corrected], received + 60_000)
            .unwrap();
    }
    // Predictions older than 15 days settle as negatives on "limits".
    let maturity = BTreeMap::from([("limits".to_string(), 15 * 86_400_000i64)]);
    store.settle_matured(&maturity, NOW, 100_000).unwrap();
}

/// Compares two JSON values: integers and strings exactly, reals within `tol` relative.
fn same(path: &str, a: &Value, b: &Value, tol: f64, out: &mut Vec<String>) {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) if x.is_f64() || y.is_f64() => {
            let (x, y) = (x.as_f64().unwrap(), y.as_f64().unwrap());
            if (x - y).abs() > tol * x.abs().max(y.abs()).max(1e-300) {
                out.push(format!("{path}: streamed {x} loaded {y}"));
            }
        }
        (Value::Array(x), Value::Array(y)) if x.len() == y.len() => {
            for (i, (x, y)) in x.iter().zip(y).enumerate() {
                same(&format!("{path}[{i}]"), x, y, tol, out);
            }
        }
        (Value::Object(x), Value::Object(y)) if x.len() == y.len() => {
            for (k, v) in x {
                match y.get(k) {
                    Some(w) => same(&format!("{path}.{k}"), v, w, tol, out),
                    None => out.push(format!("{path}.{k}: missing from the loaded report")),
                }
            }
        }
        _ if a == b => {}
        _ => out.push(format!("{path}: streamed {a} loaded {b}")),
    }
}

fn check(store: &mut dyn Store, backend: &str) {
    fill(store);
    let configured = BTreeMap::from([("limits".to_string(), 0.05)]);
    let filters = [
        ReportFilter::default(),
        ReportFilter {
            from_ms: Some(NOW - 15 * 86_400_000),
            to_ms: Some(NOW - 3 * 86_400_000),
            route: Some("fraud".into()),
            ..ReportFilter::default()
        },
    ];
    let horizons = [
        Horizons::default(),
        Horizons {
            by_route: BTreeMap::from([("limits".to_string(), 15 * 86_400_000i64)]),
            all: Some(2 * 86_400_000),
        },
    ];
    let mut windows = 0usize;
    for filter in &filters {
        for bins in [BinStrategy::Uniform(10), BinStrategy::Quantile(10)] {
            for horizon in &horizons {
                let streamed = build_binned(store, filter, &configured, bins, horizon).unwrap();
                let loaded = build_loaded(store, filter, &configured, bins, horizon).unwrap();
                assert!(streamed.series.len() >= 2, "{backend}: {streamed:?}");
                let mut diffs = Vec::new();
                same(
                    "report",
                    &serde_json::to_value(&streamed).unwrap(),
                    &serde_json::to_value(&loaded).unwrap(),
                    1e-9,
                    &mut diffs,
                );
                assert!(
                    diffs.is_empty(),
                    "{backend} {filter:?} {bins:?} {horizon:?}:\n{}",
                    diffs.join("\n")
                );
                // The figures the streamed arithmetic produces are there, not only notes.
                let fraud = streamed
                    .series
                    .iter()
                    .find(|s| s.route == "fraud" && s.role == "champion")
                    .unwrap();
                assert!(fraud.roc_auc.is_some() && fraud.hosmer_lemeshow.is_some());
                assert!(fraud.base_rate_estimate.is_some() && fraud.psi.is_some());
                assert!(fraud.calibration_tests.recalibration.is_some());
                assert!(fraud.calibration_tests.spiegelhalter.is_some());
                assert!(!fraud.operating_points.is_empty());
                assert_eq!(fraud.gains.len(), 10);
                windows += streamed
                    .series
                    .iter()
                    .filter(|s| {
                        matches!(
                            s.immature_window,
                            probity::report::immature::ImmatureWindow::Estimated(_)
                        )
                    })
                    .count();
            }
        }
    }
    // The immature window is estimated (not only refused alike) in several sections.
    assert!(windows >= 4, "{backend}: {windows} estimated windows");
    let all = build_binned(
        store,
        &ReportFilter::default(),
        &configured,
        BinStrategy::Uniform(10),
        &Horizons::default(),
    )
    .unwrap();
    let fraud = all
        .series
        .iter()
        .find(|s| s.route == "fraud" && s.role == "champion")
        .unwrap();
    assert!(fraud.eventual_positive_rate.is_some(), "{:?}", fraud.notes);
    assert!(fraud.corrected > 0 && fraud.notes.iter().any(|n| n.contains("shifted")));
    let limits = all
        .series
        .iter()
        .find(|s| s.route == "limits" && s.role == "champion")
        .unwrap();
    assert!(limits.settled_by_maturity > 0);
    let tiny = all.series.iter().find(|s| s.route == "tiny").unwrap();
    assert!(
        tiny.hosmer_lemeshow.is_none() && tiny.gains.is_empty() && !tiny.notes.is_empty(),
        "{:?}",
        tiny.notes
    );
    compare(store, backend);
}

/// The streamed comparison equals the loaded one. Sums in floating point are taken in the same order; Spearman's
/// correlation and DeLong's covariances come from exact integer sums here and from floating-point sums of centred
/// values there, so those agree to rounding (1e-9 relative is far above it and far below any figure's precision).
fn compare(store: &mut dyn Store, backend: &str) {
    for (window, lag, threshold) in [
        ((None, None), None, Some(0.5)),
        (
            (Some(NOW - 15 * 86_400_000), Some(NOW - 3 * 86_400_000)),
            Some(5),
            None,
        ),
    ] {
        let request = CompareRequest {
            filter: ReportFilter {
                from_ms: window.0,
                to_ms: window.1,
                route: Some("fraud".into()),
                ..ReportFilter::default()
            },
            champion: None,
            challenger: None,
            threshold,
            newey_west_lag: lag,
        };
        let streamed = probity::compare::build(store, &request).unwrap();
        let loaded = probity::compare::build_loaded(store, &request).unwrap();
        let mut diffs = Vec::new();
        same(
            "compare",
            &serde_json::to_value(&streamed).unwrap(),
            &serde_json::to_value(&loaded).unwrap(),
            1e-9,
            &mut diffs,
        );
        let (sa, sb) = streamed.reliability.clone().unwrap();
        let (la, lb) = loaded.reliability.clone().unwrap();
        for (s, l) in [(sa, la), (sb, lb)] {
            assert_eq!(s.bins.len(), l.bins.len());
            for (x, y) in s.bins.iter().zip(&l.bins) {
                assert_eq!(
                    (x.index, x.count, x.positives),
                    (y.index, y.count, y.positives)
                );
                assert!((x.mean_predicted - y.mean_predicted).abs() < 1e-12);
            }
            assert!((s.ece - l.ece).abs() < 1e-12);
        }
        assert_eq!(streamed.differences.counts, loaded.differences.counts);
        assert!((streamed.differences.lo - loaded.differences.lo).abs() < 1e-12);
        assert!((streamed.differences.hi - loaded.differences.hi).abs() < 1e-12);
        assert!(
            diffs.is_empty(),
            "{backend} compare {request:?}:\n{}",
            diffs.join("\n")
        );
        assert!(streamed.paired_with_outcome > 100, "{streamed:?}");
        assert!(streamed.outcomes["delong"]["z"].is_number());
        if threshold.is_some() {
            assert!(streamed.agreement.as_ref().unwrap()["spearman"].is_number());
        }
    }
    // A challenger that is another version of the champion's model, chosen by default and named.
    for (champion, challenger) in [
        (None, None),
        (Some("m".into()), Some("m@v2".into())),
        (Some("m@v1".into()), None),
    ] {
        let request = CompareRequest {
            filter: ReportFilter {
                route: Some("versions".into()),
                ..ReportFilter::default()
            },
            champion,
            challenger,
            threshold: Some(0.3),
            newey_west_lag: None,
        };
        let streamed = probity::compare::build(store, &request).unwrap();
        let loaded = probity::compare::build_loaded(store, &request).unwrap();
        let mut diffs = Vec::new();
        same(
            "compare",
            &serde_json::to_value(&streamed).unwrap(),
            &serde_json::to_value(&loaded).unwrap(),
            1e-9,
            &mut diffs,
        );
        assert!(
            diffs.is_empty(),
            "{backend} compare {request:?}:\n{}",
            diffs.join("\n")
        );
        assert_eq!(
            (streamed.champion.as_str(), streamed.challenger.as_str()),
            ("m@v1", "m@v2")
        );
        assert_eq!(streamed.paired, 400);
    }
    // Naming a model that did not score is refused alike.
    let request = CompareRequest {
        filter: ReportFilter {
            route: Some("fraud".into()),
            ..ReportFilter::default()
        },
        challenger: Some("nobody".into()),
        ..CompareRequest::default()
    };
    assert_eq!(
        probity::compare::build(store, &request)
            .unwrap_err()
            .to_string(),
        probity::compare::build_loaded(store, &request)
            .unwrap_err()
            .to_string()
    );
}

#[test]
fn streamed_report_equals_the_loaded_one_on_sqlite() {
    let dir = tempfile::tempdir().unwrap();
    let mut store =
        SqliteStore::open(dir.path(), probity::store::sqlite::Durability::Normal).unwrap();
    check(&mut store, "sqlite");
}

#[test]
fn streamed_report_equals_the_loaded_one_on_postgres() {
    let Some(db) = pg::TestDb::create("stream") else {
        return;
    };
    let mut store = db.open(NOW);
    check(&mut store, "postgres");
}
