//! Model versions side by side (`service/src/serve/model_ref.rs`, `serve/registry.rs`):
//! - the registry loads two versions of one model name together, refuses a second file of the same name and version
//!   (naming both files) and keeps what serves; a name that routes use bare is served in one version at a time;
//! - a route pins a version (`NAME@VERSION`) and a challenger is the next version of the champion's own model,
//!   scored silently and compared through the real server by role and version; the comparison equals the
//!   reference fixture (independent NumPy/SciPy implementations of DeLong et al. 1988 and Diebold and Mariano 1995);
//! - `probity restore` through the binary: refused without an earlier champion, for a caller without the `admin`
//!   role, and while the earlier champion is not loaded; then it returns the route to its previous champion and
//!   is recorded in the route history like a promotion.
//!
//! Fixture: `tests/fixtures/compare/breast_cancer.json` from `tests/fixtures/gen_compare.py` (scikit-learn 1.9.1,
//! SciPy 1.17.1, NumPy 2.4.6) on scikit-learn's `load_breast_cancer` (Street, Wolberg and Mangasarian 1993):
//! held-out log-odds of two models. Both versions served here are linear on two features `a` and `b`
//! (version 1: coefficients 1, 0; version 2: 0, 1), so their log-odds are the fixture's to the last bit.

#![allow(clippy::unwrap_used)]

use std::path::Path;
use std::sync::Arc;
use std::time::{Duration, Instant};

use probity::serve::config::{Config, Sources};
use probity::serve::model_ref::ModelRef;
use probity::serve::proto as pb;
use probity::serve::registry::{Outcome, Registry};
use probity::store::ReportFilter;
use serde_json::{json, Value};

const NAME: &str = "bc-linear";
const TOL: f64 = 1e-9;

fn close(actual: f64, expected: f64, what: &str) {
    assert!(
        (actual - expected).abs() <= TOL * expected.abs().max(1.0),
        "{what}\n  expected {expected:?}\n  actual   {actual:?}"
    );
}

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../tests/fixtures/compare/breast_cancer.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

/// Version `version` of the one model name, linear on `a` and `b`.
fn model(version: &str, coefficients: [f64; 2]) -> String {
    json!({
        "format": "probity.model", "format_version": 1, "name": NAME, "version": version,
        "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}],
        "margin_scale": "log_odds", "base_rate": 0.5,
        "linear": {"intercept": 0.0, "terms": [
            {"numeric": {"feature": 0, "coefficient": coefficients[0]}},
            {"numeric": {"feature": 1, "coefficient": coefficients[1]}}
        ]}
    })
    .to_string()
}

fn write_versions(dir: &Path) {
    std::fs::write(dir.join("bc-v1.json"), model("1", [1.0, 0.0])).unwrap();
    std::fs::write(dir.join("bc-v2.json"), model("2", [0.0, 1.0])).unwrap();
}

/// The log-odds a loaded model gives the row (a, b) = (0.25, -1.5).
fn log_odds_of(registry: &Registry, model: &str) -> f64 {
    let snapshot = registry.snapshot();
    let loaded = snapshot.find(&ModelRef::parse(model).unwrap()).unwrap();
    loaded
        .model
        .score(&[0.25, -1.5], &Default::default())
        .unwrap()
        .log_odds
}

