//! Champion and challenger through the real gRPC service (`probity serve` on loopback, a tonic client):
//! - silent: every row is answered by the champion (the response names it and carries its log-odds), the
//!   challenger scores the same row silently, both predictions are logged under one id with their roles,
//!   and the comparison built from the log equals the reference-fixture values (independent NumPy/SciPy
//!   implementations of DeLong et al. 1988 and Diebold and Mariano 1995) and the per-model reports;
//! - live: subjects keep their model across calls, the challenger's share of subjects is within binomial
//!   tolerance, and the response names the model that answered.
//!
//! Fixture: `tests/fixtures/compare/breast_cancer.json` from `tests/fixtures/gen_compare.py` (scikit-learn 1.9.1,
//! SciPy 1.17.1, NumPy 2.4.6, statsmodels 0.15.0) on scikit-learn's `load_breast_cancer` (Street, Wolberg and
//! Mangasarian 1993): held-out log-odds of a LogisticRegression and a GradientBoostingClassifier. The two models
//! served here are linear on two features `a` and `b` (coefficients 1, 0 and 0, 1), so their log-odds are the
//! fixture's to the last bit.

#![allow(clippy::unwrap_used)]

use std::time::{Duration, Instant};

use probity::compare::{self, CompareRequest};
use probity::report;
use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity::store::ReportFilter;
use serde_json::{json, Value};

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

fn model(name: &str, coefficients: [f64; 2]) -> String {
    json!({
        "format": "probity.model", "format_version": 1, "name": name, "version": "1",
        "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}],
        "margin_scale": "log_odds", "base_rate": 0.5,
        "linear": {"intercept": 0.0, "terms": [
            {"numeric": {"feature": 0, "coefficient": coefficients[0]}},
            {"numeric": {"feature": 1, "coefficient": coefficients[1]}}
        ]}
    })
    .to_string()
}

fn row(id: String, key: String, a: f64, b: f64) -> pb::Row {
    pb::Row {
        prediction_id: id,
        subject_key: key,
        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
            values: vec![a, b],
        })),
        ..Default::default()
    }
}

