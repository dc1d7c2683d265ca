//! The monitoring files in `deploy/` against a running server and a real Prometheus server.
//!
//! 1. Every dashboard query parses (Prometheus's own `promtool check rules`, each query as a recording rule), and
//!    every metric name used by `deploy/prometheus/*.yml` or the dashboard is on a running server's `/metrics`, so
//!    the rules cannot rot when a metric is renamed. The server is started with TLS (the certificate gauge), the
//!    prediction store, a silent challenger (the comparison gauges), a maturity period (matured outcomes), a model
//!    reference distribution (PSI), a training distribution (per-feature counts), a broken model file (load failures) and repeated prediction ids (drops).
//! 2. Debian's `prometheus` binary (started here on a free port with a data directory of its own) scrapes the same
//!    kind of server with `rules.yml` and `alerts.yml` loaded, and the recorded fleet figures equal the server's own
//!    report over the same pairs: settled pairs, log-loss, Brier, observed and predicted base rates, and each
//!    calibration bin's count, positives and mean predicted probability. The outcomes include corrections, so the
//!    rules' `add - retract` arithmetic is checked too.
//!
//! Both need `promtool` and `prometheus` on the PATH (`deploy/check.sh` and `tests/run` install Debian's
//! `prometheus` package).

#![allow(clippy::unwrap_used)]

use std::collections::HashSet;
use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use probity::client::ConnectArgs;
use probity::serve::proto as pb;
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose,
};
use serde_json::Value;

#[path = "support/prometheus.rs"]
mod prom;
#[path = "support/serve.rs"]
mod serve;
use prom::{close, http_get, repo, start_prometheus, tool};

// ---------------------------------------------------------------------------------------------------------------
// The metric names and queries of deploy/

fn deploy_text(path: &str) -> String {
    std::fs::read_to_string(repo().join("deploy").join(path)).unwrap()
}

/// Every dashboard query.
fn dashboard_queries() -> Vec<String> {
    let d: Value = serde_json::from_str(&deploy_text("dashboards/probity.json")).unwrap();
    let mut out = Vec::new();
    for p in d["panels"].as_array().unwrap() {
        for t in p["targets"].as_array().unwrap() {
            out.push(t["expr"].as_str().unwrap().to_string());
        }
    }
    out
}

/// The exported metric names in a text: tokens of the PromQL name alphabet starting with `probity_` and holding no
/// colon (a colon marks a recorded name, e.g. `route:probity_predictions:rate5m`).
fn names_in(text: &str) -> BTreeSet<String> {
    text.split(|c: char| !(c.is_ascii_alphanumeric() || c == '_' || c == ':'))
        .filter(|t| t.starts_with("probity_") && !t.contains(':'))
        .map(str::to_string)
        .collect()
}

/// The sample names of a Prometheus text exposition.
fn exposed_names(exposition: &str) -> BTreeSet<String> {
    exposition
        .lines()
        .filter(|l| !l.starts_with('#') && !l.is_empty())
        .filter_map(|l| l.split(['{', ' ']).next())
        .map(str::to_string)
        .collect()
}

// ---------------------------------------------------------------------------------------------------------------
// The server

struct Server {
    /// Killed with SIGKILL when the handle drops.
    _process: serve::Spawned,
    grpc_port: u16,
    metrics: String,
    dir: tempfile::TempDir,
}

fn model(name: &str, intercept: f64, coefficient: f64) -> String {
    format!(
        r#"{{"format": "probity.model", "format_version": 1, "name": "{name}", "version": "1",
            "features": [{{"name": "x", "type": "numeric", "training_distribution": {{"edges": [-1.0, 0.0, 1.0],
                "shares": [0.25, 0.25, 0.25, 0.25], "missing": 0.0}}}}], "margin_scale": "log_odds", "base_rate": 0.5,
            "reference_distribution": {{"on": "probability", "edges": [0.2, 0.4, 0.6, 0.8],
                                        "fractions": [0.2, 0.2, 0.2, 0.2, 0.2]}},
            "linear": {{"intercept": {intercept}, "terms": [{{"numeric": {{"feature": 0, "coefficient": {coefficient}}}}}]}}}}"#
    )
}