#[tokio::test]
async fn two_versions_of_one_name_load_side_by_side_and_a_repeated_version_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    write_versions(dir.path());
    let registry = Arc::new(Registry::new(dir.path().to_path_buf()));
    registry.reload().await.unwrap();
    let snapshot = registry.snapshot();
    let keys: Vec<(String, String)> = snapshot.models.keys().cloned().collect();
    assert_eq!(
        keys,
        [(NAME.into(), "1".into()), (NAME.into(), "2".into())],
        "{:?}",
        snapshot.problems
    );
    assert!(snapshot.problems.is_empty());
    assert_eq!(log_odds_of(&registry, "bc-linear@1"), 0.25);
    assert_eq!(log_odds_of(&registry, "bc-linear@2"), -1.5);
    // A bare name is no answer when two versions are loaded.
    assert!(snapshot.find(&ModelRef::bare(NAME)).is_none());

    // The same name and version again, in another file: refused, naming both files; version 2 keeps serving from
    // the file that served it.
    std::fs::write(dir.path().join("a-copy.json"), model("2", [5.0, 5.0])).unwrap();
    let report = registry.reload().await.unwrap();
    let copy = report.iter().find(|l| l.file == "a-copy.json").unwrap();
    assert_eq!(copy.outcome, Outcome::Failed);
    let error = copy.error.clone().unwrap();
    assert!(
        error.contains("version `2`") && error.contains("also in file `bc-v2.json`"),
        "{error}"
    );
    let snapshot = registry.snapshot();
    assert_eq!(snapshot.problems.len(), 1);
    assert_eq!(snapshot.problems[0].file, "a-copy.json");
    assert_eq!(
        snapshot.find(&ModelRef::pinned(NAME, "2")).unwrap().file,
        "bc-v2.json"
    );
    assert_eq!(log_odds_of(&registry, "bc-linear@2"), -1.5);
    assert_eq!(log_odds_of(&registry, "bc-linear@1"), 0.25);

    // A name that routes use without a version is served in one version at a time (the first file by name when
    // none served before); the other is reported with what to do.
    let single = Registry::new(dir.path().to_path_buf()).with_single_version([NAME.to_string()]);
    let single = Arc::new(single);
    std::fs::remove_file(dir.path().join("a-copy.json")).unwrap();
    single.reload().await.unwrap();
    let snapshot = single.snapshot();
    assert_eq!(snapshot.models.len(), 1);
    assert_eq!(
        snapshot.find(&ModelRef::bare(NAME)).unwrap().file,
        "bc-v1.json"
    );
    assert_eq!(snapshot.problems.len(), 1);
    assert!(
        snapshot.problems[0].error.contains("pin the version"),
        "{:?}",
        snapshot.problems
    );
}

#[test]
fn a_name_is_pinned_in_every_reference_or_in_none() {
    let load = |routes: &str| {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("probity.toml");
        std::fs::write(
            &path,
            format!("[server]\nplaintext = \"loopback\"\n{routes}"),
        )
        .unwrap();
        Config::load(&Sources {
            file: Some(path),
            ..Sources::default()
        })
    };
    let ok = load(
        "[routes.a]\nmodel = \"m@1\"\n[[routes.a.challengers]]\nmodel = \"m@2\"\nmode = \"silent\"\n\
         [routes.b]\nmodel = \"m@2\"\n",
    )
    .unwrap();
    assert_eq!(ok.routes["a"].model, ModelRef::pinned("m", "1"));
    assert_eq!(
        ok.routes["a"].challengers.list[0].model,
        ModelRef::pinned("m", "2")
    );
    let e = load(
        "[routes.a]\nmodel = \"m\"\n[[routes.a.challengers]]\nmodel = \"m@2\"\nmode = \"silent\"\n",
    )
    .unwrap_err()
    .to_string();
    assert!(
        e.starts_with("routes.a.challengers[0].model:") && e.contains("pin the version"),
        "{e}"
    );
    let e = load("[routes.a]\nmodel = \"m@1\"\n[routes.b]\nmodel = \"m\"\n")
        .unwrap_err()
        .to_string();
    assert!(e.starts_with("routes.b.model:"), "{e}");
    let e = load("[routes.a]\nmodel = \"m@1\"\n[[routes.a.challengers]]\nmodel = \"m@1\"\nmode = \"silent\"\n")
        .unwrap_err()
        .to_string();
    assert!(e.contains("already serves this route"), "{e}");
    let e = load("[routes.a]\nmodel = \"m@1@2\"\n")
        .unwrap_err()
        .to_string();
    assert!(e.starts_with("routes.a.model: not a model"), "{e}");
}