async fn http_get(addr: std::net::SocketAddr, path: &str) -> String {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream
        .write_all(format!("GET {path} HTTP/1.0\r\nHost: test\r\n\r\n").as_bytes())
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text.split_once("\r\n\r\n").unwrap().1.to_string()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn silent_and_live_challengers_through_the_service() {
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
    std::fs::write(models.path().join("champ.json"), model("champ", [1.0, 0.0])).unwrap();
    std::fs::write(models.path().join("chall.json"), model("chall", [0.0, 1.0])).unwrap();
    let data = tempfile::tempdir().unwrap();
    let conf = tempfile::tempdir().unwrap();
    let path = conf.path().join("probity.toml");
    // Two callers: the pipeline scores, writes outcomes and reads reports; ops may also promote.
    let token_file = conf.path().join("admin.token");
    std::fs::write(&token_file, "test-admin-token-0123456789\n").unwrap();
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
             [routes.bc]\nmodel = \"champ\"\ndecision = {{ threshold = 0.5 }}\n\
             [[routes.bc.challengers]]\nmodel = \"chall\"\nmode = \"silent\"\n\
             [routes.live]\nmodel = \"champ\"\n\
             [[routes.live.challengers]]\nmodel = \"chall\"\nmode = \"live\"\nshare = 0.3\n",
            token_file.display().to_string(),
            pipeline_token.display().to_string(),
            models.path().display().to_string(),
            data.path().display().to_string()
        ),
    )
    .unwrap();
    let config = Config::load(&Sources {
        file: Some(path.clone()),
        ..Sources::default()
    })
    .unwrap();
    let server = probity::serve::start(config).await.unwrap();
    let raw = tonic::transport::Channel::from_shared(format!("http://{}", server.grpc_addr()))
        .unwrap()
        .connect()
        .await
        .unwrap();
    let pipeline = tonic::service::interceptor::InterceptedService::new(
        raw.clone(),
        probity::client::BearerToken::from_file(&pipeline_token).unwrap(),
    );
    let mut scoring = pb::scoring_client::ScoringClient::new(pipeline.clone());
    let mut outcomes = pb::outcomes_client::OutcomesClient::new(pipeline.clone());
    let mut admin = pb::challengers_client::ChallengersClient::new(pipeline.clone());
    // Without the interceptor, for calls that set their own `authorization`.
    let mut bare = pb::challengers_client::ChallengersClient::new(raw);

    // Silent: every answer is the champion's.
    for i in 0..n {
        let r = scoring
            .score(pb::ScoreRequest {
                explain: 0,
                route: "bc".into(),
                row: Some(row(format!("bc-{i}"), format!("cust-{i}"), ha[i], hb[i])),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!((r.model.as_str(), r.role.as_str()), ("champ", "champion"));
        assert_eq!(r.log_odds.to_bits(), ha[i].to_bits());
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

    // The challenger scores in the background: wait until all its predictions are in the log.
    let log = std::sync::Arc::clone(server.store().unwrap());
    let request = CompareRequest {
        filter: ReportFilter {
            route: Some("bc".into()),
            ..ReportFilter::default()
        },
        threshold: Some(0.5),
        ..CompareRequest::default()
    };
    let started = Instant::now();
    let cmp = loop {
        let log = std::sync::Arc::clone(&log);
        let request = request.clone();
        let cmp = tokio::task::spawn_blocking(move || {
            log.flush().unwrap();
            log.with_store(|s| Ok(compare::build(s, &request)))
                .unwrap()
                .unwrap()
        })
        .await
        .unwrap();
        if cmp.paired_with_outcome == n || started.elapsed() > Duration::from_secs(30) {
            break cmp;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    assert_eq!(
        (cmp.champion.as_str(), cmp.challenger.as_str()),
        ("champ", "chall")
    );
    assert_eq!((cmp.paired, cmp.paired_with_outcome), (n, n));
    assert_eq!(
        (cmp.champion_predictions, cmp.challenger_predictions),
        (n, n)
    );

    // Against the fixture: scipy.stats.spearmanr, numpy, the 1988 DeLong pair sum, Diebold-Mariano.
    let g = cmp.agreement.as_ref().unwrap();
    let w = &v["agreement"];
    close(
        g["spearman"].as_f64().unwrap(),
        w["spearman"].as_f64().unwrap(),
        "spearman",
    );
    close(
        g["max_absolute_log_odds_difference"].as_f64().unwrap(),
        w["max_absolute_difference"].as_f64().unwrap(),
        "max |diff|",
    );
    let flips = &w["flips"][1];
    assert_eq!(flips["threshold"], 0.5);
    close(
        g["decision_flips"]["share"].as_f64().unwrap(),
        flips["share"].as_f64().unwrap(),
        "flip share",
    );
    let o = &cmp.outcomes;
    let d = &v["delong"];
    for (got, want) in [
        ("auc_champion", "auc_champion"),
        ("auc_challenger", "auc_challenger"),
        ("standard_error", "standard_error"),
        ("z", "z"),
        ("p_value", "p_value"),
    ] {
        close(
            o["delong"][got].as_f64().unwrap(),
            d[want].as_f64().unwrap(),
            got,
        );
    }
    let ll = &v["log_loss"];
    let t = &o["log_loss_test"];
    close(
        t["mean_difference"].as_f64().unwrap(),
        ll["mean"].as_f64().unwrap(),
        "DM mean",
    );
    close(
        t["statistic"].as_f64().unwrap(),
        ll["statistic"].as_f64().unwrap(),
        "DM z",
    );
    close(
        t["p_value"].as_f64().unwrap(),
        ll["p_value"].as_f64().unwrap(),
        "DM p",
    );
    assert_eq!(cmp.verdict_code, "no_clear_difference", "{}", cmp.verdict);
    assert_eq!(cmp.fixed_sample_verdict_code, "no_clear_difference");

    // The always-valid figures the verdict rests on: the two-sided normal-mixture boundary of Howard, Ramdas,
    // McAuliffe and Sekhon (2021, "Time-uniform, nonparametric, nonasymptotic confidence sequences", Annals of
    // Statistics 49, section 3.2), written out here and applied to the fixture's reference Diebold-Mariano mean and
    // standard error and 1988 DeLong difference and standard error: half-width se * sqrt((n + rho)/n *
    // ln((n + rho) / (rho alpha^2))), alpha = 0.05, rho = 1000 / u with u = 2 ln(1/alpha) + ln(1 + u) (tightest
    // at 1,000 cases); the mixture likelihood ratio sqrt(rho/(n + rho)) exp(n z^2 / (2 (n + rho))) gives p = 1/ratio.
    let nf = n as f64;
    let two_l = 2.0 * 20f64.ln();
    let mut u = two_l;
    for _ in 0..100 {
        u = two_l + (1.0 + u).ln();
    }
    let rho = 1000.0 / u;
    let width = |se: f64| se * ((nf + rho) / nf * ((nf + rho) / (rho * 0.0025)).ln()).sqrt();
    let p_of = |z: f64| ((nf + rho) / rho).sqrt() * (-nf * z * z / (2.0 * (nf + rho))).exp();
    let av = serde_json::to_value(&cmp.always_valid).unwrap();
    let num = |x: &Value| x.as_f64().unwrap();
    for (key, est, se, z) in [
        (
            "log_loss",
            &ll["mean"],
            &ll["standard_error"],
            &ll["statistic"],
        ),
        ("auc", &d["difference"], &d["standard_error"], &d["z"]),
    ] {
        close(
            num(&av[key]["lower"]),
            num(est) - width(num(se)),
            &format!("{key} always-valid lower"),
        );
        close(
            num(&av[key]["upper"]),
            num(est) + width(num(se)),
            &format!("{key} always-valid upper"),
        );
        close(
            num(&av[key]["p_value"]),
            p_of(num(z)).min(1.0),
            &format!("{key} always-valid p"),
        );
    }

    // The comparison agrees with each model's own report from the same log.
    let rep = log
        .with_store(|s| {
            report::build(
                s,
                &ReportFilter {
                    route: Some("bc".into()),
                    ..ReportFilter::default()
                },
            )
        })
        .unwrap();
    for (role, key) in [("champion", "champion"), ("challenger", "challenger")] {
        let s = rep.series.iter().find(|s| s.role == role).unwrap();
        close(
            s.log_loss.unwrap(),
            o[key]["log_loss"].as_f64().unwrap(),
            &format!("{role} log-loss, report vs comparison"),
        );
        close(
            s.roc_auc.unwrap(),
            o["delong"][format!("auc_{key}")].as_f64().unwrap(),
            &format!("{role} AUC, report vs comparison"),
        );
        close(
            s.brier.unwrap(),
            o[key]["brier"].as_f64().unwrap(),
            &format!("{role} Brier, report vs comparison"),
        );
    }
    let svg = compare::svg::render(&cmp);
    assert!(svg.contains(r#"class="champion""#) && svg.contains(r#"class="challenger""#));
    assert!(svg.contains(r#"class="bar""#));

    // Live: 2,000 subjects, each scored twice; the same subject meets the same model both times.
    let mut to_challenger = 0usize;
    for i in 0..2_000usize {
        let mut seen = Vec::new();
        for call in 0..2 {
            let r = scoring
                .score(pb::ScoreRequest {
                    explain: 0,
                    route: "live".into(),
                    row: Some(row(
                        format!("s-{i}-{call}"),
                        format!("subject-{i}"),
                        0.1,
                        -0.2,
                    )),
                })
                .await
                .unwrap()
                .into_inner();
            assert_eq!(
                r.role == "challenger",
                r.model == "chall",
                "role names the answering model"
            );
            seen.push(r.model);
        }
        assert_eq!(seen[0], seen[1], "subject-{i} changed model between calls");
        to_challenger += usize::from(seen[0] == "chall");
    }
    // Within 4 binomial standard deviations of 2000 * 0.3 (common practice, no single source).
    let sd = (2_000.0f64 * 0.3 * 0.7).sqrt();
    assert!(
        (to_challenger as f64 - 600.0).abs() <= 4.0 * sd,
        "{to_challenger} of 2000 subjects went to the challenger"
    );

    // The comparison is exported as gauges, refreshed every store.sweep_interval.
    let started = Instant::now();
    let gauge = |text: &str, name: &str, extra: &str| -> Option<f64> {
        text.lines().find_map(|l| {
            let (head, value) = l.rsplit_once(' ')?;
            (head.starts_with(&format!("{name}{{"))
                && head.contains("route=\"bc\"")
                && head.contains("challenger=\"chall\"")
                && head.contains(extra))
            .then(|| value.parse().unwrap())
        })
    };
    loop {
        let text = http_get(server.metrics_addr(), "/metrics").await;
        if gauge(&text, "probity_compare_paired_outcomes", "") == Some(n as f64) {
            close(
                gauge(&text, "probity_compare_auc_p_value", "").unwrap(),
                d["p_value"].as_f64().unwrap(),
                "exported DeLong p",
            );
            assert_eq!(
                gauge(
                    &text,
                    "probity_compare_verdict",
                    "verdict=\"no_clear_difference\""
                ),
                Some(1.0)
            );
            close(
                gauge(&text, "probity_compare_log_loss_difference_upper", "").unwrap(),
                num(&av["log_loss"]["upper"]),
                "exported always-valid log-loss upper end",
            );
            close(
                gauge(&text, "probity_compare_auc_always_valid_p_value", "").unwrap(),
                num(&av["auc"]["p_value"]),
                "exported always-valid AUC p",
            );
            assert_eq!(
                gauge(
                    &text,
                    "probity_compare_verdict",
                    "verdict=\"challenger_better\""
                ),
                Some(0.0)
            );
            break;
        }
        assert!(
            started.elapsed() < Duration::from_secs(30),
            "comparison gauges not exported"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }

    // The Compare RPC gives the same comparison, with the route's threshold.
    let rpc = admin
        .compare(pb::CompareRequest {
            route: "bc".into(),
            ..Default::default()
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(rpc.verdict_code, "no_clear_difference");
    assert_eq!(rpc.fixed_sample_verdict_code, "no_clear_difference");
    close(
        rpc.log_loss_difference_lower.unwrap(),
        num(&av["log_loss"]["lower"]),
        "Compare RPC always-valid log-loss lower end",
    );
    close(
        rpc.auc_always_valid_p_value.unwrap(),
        num(&av["auc"]["p_value"]),
        "Compare RPC always-valid AUC p",
    );
    assert!(rpc.table.contains("always valid"), "{}", rpc.table);
    let json: Value = serde_json::from_str(&rpc.report_json).unwrap();
    close(
        json["outcomes"]["delong"]["p_value"].as_f64().unwrap(),
        d["p_value"].as_f64().unwrap(),
        "Compare RPC DeLong p",
    );
    assert!(
        rpc.table.contains("verdict: no clear difference"),
        "{}",
        rpc.table
    );

    // Promotion: refused without a token (UNAUTHENTICATED), with a wrong one (UNAUTHENTICATED) and with the
    // pipeline's, which lacks the admin role (PERMISSION_DENIED); made with ops' token, recorded with its caller,
    // visible in the history and in the answers.
    let promote = || pb::PromoteRequest {
        route: "bc".into(),
        challenger: "chall".into(),
        requested_by: "model-risk-review".into(),
        reason: "test".into(),
    };
    let refused = bare.promote(promote()).await.unwrap_err();
    assert_eq!(refused.code(), tonic::Code::Unauthenticated);
    let denied = admin.promote(promote()).await.unwrap_err();
    assert_eq!(denied.code(), tonic::Code::PermissionDenied, "{denied:?}");
    assert!(
        denied.message().contains("pipeline") && denied.message().contains("admin"),
        "{}",
        denied.message()
    );
    let mut wrong = tonic::Request::new(promote());
    wrong.metadata_mut().insert(
        "authorization",
        "Bearer not-the-token-at-all".parse().unwrap(),
    );
    assert_eq!(
        bare.promote(wrong).await.unwrap_err().code(),
        tonic::Code::Unauthenticated
    );
    let mut good = tonic::Request::new(promote());
    good.metadata_mut().insert(
        "authorization",
        "Bearer test-admin-token-0123456789".parse().unwrap(),
    );
    let change = bare
        .promote(good)
        .await
        .unwrap()
        .into_inner()
        .change
        .unwrap();
    assert_eq!(
        (
            change.previous_champion.as_str(),
            change.new_champion.as_str()
        ),
        ("champ", "chall")
    );
    assert!(
        change.peer.starts_with("127.0.0.1:") && change.peer.ends_with(" as ops"),
        "{}",
        change.peer
    );
    assert!(change.time_unix_ms > 0);
    let r = scoring
        .score(pb::ScoreRequest {
            explain: 0,
            route: "bc".into(),
            row: Some(row("after".into(), "cust-1".into(), ha[0], hb[0])),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!((r.model.as_str(), r.role.as_str()), ("chall", "champion"));
    assert_eq!(r.log_odds.to_bits(), hb[0].to_bits());
    let history = admin
        .route_history(pb::RouteHistoryRequest { route: "bc".into() })
        .await
        .unwrap()
        .into_inner()
        .changes;
    assert_eq!(history, vec![change.clone()]);
    server.shutdown().await;

    // A restart replays the recorded promotion.
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
    let channel = tonic::service::interceptor::InterceptedService::new(
        channel,
        probity::client::BearerToken::from_file(&pipeline_token).unwrap(),
    );
    let mut scoring = pb::scoring_client::ScoringClient::new(channel.clone());
    let mut admin = pb::challengers_client::ChallengersClient::new(channel);
    let r = scoring
        .score(pb::ScoreRequest {
            explain: 0,
            route: "bc".into(),
            row: Some(row("restarted".into(), "cust-1".into(), ha[0], hb[0])),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(r.model, "chall");
    let history = admin
        .route_history(pb::RouteHistoryRequest::default())
        .await
        .unwrap()
        .into_inner()
        .changes;
    assert_eq!(history, vec![change]);
    server.shutdown().await;
}