fn toml_path(p: &Path) -> String {
    toml::Value::from(p.display().to_string()).to_string()
}

/// Starts `probity serve` with TLS, the log, a silent challenger and a maturity period.
async fn start() -> Server {
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    std::fs::write(models.join("fleet-a.json"), model("fleet-a", 0.25, 1.5)).unwrap();
    std::fs::write(models.join("fleet-b.json"), model("fleet-b", -0.1, -0.5)).unwrap();
    std::fs::write(models.join("broken.json"), "{ not a model").unwrap();

    // A CA and a server certificate for localhost / 127.0.0.1 (rcgen).
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params
        .distinguished_name
        .push(DnType::CommonName, "deploy test CA");
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca_params.key_usages = vec![KeyUsagePurpose::KeyCertSign, KeyUsagePurpose::CrlSign];
    let ca_key = KeyPair::generate().unwrap();
    let ca_cert = ca_params.self_signed(&ca_key).unwrap();
    let issuer = Issuer::new(ca_params, ca_key);
    let mut leaf = CertificateParams::new(vec!["localhost".into(), "127.0.0.1".into()]).unwrap();
    leaf.extended_key_usages = vec![ExtendedKeyUsagePurpose::ServerAuth];
    let leaf_key = KeyPair::generate().unwrap();
    let leaf_cert = leaf.signed_by(&leaf_key, &issuer).unwrap();
    std::fs::write(dir.path().join("ca.crt"), ca_cert.pem()).unwrap();
    std::fs::write(dir.path().join("server.crt"), leaf_cert.pem()).unwrap();
    std::fs::write(dir.path().join("server.key"), leaf_key.serialize_pem()).unwrap();
    std::fs::write(dir.path().join("token"), "deploy-test-token-0123456789\n").unwrap();

    let config = dir.path().join("probity.toml");
    std::fs::write(
        &config,
        format!(
            "[server]\nshutdown_grace_ms = 1000\nmax_connection_age_ms = 60000\n\
             [server.tls]\ncertificate_file = {}\nkey_file = {}\n\
             [[access.callers]]\nname = \"deploy-test\"\ntoken_file = {}\n\
             roles = [\"score\", \"outcome-write\", \"report-read\"]\n\
             [models]\ndirectory = {}\nwatch = false\n\
             [store]\ndirectory = {}\nflush_interval = \"10ms\"\nsweep_interval = \"200ms\"\n\
             [store.maturity]\naged = \"1s\"\n\
             [routes.card-auth]\nmodel = \"fleet-a\"\ntarget_base_rate = 0.2\n\
             [[routes.card-auth.challengers]]\nmodel = \"fleet-b\"\nmode = \"silent\"\n\
             [routes.aged]\nmodel = \"fleet-a\"\ntarget_base_rate = 0.2\n\
             [routes.drift]\nmodel = \"fleet-a\"\n",
            toml_path(&dir.path().join("server.crt")),
            toml_path(&dir.path().join("server.key")),
            toml_path(&dir.path().join("token")),
            toml_path(&models),
            toml_path(&dir.path().join("log")),
        ),
    )
    .unwrap();
    let process = serve::Spawned::start(&config, &[]);
    let server = Server {
        grpc_port: process.grpc.port(),
        metrics: process.metrics_addr(),
        _process: process,
        dir,
    };
    for _ in 0..300 {
        if matches!(http_get(&server.metrics, "/readyz"), Ok((200, _))) {
            return server;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    panic!("the server did not become ready");
}

impl Server {
    async fn connection(&self) -> probity::client::Connection {
        ConnectArgs {
            server: format!("https://127.0.0.1:{}", self.grpc_port),
            ca_file: Some(self.dir.path().join("ca.crt")),
            tls_server_name: Some("localhost".into()),
            token_file: Some(self.dir.path().join("token")),
            ..Default::default()
        }
        .connect()
        .await
        .unwrap()
    }

    async fn report(&self) -> Value {
        let mut o = pb::outcomes_client::OutcomesClient::new(self.connection().await);
        let r = o
            .report(pb::ReportRequest::default())
            .await
            .unwrap()
            .into_inner();
        serde_json::from_str(&r.json).unwrap()
    }
}

fn rows(prefix: &str, range: std::ops::Range<usize>) -> Vec<pb::Row> {
    range
        .map(|i| pb::Row {
            prediction_id: format!("{prefix}-{i}"),
            features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                values: vec![(i as f64 - 150.0) / 40.0],
            })),
            ..Default::default()
        })
        .collect()
}