/// A channel carrying one caller's token.
type Caller = tonic::service::interceptor::InterceptedService<
    tonic::transport::Channel,
    probity::client::BearerToken,
>;

/// Scores one row on `route`; returns (model, version, role, log-odds).
async fn score(
    client: &mut pb::scoring_client::ScoringClient<Caller>,
    route: &str,
    id: &str,
    a: f64,
    b: f64,
) -> (String, String, String, f64) {
    let r = client
        .score(pb::ScoreRequest {
            explain: 0,
            route: route.into(),
            row: Some(pb::Row {
                prediction_id: id.into(),
                features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                    values: vec![a, b],
                })),
                ..Default::default()
            }),
        })
        .await
        .unwrap()
        .into_inner();
    (r.model, r.model_version, r.role, r.log_odds)
}

/// The Compare call on route `bc` (the challenger found by itself), once `n` pairs have outcomes (or 30 s passed).
async fn compare(
    reader: &mut pb::challengers_client::ChallengersClient<Caller>,
    n: usize,
) -> Value {
    let started = Instant::now();
    loop {
        let answer = reader
            .compare(pb::CompareRequest {
                route: "bc".into(),
                ..Default::default()
            })
            .await
            .map(|r| r.into_inner());
        match &answer {
            Ok(a) => {
                let report: Value = serde_json::from_str(&a.report_json).unwrap();
                if report["paired_with_outcome"] == n || started.elapsed() > Duration::from_secs(30)
                {
                    return report;
                }
            }
            Err(_) if started.elapsed() > Duration::from_secs(30) => panic!("{answer:?}"),
            Err(_) => {}
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

const RESTORE: &[&str] = &[
    "restore",
    "--route",
    "bc",
    "--requested-by",
    "risk desk",
    "--reason",
    "version 2 declines too many",
];

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_next_version_challenges_its_own_model_and_restore_returns_the_previous_champion() {
    let fix = fixture();
    let v = &fix["variants"]["exact"];
    let ha = f64s(&v["champion_log_odds"]);
    let hb = f64s(&v["challenger_log_odds"]);
    let labels: Vec<bool> = v["labels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|y| y == 1)
        .collect();
    let n = ha.len();

    let models = tempfile::tempdir().unwrap();
    write_versions(models.path());
    let data = tempfile::tempdir().unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    let admin_token = conf.path().join("admin.token");
    std::fs::write(&admin_token, "test-admin-token-0123456789\n").unwrap();
    let pipeline_token = conf.path().join("pipeline.token");
    std::fs::write(&pipeline_token, "test-pipeline-token-0123456789\n").unwrap();
    std::fs::write(
        &path,
        format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\n\
             [[access.callers]]\nname = \"ops\"\ntoken_file = {:?}\nroles = [\"admin\", \"report-read\"]\n\
             [[access.callers]]\nname = \"pipeline\"\ntoken_file = {:?}\n\
             roles = [\"score\", \"outcome-write\", \"report-read\"]\n\
             [models]\ndirectory = {:?}\nwatch = false\n\
             [store]\ndirectory = {:?}\nflush_interval = \"5ms\"\nsweep_interval = \"50ms\"\noutcome_hold = \"1h\"\n\
             [routes.bc]\nmodel = \"{NAME}@1\"\ndecision = {{ threshold = 0.5 }}\n\
             [[routes.bc.challengers]]\nmodel = \"{NAME}@2\"\nmode = \"silent\"\n\
             [routes.pinned]\nmodel = \"{NAME}@2\"\n",
            admin_token.display().to_string(),
            pipeline_token.display().to_string(),
            models.path().display().to_string(),
            data.path().display().to_string()
        ),
    )
    .unwrap();
    let config = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    let server = probity::serve::start(config).await.unwrap();
    let url = format!("http://{}", server.grpc_addr());
    let raw = tonic::transport::Channel::from_shared(url.clone())
        .unwrap()
        .connect()
        .await
        .unwrap();
    let with_token = |file: &Path| {
        tonic::service::interceptor::InterceptedService::new(
            raw.clone(),
            probity::client::BearerToken::from_file(file).unwrap(),
        )
    };
    let pipeline = with_token(&pipeline_token);
    let admin = with_token(&admin_token);
    let mut scoring = pb::scoring_client::ScoringClient::new(pipeline.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(pipeline.clone());
    let mut reader = pb::challengers_client::ChallengersClient::new(pipeline.clone());
    let mut models_api = pb::models_client::ModelsClient::new(admin.clone());

    // Both versions serve; the route answers with the version it pins.
    let routes = models_api
        .list_routes(pb::ListRoutesRequest {})
        .await
        .unwrap()
        .into_inner();
    let versions: Vec<(&str, &str)> = routes
        .models
        .iter()
        .map(|m| (m.name.as_str(), m.version.as_str()))
        .collect();
    assert_eq!(versions, [(NAME, "1"), (NAME, "2")]);
    let facts = |model: &str| {
        let mut models_api = models_api.clone();
        let target = Some(pb::model_facts_request::Target::Model(model.to_string()));
        async move {
            models_api
                .model_facts(pb::ModelFactsRequest { target })
                .await
                .map(|r| r.into_inner().model.unwrap().version)
        }
    };
    assert_eq!(facts("bc-linear@2").await.unwrap(), "2");
    let refused = facts(NAME).await.unwrap_err();
    assert_eq!(refused.code(), tonic::Code::InvalidArgument);
    assert!(
        refused
            .message()
            .contains("several versions (1, 2); name one as bc-linear@VERSION"),
        "{refused:?}"
    );
    let (m, version, role, log_odds) = score(&mut scoring, "pinned", "p-1", 0.25, -1.5).await;
    assert_eq!(
        (m.as_str(), version.as_str(), role.as_str()),
        (NAME, "2", "champion")
    );
    assert_eq!(log_odds, -1.5);

    // Version 1 answers route bc; version 2 scores every row silently.
    for i in 0..n {
        let (m, version, role, log_odds) =
            score(&mut scoring, "bc", &format!("bc-{i}"), ha[i], hb[i]).await;
        assert_eq!(
            (m.as_str(), version.as_str(), role.as_str()),
            (NAME, "1", "champion")
        );
        assert_eq!(log_odds.to_bits(), ha[i].to_bits());
    }
    let sent: Vec<pb::Outcome> = (0..n)
        .map(|i| pb::Outcome {
            prediction_id: format!("bc-{i}"),
            label: labels[i],
            outcome_time_unix_ms: 0,
        })
        .collect();
    outcomes
        .record_outcomes(pb::RecordOutcomesRequest { outcomes: sent })
        .await
        .unwrap();

    // The Compare call tells the two versions apart by role and version.
    let report = compare(&mut reader, n).await;
    assert_eq!(report["champion"], "bc-linear@1");
    assert_eq!(report["challenger"], "bc-linear@2");
    assert_eq!(
        (
            &report["champion_predictions"],
            &report["challenger_predictions"],
            &report["paired_with_outcome"]
        ),
        (&json!(n), &json!(n), &json!(n))
    );
    // Against the fixture: the 1988 DeLong pair sum and the Diebold-Mariano test (NumPy/SciPy in gen_compare.py).
    let o = &report["outcomes"];
    let d = &v["delong"];
    for key in ["auc_champion", "auc_challenger", "z", "p_value"] {
        close(
            o["delong"][key].as_f64().unwrap(),
            d[key].as_f64().unwrap(),
            key,
        );
    }
    close(
        o["log_loss_test"]["mean_difference"].as_f64().unwrap(),
        v["log_loss"]["mean"].as_f64().unwrap(),
        "Diebold-Mariano mean",
    );
    close(
        o["log_loss_test"]["p_value"].as_f64().unwrap(),
        v["log_loss"]["p_value"].as_f64().unwrap(),
        "Diebold-Mariano p",
    );
    // The report keeps each version's predictions apart.
    let log = Arc::clone(server.store().unwrap());
    let rep = {
        let log = Arc::clone(&log);
        tokio::task::spawn_blocking(move || {
            log.flush().unwrap();
            log.with_store(|s| {
                probity::report::build(
                    s,
                    &ReportFilter {
                        route: Some("bc".into()),
                        ..ReportFilter::default()
                    },
                )
            })
            .unwrap()
        })
        .await
        .unwrap()
    };
    let series: Vec<(&str, &str, &str)> = rep
        .series
        .iter()
        .map(|s| (s.model.as_str(), s.version.as_str(), s.role.as_str()))
        .collect();
    assert_eq!(
        series,
        [(NAME, "1", "champion"), (NAME, "2", "challenger")],
        "one series per version and role"
    );

    // `probity restore` and `probity promote` through the binary.
    let cli = |args: &[&str], token: &Path| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_probity"))
            .args(args)
            .args(["--server", &url])
            .arg("--token-file")
            .arg(token)
            .output()
            .unwrap();
        (
            out.status.success(),
            String::from_utf8_lossy(&out.stdout).to_string(),
            String::from_utf8_lossy(&out.stderr).to_string(),
        )
    };
    let run = |args: &[&str], token: &Path| tokio::task::block_in_place(|| cli(args, token));
    // Nothing to restore yet.
    let (ok, _, err) = run(RESTORE, &admin_token);
    assert!(!ok, "restored with no promotion");
    assert!(
        err.contains("FAILED_PRECONDITION") && err.contains("route `bc` has no earlier champion"),
        "{err}"
    );
    // A caller without the admin role is refused before the handler.
    let (ok, _, err) = run(RESTORE, &pipeline_token);
    assert!(!ok);
    assert!(
        err.contains("pipeline does not have the role `admin`"),
        "{err}"
    );

    let (ok, out, err) = run(
        &[
            "promote",
            "--route",
            "bc",
            "--challenger",
            "bc-linear@2",
            "--requested-by",
            "risk desk",
        ],
        &admin_token,
    );
    assert!(ok, "{out}{err}");
    assert!(out.contains("bc-linear@1 -> bc-linear@2"), "{out}");
    let (_, version, role, log_odds) =
        score(&mut scoring, "bc", "after-promotion", 0.25, -1.5).await;
    assert_eq!(
        (version.as_str(), role.as_str(), log_odds),
        ("2", "champion", -1.5)
    );

    // The previous champion's file goes away: the restore is refused and nothing changes.
    let v1 = models.path().join("bc-v1.json");
    let kept = std::fs::read_to_string(&v1).unwrap();
    std::fs::remove_file(&v1).unwrap();
    models_api.reload(pb::ReloadRequest {}).await.unwrap();
    let (ok, _, err) = run(RESTORE, &admin_token);
    assert!(!ok);
    assert!(
        err.contains("`bc-linear@1` is not loaded") && err.contains("FAILED_PRECONDITION"),
        "{err}"
    );
    let (_, version, _, _) = score(&mut scoring, "bc", "refused-restore", 0.25, -1.5).await;
    assert_eq!(version, "2");
    std::fs::write(&v1, kept).unwrap();
    models_api.reload(pb::ReloadRequest {}).await.unwrap();

    // Back to version 1, recorded like a promotion.
    let (ok, out, err) = run(RESTORE, &admin_token);
    assert!(ok, "{out}{err}");
    assert!(
        out.contains("restored: ")
            && out.contains("route bc: restore bc-linear@2 -> bc-linear@1 by risk desk")
            && out.contains("as ops")
            && out.contains("(version 2 declines too many)"),
        "{out}"
    );
    let (_, version, role, log_odds) = score(&mut scoring, "bc", "restored", 0.25, -1.5).await;
    assert_eq!(
        (version.as_str(), role.as_str(), log_odds),
        ("1", "champion", 0.25)
    );
    let (ok, _, err) = run(RESTORE, &admin_token);
    assert!(!ok && err.contains("no earlier champion"), "{err}");

    let (ok, out, err) = run(
        &["route-history", "--route", "bc", "--json"],
        &pipeline_token,
    );
    assert!(ok, "{err}");
    let lines: Vec<Value> = out
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    let summary: Vec<(&str, &str, &str, &str, &str)> = lines
        .iter()
        .map(|l| {
            (
                l["kind"].as_str().unwrap(),
                l["previous_champion"].as_str().unwrap(),
                l["previous_champion_version"].as_str().unwrap(),
                l["new_champion"].as_str().unwrap(),
                l["new_champion_version"].as_str().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        summary,
        [
            ("promotion", "bc-linear@1", "1", "bc-linear@2", "2"),
            ("restore", "bc-linear@2", "2", "bc-linear@1", "1"),
        ]
    );
    assert_eq!(lines[1]["requested_by"], "risk desk");
    assert_eq!(lines[1]["reason"], "version 2 declines too many");

    // The rows scored while version 2 was champion (its champion predictions, version 1's challenger ones) stay out
    // of the comparison of version 1 as champion against version 2 as challenger.
    let started = Instant::now();
    loop {
        let log = Arc::clone(&log);
        let stored = tokio::task::spawn_blocking(move || {
            log.flush().unwrap();
            log.with_store(|s| {
                s.load(&ReportFilter {
                    route: Some("bc".into()),
                    ..ReportFilter::default()
                })
            })
            .unwrap()
        })
        .await
        .unwrap();
        let of = |id: &str| {
            let mut v: Vec<(String, String)> = stored
                .iter()
                .filter(|p| p.prediction_id == id)
                .map(|p| (p.version.clone(), p.role.clone()))
                .collect();
            v.sort();
            v
        };
        if of("after-promotion").len() == 2 && of("restored").len() == 2 {
            assert_eq!(
                of("after-promotion"),
                [
                    ("1".to_string(), "challenger".to_string()),
                    ("2".to_string(), "champion".to_string())
                ]
            );
            break;
        }
        assert!(
            started.elapsed() < Duration::from_secs(30),
            "silent predictions not stored"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let report = compare(&mut reader, n).await;
    assert_eq!(
        (
            &report["champion"],
            &report["challenger"],
            &report["champion_predictions"],
            &report["challenger_predictions"],
            &report["paired"]
        ),
        (
            &json!("bc-linear@1"),
            &json!("bc-linear@2"),
            &json!(n + 1),
            &json!(n + 1),
            &json!(n + 1)
        ),
        "the rows scored after the restore count, those scored under the promotion do not"
    );
    server.shutdown().await;

    // `probity compare` on the store: both versions of the name answered as champion and as challenger on this
    // route, so the challenger must be named; the champion is then pinned to its most frequent other version.
    let store = data.path().to_str().unwrap().to_string();
    let offline = |extra: &[&str]| {
        let out = std::process::Command::new(env!("CARGO_BIN_EXE_probity"))
            .args(["compare", "--store", &store, "--route", "bc", "--json"])
            .args(extra)
            .output()
            .unwrap();
        (
            out.status.success(),
            String::from_utf8_lossy(&out.stdout).to_string(),
            String::from_utf8_lossy(&out.stderr).to_string(),
        )
    };
    let (ok, _, err) = offline(&[]);
    assert!(
        !ok && err.contains("name one as bc-linear@VERSION"),
        "{err}"
    );
    let (ok, out, err) = offline(&["--challenger", "bc-linear@2"]);
    assert!(ok, "{err}");
    let offline_report: Value = serde_json::from_str(&out).unwrap();
    for key in [
        "champion",
        "challenger",
        "champion_predictions",
        "challenger_predictions",
        "paired",
    ] {
        assert_eq!(offline_report[key], report[key], "{key}");
    }
}
