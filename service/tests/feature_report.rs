//! Per-feature stability in reports: rows scored through a real server are counted by the slot of each monitored
//! feature's value, per UTC hour, in the prediction store, and the report (the `Report` call, and `probity
//! report`'s text from the store file) shows each feature's PSI, missing rate and unknown-category rate over them.
//!
//! The numbers are checked against the NumPy reference of `tests/fixtures/gen_stability.py` (slot counts by
//! `np.digitize(right=True)`, PSI by its published formula sum (a - e) ln(a / e), Siddiqi 2006 and Yurdakul 2018,
//! shares floored at 1e-4), and against `probity_models::stability::stability` on the same counts. The fixture's
//! model and windows are the ones `feature_drift.rs` scrapes: held-out `load_breast_cancer` rows as they are
//! ("steady"), then with one feature scaled, one mostly missing and one with an unknown category ("shifted").
//!
//! The store-level test checks that counts add up across batches and replicas and that a batch written again (a
//! retry) adds nothing, on SQLite and on PostgreSQL.

#![allow(clippy::unwrap_used)]

use std::collections::{BTreeMap, HashMap};
use std::sync::Arc;

use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity::store::features::FeatureDistribution;
use probity::store::features::{FeatureCount, RowFeatures, WINDOW_MS};
use probity::store::sqlite::Durability;
use probity::store::{ModelVersionInfo, PredictionRecord, ReportFilter, SqliteStore, Store};
use probity_models::metrics::EmptyBinRule;
use probity_models::stability::stability;
use probity_models::Model;
use serde_json::Value;

#[path = "support/postgres.rs"]
mod pg;
use pg::TestDb;

const FIXTURES: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/fixtures/stability");

fn model() -> Model {
    Model::from_json_str(&std::fs::read_to_string(format!("{FIXTURES}/model.json")).unwrap())
        .unwrap()
}

fn reference() -> Value {
    serde_json::from_str(&std::fs::read_to_string(format!("{FIXTURES}/reference.json")).unwrap())
        .unwrap()
}

/// Named rows of a fixture CSV (no quoted cells); an empty cell is left out (a missing feature). Row `i` gets the
/// id `{prefix}-{i}`.
fn rows(name: &str, prefix: &str) -> Vec<pb::Row> {
    let model = model();
    let text = std::fs::read_to_string(format!("{FIXTURES}/{name}")).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    lines
        .enumerate()
        .map(|(n, line)| {
            let mut values: HashMap<String, pb::FeatureValue> = HashMap::new();
            for (h, cell) in header.iter().zip(line.split(',')) {
                let Some(i) = model.schema().index_of(h) else {
                    continue;
                };
                if cell.is_empty() {
                    continue;
                }
                let kind = if model.schema().feature(i).unwrap().is_categorical() {
                    pb::feature_value::Kind::Category(cell.to_string())
                } else {
                    pb::feature_value::Kind::Number(cell.parse().unwrap())
                };
                values.insert(h.to_string(), pb::FeatureValue { kind: Some(kind) });
            }
            pb::Row {
                prediction_id: format!("{prefix}-{n}"),
                features: Some(pb::row::Features::Named(pb::NamedFeatures { values })),
                ..Default::default()
            }
        })
        .collect()
}