/// Labels from a fixed rule: both classes, not a function of the score alone.
fn label(i: usize) -> bool {
    i.is_multiple_of(3) || i > 180
}

fn outcomes(range: std::ops::Range<usize>, flip: bool) -> Vec<pb::Outcome> {
    range
        .map(|i| pb::Outcome {
            prediction_id: format!("c-{i}"),
            label: label(i) != flip,
            outcome_time_unix_ms: 0,
        })
        .collect()
}

fn find_series<'a>(report: &'a Value, route: &str, model: &str) -> Option<&'a Value> {
    report["series"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["route"] == route && s["model"] == model)
}

fn series<'a>(report: &'a Value, route: &str, model: &str) -> &'a Value {
    find_series(report, route, model)
        .unwrap_or_else(|| panic!("no series {route}/{model} in {report}"))
}

/// A field of a series that may not be in the report yet (the writer commits in the background).
fn field(report: &Value, route: &str, model: &str, key: &str) -> Value {
    find_series(report, route, model).map_or(Value::Null, |s| s[key].clone())
}

/// Scores, repeats ids (drops), records outcomes and corrections, and waits until the log has settled all of it:
/// 250 pairs on card-auth (champion and silent challenger), 20 of them corrected, and the 40 `aged` predictions
/// settled as negatives at maturity; and until the comparison gauges are out.
async fn drive(server: &Server) -> Value {
    let conn = server.connection().await;
    let mut scoring = pb::scoring_client::ScoringClient::new(conn.clone());
    let mut out = pb::outcomes_client::OutcomesClient::new(conn);
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "card-auth".into(),
            rows: rows("c", 0..300),
        })
        .await
        .unwrap();
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "aged".into(),
            rows: rows("g", 0..40),
        })
        .await
        .unwrap();
    // The same ids again: scored, but not logged a second time (dropped as duplicate_id).
    scoring
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "card-auth".into(),
            rows: rows("c", 0..10),
        })
        .await
        .unwrap();
    let deadline = Instant::now() + Duration::from_secs(20);
    while field(
        &server.report().await,
        "card-auth",
        "fleet-b",
        "predictions",
    ) != 300
        || field(
            &server.report().await,
            "card-auth",
            "fleet-a",
            "predictions",
        ) != 300
    {
        assert!(Instant::now() < deadline, "predictions not logged");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let first = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(0..250, false),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(first
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Matched as i32));
    let corrected = out
        .record_outcomes(pb::RecordOutcomesRequest {
            outcomes: outcomes(100..120, true),
        })
        .await
        .unwrap()
        .into_inner();
    assert!(corrected
        .results
        .iter()
        .all(|r| r.status == pb::OutcomeStatus::Corrected as i32));
    loop {
        let report = server.report().await;
        let (_, text) = http_get(&server.metrics, "/metrics").unwrap();
        let done = field(&report, "card-auth", "fleet-a", "with_outcome") == 250
            && field(&report, "card-auth", "fleet-b", "with_outcome") == 250
            && field(&report, "aged", "fleet-a", "settled_by_maturity") == 40
            && text.contains("probity_compare_log_loss_p_value")
            && text.contains("probity_psi{")
            && text.contains("probity_base_rate_estimate{");
        if done {
            return report;
        }
        assert!(
            Instant::now() < deadline,
            "the log did not settle: {report}"
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

// ---------------------------------------------------------------------------------------------------------------
// 1. Queries parse; names exist

#[tokio::test]
async fn every_query_parses_and_every_metric_name_is_on_a_running_server() {
    // The dashboard's queries as recording rules (JSON is YAML), checked by promtool's PromQL parser.
    let queries = dashboard_queries();
    assert!(queries.len() >= 20, "{} queries", queries.len());
    let rules = serde_json::json!({"groups": [{"name": "dashboard", "rules": queries.iter().enumerate()
        .map(|(i, q)| serde_json::json!({"record": format!("dashboard:query_{i}"), "expr": q}))
        .collect::<Vec<_>>()}]});
    let tmp = tempfile::tempdir().unwrap();
    let file = tmp.path().join("dashboard-queries.yml");
    std::fs::write(&file, rules.to_string()).unwrap();
    let check = Command::new(tool("promtool"))
        .args(["check", "rules"])
        .arg(&file)
        .output()
        .unwrap();
    assert!(
        check.status.success(),
        "promtool rejects a dashboard query:\n{}{}",
        String::from_utf8_lossy(&check.stdout),
        String::from_utf8_lossy(&check.stderr)
    );
    // A query that is not PromQL is refused by the same check (the check can fail).
    std::fs::write(
        &file,
        r#"{"groups": [{"name": "bad", "rules": [{"record": "x:y", "expr": "sum by (route (probity_psi)"}]}]}"#,
    )
    .unwrap();
    let bad = Command::new(tool("promtool"))
        .args(["check", "rules"])
        .arg(&file)
        .output()
        .unwrap();
    assert!(!bad.status.success());

    let mut used: BTreeMap<String, BTreeSet<&str>> = BTreeMap::new();
    let sources = [
        ("prometheus/rules.yml", deploy_text("prometheus/rules.yml")),
        (
            "prometheus/alerts.yml",
            deploy_text("prometheus/alerts.yml"),
        ),
        ("dashboards/probity.json", queries.join("\n")),
    ];
    for (file, text) in &sources {
        for name in names_in(text) {
            used.entry(name).or_default().insert(file);
        }
    }
    assert!(
        used.len() >= 25,
        "only {} names found: {used:?}",
        used.len()
    );

    let server = start().await;
    drive(&server).await;
    let (status, text) = http_get(&server.metrics, "/metrics").unwrap();
    assert_eq!(status, 200);
    // `tools/vocabulary.py --metrics FILE` writes the page's metrics section from this scrape.
    if let Some(file) = std::env::var_os("PROBITY_WRITE_SCRAPE") {
        std::fs::write(file, &text).unwrap();
    }
    let exposed = exposed_names(&text);
    let missing: Vec<String> = used
        .iter()
        .filter(|(name, _)| !exposed.contains(*name))
        .map(|(name, files)| format!("{name} (in {files:?})"))
        .collect();
    assert!(
        missing.is_empty(),
        "metric names used in deploy/ but not on /metrics:\n  {}",
        missing.join("\n  ")
    );
    // The check can fail: a name that no server exports is caught.
    assert!(!exposed.contains("probity_predictions_scored_total"));
    // Every metric family the server exposes says what it is (a `# HELP` line), as the exposition format expects.
    let families: Vec<&str> = text
        .lines()
        .filter_map(|l| l.strip_prefix("# TYPE "))
        .filter_map(|l| l.split_whitespace().next())
        .collect();
    let helped: HashSet<&str> = text
        .lines()
        .filter_map(|l| l.strip_prefix("# HELP "))
        .filter_map(|l| l.split_whitespace().next())
        .collect();
    let undescribed: Vec<&&str> = families.iter().filter(|f| !helped.contains(**f)).collect();
    assert!(families.len() > 20, "{families:?}");
    assert!(
        undescribed.is_empty(),
        "metric families without HELP text: {undescribed:?}"
    );
    // Every family and every label name the server exposes is on the vocabulary page.
    let vocabulary = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/vocabulary.md"),
    )
    .unwrap();
    let labels: BTreeSet<&str> = text
        .lines()
        .filter(|l| !l.starts_with('#'))
        .filter_map(|l| Some(l.split_once('{')?.1.rsplit_once('}')?.0))
        .flat_map(|set| {
            set.split("\",")
                .filter_map(|kv| kv.split_once('='))
                .map(|(k, _)| k.trim_start_matches(','))
        })
        .collect();
    let unlisted: Vec<String> = families
        .iter()
        .map(|f| format!("`{f}`"))
        .chain(labels.iter().map(|l| format!("`{l}`")))
        .filter(|name| !vocabulary.contains(name.as_str()))
        .collect();
    assert!(
        unlisted.is_empty(),
        "metric families and labels missing from docs/vocabulary.md: {unlisted:?}"
    );
    println!("{} metric names used in deploy/, all exposed", used.len());
}

// ---------------------------------------------------------------------------------------------------------------
// 2. A real Prometheus server records the server's own figures

#[tokio::test]
async fn prometheus_records_the_servers_own_figures() {
    let server = start().await;
    let report = drive(&server).await;
    let prometheus = start_prometheus(&[&server.metrics]);

    let bin_labels = [
        "0.1", "0.2", "0.3", "0.4", "0.5", "0.6", "0.7", "0.8", "0.9", "1.0",
    ];
    let deadline = Instant::now() + Duration::from_secs(40);
    let mut checked = 0;
    for (route, model) in [
        ("card-auth", "fleet-a"),
        ("card-auth", "fleet-b"),
        ("aged", "fleet-a"),
    ] {
        let s = series(&report, route, model);
        let labels = [("route", route), ("model", model), ("version", "1")];
        // The recorded value, once it equals `want`, or the last one seen at the deadline. (The report reads the
        // log, the counters move just after the same commit: a scrape in between sees them a moment behind.)
        let figure = |record: &str, extra: Option<(&str, &str)>, want: f64| loop {
            let mut l = labels.to_vec();
            l.extend(extra);
            let got = prometheus.value(record, &l);
            if got.is_some_and(|v| close(v, want)) || Instant::now() >= deadline {
                return got.unwrap_or_else(|| panic!("{record} {l:?} never recorded"));
            }
            std::thread::sleep(Duration::from_millis(200));
        };
        let pairs = s["with_outcome"].as_f64().unwrap();
        let expected = [
            ("route_model_version:probity_outcomes_matched:net", pairs),
            (
                "route_model_version:probity_outcome_log_loss:mean",
                s["log_loss"].as_f64().unwrap(),
            ),
            (
                "route_model_version:probity_outcome_brier:mean",
                s["brier"].as_f64().unwrap(),
            ),
            (
                "route_model_version:probity_outcome_observed_base_rate:ratio",
                s["observed_base_rate"].as_f64().unwrap(),
            ),
            (
                "route_model_version:probity_outcome_predicted_base_rate:ratio",
                s["predicted_base_rate"].as_f64().unwrap(),
            ),
        ];
        for (record, want) in expected {
            let got = figure(record, None, want);
            println!("{route}/{model} {record}: recorded {got}, report {want}");
            assert!(
                close(got, want),
                "{route}/{model} {record}: recorded {got}, report {want}"
            );
            checked += 1;
        }
        for (i, bin) in s["calibration"]["bins"]
            .as_array()
            .unwrap()
            .iter()
            .enumerate()
        {
            let count = bin["count"].as_f64().unwrap();
            if count == 0.0 {
                continue;
            }
            let b = Some(("bin", bin_labels[i]));
            for (record, want) in [
                (
                    "route_model_version_bin:probity_outcome_calibration_probability_count:net",
                    count,
                ),
                (
                    "route_model_version_bin:probity_outcome_calibration_positives:net",
                    bin["positives"].as_f64().unwrap(),
                ),
                (
                    "route_model_version_bin:probity_outcome_calibration_predicted:mean",
                    bin["mean_predicted"].as_f64().unwrap(),
                ),
                (
                    "route_model_version_bin:probity_outcome_calibration_observed:ratio",
                    bin["fraction_positive"].as_f64().unwrap(),
                ),
            ] {
                let got = figure(record, b, want);
                assert!(
                    close(got, want),
                    "{route}/{model} bin {} {record}: recorded {got}, report {want}",
                    bin_labels[i]
                );
                checked += 1;
            }
        }
    }
    // Per-feature stability: the `drift` route's slot counters are out at zero before its first row (registered
    // when its model loaded), so Prometheus's `increase()` sees every row scored after its first scrape; the
    // recorded fleet PSI and missing rate then equal the figures of probity_models::stability on the server's own
    // counts (same formula, floor 1e-4).
    let zero_seen = Instant::now() + Duration::from_secs(20);
    while prometheus
        .query(r#"probity_feature_values_total{route="drift"}"#)
        .is_empty()
    {
        assert!(
            Instant::now() < zero_seen,
            "the drift route's counters were never scraped"
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    let conn = server.connection().await;
    pb::scoring_client::ScoringClient::new(conn)
        .score_batch(pb::ScoreBatchRequest {
            explain: 0,
            route: "drift".into(),
            rows: rows("d", 0..200),
        })
        .await
        .unwrap();
    let (_, exposition) = http_get(&server.metrics, "/metrics").unwrap();
    let fleet = probity_models::Model::from_json_str(&model("fleet-a", 0.25, 1.5)).unwrap();
    let dist = fleet.training_distribution(0).unwrap();
    let counts: Vec<u64> = ["0", "1", "2", "3", "missing"]
        .iter()
        .map(|bin| {
            exposition
                .lines()
                .find(|l| {
                    l.starts_with("probity_feature_values_total{")
                        && l.contains(r#"route="drift""#)
                        && l.contains(&format!(r#"bin="{bin}""#))
                })
                .and_then(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
                .unwrap() as u64
        })
        .collect();
    assert_eq!(counts.iter().sum::<u64>(), 200);
    let want = probity_models::stability::stability(
        dist,
        &counts,
        probity_models::metrics::EmptyBinRule::Floor(1e-4),
    )
    .unwrap();
    let labels = [("route", "drift"), ("model", "fleet-a"), ("feature", "x")];
    for (record, want) in [
        (
            "route_model_version_feature:probity_feature_psi:1h",
            want.psi,
        ),
        (
            "route_model_version_feature:probity_feature_missing:ratio1h",
            want.missing_rate,
        ),
    ] {
        let got = loop {
            let got = prometheus.value(record, &labels);
            if got.is_some_and(|v| close(v, want)) || Instant::now() >= deadline {
                break got;
            }
            std::thread::sleep(Duration::from_millis(200));
        };
        println!("drift {record}: recorded {got:?}, server counts {want} ({counts:?})");
        assert!(
            got.is_some_and(|v| close(v, want)),
            "{record}: recorded {got:?}, want {want}"
        );
        checked += 1;
    }
    assert!(
        want.psi > 0.25,
        "the rows are drawn away from the training shares: {want:?}"
    );

    // The corrections and maturity made it into the figures compared above.
    assert_eq!(series(&report, "card-auth", "fleet-a")["corrected"], 20);
    assert_eq!(series(&report, "aged", "fleet-a")["with_outcome"], 40);
    assert!(checked >= 30, "{checked} figures compared");
    // The rules are loaded and evaluated without error.
    let evaluated = prometheus.healthy_rules();
    assert!(evaluated >= 30, "{evaluated} rules loaded");
    println!("{checked} recorded figures equal the report; {evaluated} rules healthy");
}