/// The `[store]` lines of a server on SQLite in `dir`, or on the PostgreSQL database of `url_file`.
enum Backend<'a> {
    Sqlite(&'a std::path::Path),
    Postgres(&'a std::path::Path),
}

/// Scores the steady rows on `steady` (one batch, then the same batch again: a client's retry) and the shifted
/// rows on `shifted` (one `Score` call each), and returns the `Report` answers of both routes.
async fn score_and_report(backend: Backend<'_>) -> (pb::ReportResponse, pb::ReportResponse) {
    let models = tempfile::tempdir().unwrap();
    std::fs::copy(
        format!("{FIXTURES}/model.json"),
        models.path().join("stability.json"),
    )
    .unwrap();
    let store = match backend {
        Backend::Sqlite(dir) => format!("directory = {:?}\n", dir.display().to_string()),
        Backend::Postgres(file) => format!(
            "backend = \"postgres\"\npostgres_url_file = {:?}\n",
            file.display().to_string()
        ),
    };
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [store]\n{store}flush_interval = \"5ms\"\noutcome_hold = \"1h\"\n\
             [routes.card-steady]\nmodel = \"stability\"\nunknown_features = \"ignore\"\n\
             [routes.card-shifted]\nmodel = \"stability\"\nunknown_features = \"ignore\"\n",
            models.path().display().to_string(),
        ),
    )
    .unwrap();
    let config = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    let server = probity::serve::start(config).await.unwrap();
    let channel = tonic::transport::Channel::from_shared(format!("http://{}", server.grpc_addr()))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(channel);
    let flush = || {
        let log = Arc::clone(server.store().unwrap());
        tokio::task::spawn_blocking(move || log.flush().unwrap())
    };

    for _ in 0..2 {
        scoring
            .score_batch(pb::ScoreBatchRequest {
                route: "card-steady".into(),
                rows: rows("steady.csv", "steady"),
                explain: 0,
            })
            .await
            .unwrap();
        // The retry is written in a batch of its own.
        flush().await.unwrap();
    }
    let now = || {
        i64::try_from(
            std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .unwrap()
                .as_millis(),
        )
        .unwrap()
    };
    let shifted_rows = rows("shifted.csv", "shifted");
    let total = shifted_rows.len();
    let (start, mut middle) = (now(), 0);
    for (i, row) in shifted_rows.into_iter().enumerate() {
        if i == total / 2 {
            // Strictly after the first half's prediction times.
            tokio::time::sleep(std::time::Duration::from_millis(2)).await;
            middle = now();
            tokio::time::sleep(std::time::Duration::from_millis(2)).await;
        }
        scoring
            .score(pb::ScoreRequest {
                route: "card-shifted".into(),
                row: Some(row),
                explain: 0,
            })
            .await
            .unwrap();
    }
    flush().await.unwrap();
    let report = |route: &str| {
        let request = pb::ReportRequest {
            route: route.into(),
            ..Default::default()
        };
        let mut client = outcomes.clone();
        async move { client.report(request).await.unwrap().into_inner() }
    };
    let steady = report("card-steady").await;
    let shifted = report("card-shifted").await;
    // A range starting half-way through the shifted rows holds the second half's predictions, and the whole hour's
    // counts: the range is widened to the hour (when the rows did not straddle an hour boundary).
    let half = outcomes
        .report(pb::ReportRequest {
            route: "card-shifted".into(),
            from_unix_ms: middle,
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(half.series[0].predictions as usize, total - total / 2);
    if start.div_euclid(WINDOW_MS) == now().div_euclid(WINDOW_MS) {
        assert!(half.series[0]
            .features
            .iter()
            .all(|f| f.rows as usize == total));
    }
    server.shutdown().await;
    (steady, shifted)
}

/// Each monitored feature of the report section equals the NumPy reference of `window` and the model crate's
/// stability figures on the reference counts.
fn check(response: &pb::ReportResponse, window: &str) {
    let model = model();
    let reference = reference();
    assert_eq!(response.series.len(), 1, "{window}: one section");
    let s = &response.series[0];
    let monitored: Vec<_> = model.training_distributions().collect();
    assert_eq!(s.features.len(), monitored.len(), "{window}: every feature");
    for ((i, d), f) in monitored.into_iter().zip(&s.features) {
        let name = &model.schema().feature(i).unwrap().name;
        assert_eq!(&f.feature, name, "{window}: in the model file's order");
        let r = &reference[window][name];
        let want: Vec<u64> = serde_json::from_value(r["counts"].clone()).unwrap();
        // Each row once: the steady batch sent twice counts once.
        assert_eq!(f.counts, want, "{window} {name}: counts");
        assert_eq!(
            f.rows, s.predictions,
            "{window} {name}: one count per prediction"
        );
        // NumPy, Siddiqi's formula (tests/fixtures/gen_stability.py).
        let psi = f.psi.unwrap();
        assert!(
            (psi - r["psi"].as_f64().unwrap()).abs() <= 1e-12,
            "{window} {name}: PSI {psi} against {}",
            r["psi"]
        );
        assert!(
            (f.missing_rate.unwrap() - r["missing_rate"].as_f64().unwrap()).abs() <= 1e-15,
            "{window} {name}: missing rate"
        );
        assert_eq!(
            f.unknown_rate.is_some(),
            !r["unknown_rate"].is_null(),
            "{window} {name}: unknown rate of a categorical feature only"
        );
        if let Some(u) = f.unknown_rate {
            assert!((u - r["unknown_rate"].as_f64().unwrap()).abs() <= 1e-15);
        }
        // The model crate's function on the same counts, exactly.
        let ours = stability(d, &want, EmptyBinRule::default()).unwrap();
        assert_eq!(psi, ours.psi, "{window} {name}");
        assert_eq!(f.missing_rate, Some(ours.missing_rate));
        assert_eq!(f.unknown_rate, ours.unknown_rate);
    }
    // The JSON carries the same figures.
    let json: Value = serde_json::from_str(&response.json).unwrap();
    let first = &json["series"][0]["features"][0];
    assert_eq!(first["feature"], Value::from(s.features[0].feature.clone()));
    assert_eq!(first["psi"].as_f64(), s.features[0].psi);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_report_shows_each_features_stability_on_sqlite() {
    let data = tempfile::tempdir().unwrap();
    let (steady, shifted) = score_and_report(Backend::Sqlite(data.path())).await;
    check(&steady, "steady");
    check(&shifted, "shifted");
    // The scaled, emptied and unknown-category features moved past 0.25 (common practice, no single source).
    let psi = |r: &pb::ReportResponse, name: &str| {
        r.series[0]
            .features
            .iter()
            .find(|f| f.feature == name)
            .unwrap()
            .psi
            .unwrap()
    };
    for name in ["mean_radius", "mean_texture", "mean_perimeter"] {
        assert!(
            psi(&steady, name) < 0.25 && psi(&shifted, name) > 0.25,
            "{name}"
        );
    }

    // `probity report` reads the same store file and prints the figures.
    let mut store =
        SqliteStore::open_existing(&data.path().join(probity::store::sqlite::FILE_NAME)).unwrap();
    let report = probity::report::build(
        &mut store,
        &ReportFilter {
            route: Some("card-shifted".into()),
            ..ReportFilter::default()
        },
    )
    .unwrap();
    let text = probity::report::text::render(&report);
    assert!(
        text.contains("feature stability against the training distribution"),
        "{text}"
    );
    let f = &shifted.series[0].features[0];
    assert!(
        text.lines()
            .any(|l| l.split_whitespace().next() == Some(f.feature.as_str())
                && l.contains(&format!("{:.6}", f.psi.unwrap()))),
        "{text}"
    );
}

#[test]
fn the_report_shows_each_features_stability_on_postgres() {
    // The test database is made with the blocking client, outside the runtime.
    let Some(db) = TestDb::create("features") else {
        return;
    };
    let dir = tempfile::tempdir().unwrap();
    let url_file = dir.path().join("db-url");
    std::fs::write(&url_file, db.url()).unwrap();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let (steady, shifted) = runtime.block_on(score_and_report(Backend::Postgres(&url_file)));
    drop(runtime);
    check(&steady, "steady");
    check(&shifted, "shifted");
}

const T0: i64 = 1_767_225_600_000; // 2026-01-01T00:00:00Z

fn record(id: &str, time_ms: i64) -> PredictionRecord {
    PredictionRecord {
        prediction_id: id.into(),
        route: "r".into(),
        model: "m".into(),
        version: "1".into(),
        role: "champion".into(),
        time_ms,
        margin: 0.0,
        log_odds: 0.0,
        adjusted_log_odds: 0.0,
        probability: 0.5,
        subject_key: String::new(),
        tags: BTreeMap::new(),
        served: probity::store::Served::default(),
    }
}

/// Writes `ids` at `time_ms`, each row with slot `slot` of feature `a` and slot 0 of `b`.
fn batch(store: &mut dyn Store, ids: &[&str], time_ms: i64, slot: u8) -> Vec<bool> {
    let names: Arc<[String]> = vec!["a".to_string(), "b".to_string()].into();
    let records: Vec<PredictionRecord> = ids.iter().map(|id| record(id, time_ms)).collect();
    let features: Vec<RowFeatures> = ids
        .iter()
        .map(|_| RowFeatures::new(Arc::clone(&names), &[slot, 0]).unwrap())
        .collect();
    let refs: Vec<Option<&RowFeatures>> = features.iter().map(Some).collect();
    store.insert_predictions_counted(&records, &refs).unwrap().0
}

/// (feature, slot) -> rows over `filter`.
fn sums(store: &mut dyn Store, filter: &ReportFilter) -> BTreeMap<(String, i64), i64> {
    store
        .feature_counts(filter)
        .unwrap()
        .into_iter()
        .map(|c: FeatureCount| ((c.feature, c.slot), c.rows))
        .collect()
}

/// Two batches and a second replica add up; a batch written again (a retry after a lost answer) adds nothing; the
/// windows are UTC hours, and retention removes an hour once all of it is past the cutoff.
fn counts_add_up_once(first: &mut dyn Store, replica: &mut dyn Store) {
    let hour = T0 + 5 * WINDOW_MS;
    assert_eq!(batch(first, &["x1", "x2", "x3"], hour + 10, 2), [true; 3]);
    assert_eq!(batch(first, &["x4", "x5"], hour + 20, 1), [true; 2]);
    // The retry of the first batch: logged already, nothing written, nothing counted.
    assert_eq!(batch(first, &["x1", "x2", "x3"], hour + 10, 2), [false; 3]);
    // Another replica, same hour; one of its rows repeats an id the first wrote.
    assert_eq!(
        batch(replica, &["y1", "x5"], hour + WINDOW_MS - 1, 2),
        [true, false]
    );
    // The next hour.
    assert_eq!(batch(replica, &["z1"], hour + WINDOW_MS, 3), [true]);

    let all = ReportFilter::default();
    let want = |pairs: &[((&str, i64), i64)]| -> BTreeMap<(String, i64), i64> {
        pairs
            .iter()
            .map(|((f, s), n)| ((f.to_string(), *s), *n))
            .collect()
    };
    assert_eq!(
        sums(first, &all),
        want(&[(("a", 1), 2), (("a", 2), 4), (("a", 3), 1), (("b", 0), 7)])
    );
    // A range inside the first hour is widened to the whole hour; the next hour is out.
    let first_hour = ReportFilter {
        from_ms: Some(hour + 15),
        to_ms: Some(hour + 16),
        ..ReportFilter::default()
    };
    assert_eq!(
        sums(replica, &first_hour),
        want(&[(("a", 1), 2), (("a", 2), 4), (("b", 0), 6)])
    );
    let counted = first.feature_counts(&first_hour).unwrap();
    assert!(counted.iter().all(|c| c.window_ms == hour));
    // Retention: a cutoff inside the second hour removes the first (wholly past) and keeps the second.
    first.remove_expired(0, hour + WINDOW_MS + 1).unwrap();
    assert_eq!(sums(first, &all), want(&[(("a", 3), 1), (("b", 0), 1)]));

    // Facts recorded without training distributions (by an earlier build) get them when registered again; the
    // rest stays as first recorded, and distributions once kept are not replaced.
    let facts = |base_rate: f64, share: f64| ModelVersionInfo {
        model: "old".into(),
        version: "1".into(),
        base_rate,
        reference: None,
        features: if share > 0.0 {
            vec![FeatureDistribution {
                feature: "a".into(),
                edges: Some(vec![1.0]),
                shares: vec![share, 1.0 - share],
                missing: 0.0,
                unknown: 0.0,
            }]
        } else {
            Vec::new()
        },
    };
    first.register_model(&facts(0.1, 0.0)).unwrap();
    replica.register_model(&facts(0.2, 0.5)).unwrap();
    first.register_model(&facts(0.3, 0.25)).unwrap();
    let kept = first.model_version("old", "1").unwrap().unwrap();
    assert_eq!(kept.base_rate, 0.1);
    assert_eq!(kept.features, facts(0.2, 0.5).features);
}

#[test]
fn counts_add_up_once_on_sqlite() {
    let dir = tempfile::tempdir().unwrap();
    let mut first = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    let mut replica = SqliteStore::open(dir.path(), Durability::Normal).unwrap();
    counts_add_up_once(&mut first, &mut replica);
}

#[test]
fn counts_add_up_once_on_postgres() {
    let Some(db) = TestDb::create("feature_counts") else {
        return;
    };
    let mut first = db.open(T0);
    let mut replica = db.open(T0);
    counts_add_up_once(&mut first, &mut replica);
}
