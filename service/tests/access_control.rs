//! Transport security and access control through the real server (`probity::serve::start`, on loopback) and tonic
//! clients built by `probity::client` (the command-line tools' connector):
//! - the method table covers exactly the methods of every registered service's compiled descriptor;
//! - TLS with bearer tokens: every role against every RPC, allowed and refused, no token and a wrong token;
//! - mutual TLS: the same with client-certificate idsubjects, an unconfigured certificate, no certificate;
//! - a plain-text client against a TLS server fails;
//! - certificate reload: new connections see the new certificate (compared by its DER bytes), a corrupt or
//!   mismatched replacement keeps the old one and is counted;
//! - the real binary's log output (debug level) and /metrics never contain a token, through calls, refusals and a
//!   SIGHUP reload.
//!
//! Certificates are made at test time with `rcgen` (a CA, server certificates for `localhost` and 127.0.0.1, client
//! certificates whose subject CN is the identity), and verified by rustls on both sides.

#![allow(clippy::unwrap_used)]

use std::collections::BTreeSet;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use probity::client::{ConnectArgs, Connection};
use probity::serve::config::{Config, Sources};
use probity::serve::proto as pb;
use probity::serve::security::access::{Need, Role, METHODS};
use probity::serve::security::ReloadOutcome;
use probity::serve::RunningServer;
use prost::Message as _;
use rcgen::{
    BasicConstraints, CertificateParams, DnType, ExtendedKeyUsagePurpose, IsCa, Issuer, KeyPair,
    KeyUsagePurpose, SerialNumber,
};
use rustls::pki_types::pem::PemObject;
use rustls::pki_types::{CertificateDer, ServerName};
use tonic::Code;

#[path = "support/serve.rs"]
mod serve;

// ---------------------------------------------------------------------------------------------------------------
// Certificates

struct Ca {
    pem: String,
    issuer: Issuer<'static, KeyPair>,
}

struct Leaf {
    cert_pem: String,
    key_pem: String,
    der: Vec<u8>,
}

fn ca(name: &str) -> Ca {
    let mut params = CertificateParams::new(Vec::<String>::new()).unwrap();
    params.distinguished_name.push(DnType::CommonName, name);
    params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    params.key_usages = vec![
        KeyUsagePurpose::KeyCertSign,
        KeyUsagePurpose::CrlSign,
        KeyUsagePurpose::DigitalSignature,
    ];
    let key = KeyPair::generate().unwrap();
    let cert = params.self_signed(&key).unwrap();
    Ca {
        pem: cert.pem(),
        issuer: Issuer::new(params, key),
    }
}

fn leaf(ca: &Ca, cn: &str, sans: &[&str], server: bool, serial: u64) -> Leaf {
    let mut params =
        CertificateParams::new(sans.iter().map(|s| s.to_string()).collect::<Vec<_>>()).unwrap();
    params.distinguished_name.push(DnType::CommonName, cn);
    params.serial_number = Some(SerialNumber::from(serial));
    params.extended_key_usages = vec![if server {
        ExtendedKeyUsagePurpose::ServerAuth
    } else {
        ExtendedKeyUsagePurpose::ClientAuth
    }];
    let key = KeyPair::generate().unwrap();
    let cert = params.signed_by(&key, &ca.issuer).unwrap();
    Leaf {
        cert_pem: cert.pem(),
        key_pem: key.serialize_pem(),
        der: cert.der().to_vec(),
    }
}

fn server_leaf(ca: &Ca, serial: u64) -> Leaf {
    leaf(
        ca,
        "probity test server",
        &["localhost", "127.0.0.1"],
        true,
        serial,
    )
}

/// Writes a leaf's certificate and key as `<name>.crt` and `<name>.key`.
fn write_leaf(dir: &Path, name: &str, leaf: &Leaf) -> (PathBuf, PathBuf) {
    let (c, k) = (
        dir.join(format!("{name}.crt")),
        dir.join(format!("{name}.key")),
    );
    std::fs::write(&c, &leaf.cert_pem).unwrap();
    std::fs::write(&k, &leaf.key_pem).unwrap();
    (c, k)
}

// ---------------------------------------------------------------------------------------------------------------
// The server

const TOKENS: [(&str, Role, &str); 4] = [
    ("t-score", Role::Score, "score-token-7Yq2mV9xK4pL8cN3"),
    (
        "t-outcome",
        Role::OutcomeWrite,
        "outcome-token-Jf6wR1tZ5bH0sD9e",
    ),
    (
        "t-report",
        Role::ReportRead,
        "report-token-Uo3gA8nQ2yM7vC4x",
    ),
    ("t-admin", Role::Admin, "admin-token-Pk5hE0iW6rT1zB8j"),
];

const CERT_CALLERS: [(&str, Role, &str); 4] = [
    ("c-score", Role::Score, "score.client.test"),
    ("c-outcome", Role::OutcomeWrite, "outcome.client.test"),
    ("c-report", Role::ReportRead, "report.client.test"),
    ("c-admin", Role::Admin, "admin.client.test"),
];

fn model(name: &str, coefficient: f64) -> String {
    serde_json::json!({
        "format": "probity.model", "format_version": 1, "name": name, "version": "1",
        "features": [{"name": "x", "type": "numeric"}],
        "margin_scale": "log_odds", "base_rate": 0.5,
        "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": coefficient}}]}
    })
    .to_string()
}

struct Setup {
    dir: tempfile::TempDir,
    ca: Ca,
    server_cert: PathBuf,
    server_key: PathBuf,
}

impl Setup {
    fn new() -> Setup {
        let dir = tempfile::tempdir().unwrap();
        for d in ["models", "log", "certs", "tokens"] {
            std::fs::create_dir(dir.path().join(d)).unwrap();
        }
        std::fs::write(dir.path().join("models/m.json"), model("m", 1.0)).unwrap();
        std::fs::write(dir.path().join("models/m2.json"), model("m2", 2.0)).unwrap();
        let ca = ca("probity test CA");
        std::fs::write(dir.path().join("certs/ca.crt"), &ca.pem).unwrap();
        let (server_cert, server_key) =
            write_leaf(&dir.path().join("certs"), "server", &server_leaf(&ca, 1));
        for (name, _, token) in TOKENS {
            std::fs::write(
                dir.path().join(format!("tokens/{name}")),
                format!("{token}\n"),
            )
            .unwrap();
        }
        Setup {
            dir,
            ca,
            server_cert,
            server_key,
        }
    }

    fn path(&self, rel: &str) -> PathBuf {
        self.dir.path().join(rel)
    }

    /// A client certificate signed by the test CA, written to `certs/<cn>.crt|key`.
    fn client(&self, cn: &str) -> (PathBuf, PathBuf) {
        write_leaf(
            &self.path("certs"),
            cn,
            &leaf(&self.ca, cn, &[], false, 100),
        )
    }

    /// The configuration text: TLS, `client_certificates` (None: no client CA), the token callers and, with a
    /// client CA, the certificate callers.
    fn config(&self, client_certificates: Option<&str>, extra: &str) -> String {
        let s = |p: PathBuf| toml_string(&p);
        let mut text = format!(
            "[server]\ngrpc_listen = \"127.0.0.1:0\"\nmetrics_listen = \"127.0.0.1:0\"\nshutdown_grace_ms = 2000\n\
             [server.tls]\ncertificate_file = {}\nkey_file = {}\n",
            s(self.server_cert.clone()),
            s(self.server_key.clone())
        );
        if let Some(mode) = client_certificates {
            text += &format!(
                "client_ca_file = {}\nclient_certificates = \"{mode}\"\n",
                s(self.path("certs/ca.crt"))
            );
        }
        text += &format!(
            "[models]\ndirectory = {}\nwatch = false\n[store]\ndirectory = {}\nflush_interval = \"5ms\"\n",
            s(self.path("models")),
            s(self.path("log"))
        );
        text += "[logging]\nlevel = \"debug\"\n";
        for (name, role, _) in TOKENS {
            text += &format!(
                "[[access.callers]]\nname = \"{name}\"\ntoken_file = {}\nroles = [\"{role}\"]\n",
                s(self.path(&format!("tokens/{name}")))
            );
        }
        if client_certificates.is_some() {
            for (name, role, cn) in CERT_CALLERS {
                text += &format!(
                    "[[access.callers]]\nname = \"{name}\"\ncertificate_name = \"{cn}\"\nroles = [\"{role}\"]\n"
                );
            }
        }
        text += extra;
        text += "[routes.r]\nmodel = \"m\"\n[[routes.r.challengers]]\nmodel = \"m2\"\nmode = \"silent\"\n";
        text
    }

    async fn start(&self, client_certificates: Option<&str>) -> RunningServer {
        let path = self.path("probity.toml");
        std::fs::write(&path, self.config(client_certificates, "")).unwrap();
        let config = Config::load(&Sources {
            file: Some(path),
            ..Sources::default()
        })
        .unwrap();
        probity::serve::start(config).await.unwrap()
    }

    /// Connection options: TLS to 127.0.0.1, verified as `localhost`, with a token and a client certificate.
    fn connect(&self, addr: SocketAddr, token: Option<&str>, cert: Option<&str>) -> ConnectArgs {
        let (client_cert, client_key) = match cert.map(|cn| self.client(cn)) {
            Some((c, k)) => (Some(c), Some(k)),
            None => (None, None),
        };
        ConnectArgs {
            server: format!("https://127.0.0.1:{}", addr.port()),
            ca_file: Some(self.path("certs/ca.crt")),
            client_cert,
            client_key,
            token_file: token.map(|name| self.path(&format!("tokens/{name}"))),
            tls_server_name: Some("localhost".into()),
        }
    }
}

fn toml_string(p: &Path) -> String {
    toml::Value::from(p.display().to_string()).to_string()
}

// ---------------------------------------------------------------------------------------------------------------
// What each method should need: written out here, apart from the server's table, as the README's Security section
// states it, so that a change to the server's table that does not match the documented roles fails the tests.

const INTENDED: [(&str, Need); 17] = [
    ("/grpc.health.v1.Health/Check", Need::Open),
    ("/grpc.health.v1.Health/Watch", Need::Open),
    (
        "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo",
        Need::AnyCaller,
    ),
    (
        "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo",
        Need::AnyCaller,
    ),
    ("/probity.v1.Scoring/Score", Need::Role(Role::Score)),
    ("/probity.v1.Scoring/ScoreBatch", Need::Role(Role::Score)),
    ("/probity.v1.Scoring/ScoreStream", Need::Role(Role::Score)),
    ("/probity.v1.Models/ListRoutes", Need::AnyCaller),
    ("/probity.v1.Models/ModelFacts", Need::AnyCaller),
    ("/probity.v1.Models/Reload", Need::Role(Role::Admin)),
    (
        "/probity.v1.Outcomes/RecordOutcomes",
        Need::Role(Role::OutcomeWrite),
    ),
    (
        "/probity.v1.Outcomes/RecordOutcomeStream",
        Need::Role(Role::OutcomeWrite),
    ),
    ("/probity.v1.Outcomes/Report", Need::Role(Role::ReportRead)),
    (
        "/probity.v1.Challengers/Compare",
        Need::Role(Role::ReportRead),
    ),
    ("/probity.v1.Challengers/Promote", Need::Role(Role::Admin)),
    ("/probity.v1.Challengers/Restore", Need::Role(Role::Admin)),
    (
        "/probity.v1.Challengers/RouteHistory",
        Need::Role(Role::ReportRead),
    ),
];

#[test]
fn server_table_is_the_documented_one() {
    let server: std::collections::BTreeMap<&str, Need> = METHODS.iter().copied().collect();
    let intended: std::collections::BTreeMap<&str, Need> = INTENDED.iter().copied().collect();
    assert_eq!(server, intended);
}

// ---------------------------------------------------------------------------------------------------------------
// One call of every method

fn row(id: &str) -> pb::Row {
    pb::Row {
        prediction_id: id.into(),
        features: Some(pb::row::Features::Dense(pb::DenseFeatures {
            values: vec![0.5],
        })),
        ..Default::default()
    }
}

fn score_request() -> pb::ScoreRequest {
    pb::ScoreRequest {
        explain: 0,
        route: "r".into(),
        row: Some(row("")),
    }
}

fn outcome() -> pb::Outcome {
    pb::Outcome {
        prediction_id: "no-such-prediction".into(),
        label: true,
        outcome_time_unix_ms: 0,
    }
}

/// Connects with `args` and calls `path` once; either failure as text (a refused handshake is the point of the
/// tests that use it).
async fn connect_and_call(args: &ConnectArgs, path: &str) -> Result<(), String> {
    let conn = args.connect().await.map_err(|e| e.to_string())?;
    call(&conn, path).await.map_err(|s| s.to_string())
}

/// Calls `path` once with a valid request; `Ok` when the server answered OK.
async fn call(conn: &Connection, path: &str) -> Result<(), tonic::Status> {
    use tonic_reflection::pb::{v1, v1alpha};
    let c = conn.clone();
    match path {
        "/grpc.health.v1.Health/Check" => tonic_health::pb::health_client::HealthClient::new(c)
            .check(tonic_health::pb::HealthCheckRequest::default())
            .await
            .map(drop),
        "/grpc.health.v1.Health/Watch" => {
            let mut s = tonic_health::pb::health_client::HealthClient::new(c)
                .watch(tonic_health::pb::HealthCheckRequest::default())
                .await?
                .into_inner();
            s.message().await.map(drop)
        }
        "/grpc.reflection.v1.ServerReflection/ServerReflectionInfo" => {
            let request = v1::ServerReflectionRequest {
                host: String::new(),
                message_request: Some(v1::server_reflection_request::MessageRequest::ListServices(
                    String::new(),
                )),
            };
            let mut s = v1::server_reflection_client::ServerReflectionClient::new(c)
                .server_reflection_info(tokio_stream::iter(vec![request]))
                .await?
                .into_inner();
            s.message().await.map(drop)
        }
        "/grpc.reflection.v1alpha.ServerReflection/ServerReflectionInfo" => {
            let request = v1alpha::ServerReflectionRequest {
                host: String::new(),
                message_request: Some(
                    v1alpha::server_reflection_request::MessageRequest::ListServices(String::new()),
                ),
            };
            let mut s = v1alpha::server_reflection_client::ServerReflectionClient::new(c)
                .server_reflection_info(tokio_stream::iter(vec![request]))
                .await?
                .into_inner();
            s.message().await.map(drop)
        }
        "/probity.v1.Scoring/Score" => pb::scoring_client::ScoringClient::new(c)
            .score(score_request())
            .await
            .map(drop),
        "/probity.v1.Scoring/ScoreBatch" => pb::scoring_client::ScoringClient::new(c)
            .score_batch(pb::ScoreBatchRequest {
                explain: 0,
                route: "r".into(),
                rows: vec![row(""), row("")],
            })
            .await
            .map(drop),
        "/probity.v1.Scoring/ScoreStream" => {
            let mut s = pb::scoring_client::ScoringClient::new(c)
                .score_stream(tokio_stream::iter(vec![score_request()]))
                .await?
                .into_inner();
            s.message().await.map(drop)
        }
        "/probity.v1.Models/ListRoutes" => pb::models_client::ModelsClient::new(c)
            .list_routes(pb::ListRoutesRequest {})
            .await
            .map(drop),
        "/probity.v1.Models/ModelFacts" => pb::models_client::ModelsClient::new(c)
            .model_facts(pb::ModelFactsRequest {
                target: Some(pb::model_facts_request::Target::Model("m".into())),
            })
            .await
            .map(drop),
        "/probity.v1.Models/Reload" => pb::models_client::ModelsClient::new(c)
            .reload(pb::ReloadRequest {})
            .await
            .map(drop),
        "/probity.v1.Outcomes/RecordOutcomes" => pb::outcomes_client::OutcomesClient::new(c)
            .record_outcomes(pb::RecordOutcomesRequest {
                outcomes: vec![outcome()],
            })
            .await
            .map(drop),
        "/probity.v1.Outcomes/RecordOutcomeStream" => {
            let mut s = pb::outcomes_client::OutcomesClient::new(c)
                .record_outcome_stream(tokio_stream::iter(vec![outcome()]))
                .await?
                .into_inner();
            s.message().await.map(drop)
        }
        "/probity.v1.Outcomes/Report" => pb::outcomes_client::OutcomesClient::new(c)
            .report(pb::ReportRequest {
                route: "r".into(),
                ..Default::default()
            })
            .await
            .map(drop),
        // Before any scoring the handler answers that the log has nothing to compare: it was reached.
        "/probity.v1.Challengers/Compare" => {
            match pb::challengers_client::ChallengersClient::new(c)
                .compare(pb::CompareRequest {
                    route: "r".into(),
                    ..Default::default()
                })
                .await
            {
                Err(s)
                    if s.code() == Code::FailedPrecondition
                        && s.message().contains("no challenger prediction") =>
                {
                    Ok(())
                }
                other => other.map(drop),
            }
        }
        // Each promotion swaps the two models, so repeating it is always valid.
        "/probity.v1.Challengers/Promote" => {
            let routes = pb::models_client::ModelsClient::new(c.clone())
                .list_routes(pb::ListRoutesRequest {})
                .await;
            // The caller may not be allowed to list; then the model to promote does not matter (refused anyway).
            let challenger = match routes {
                Ok(r) if r.get_ref().routes[0].model == "m2" => "m",
                _ => "m2",
            };
            pb::challengers_client::ChallengersClient::new(c)
                .promote(pb::PromoteRequest {
                    route: "r".into(),
                    challenger: challenger.into(),
                    requested_by: "access test".into(),
                    reason: String::new(),
                })
                .await
                .map(drop)
        }
        // A restore undoes the last promotion; with none left the handler refuses, naming the history: reached.
        "/probity.v1.Challengers/Restore" => {
            match pb::challengers_client::ChallengersClient::new(c)
                .restore(pb::RestoreRequest {
                    route: "r".into(),
                    requested_by: "access test".into(),
                    reason: String::new(),
                })
                .await
            {
                Err(s)
                    if s.code() == Code::FailedPrecondition
                        && s.message().contains("no earlier champion") =>
                {
                    Ok(())
                }
                other => other.map(drop),
            }
        }
        "/probity.v1.Challengers/RouteHistory" => pb::challengers_client::ChallengersClient::new(c)
            .route_history(pb::RouteHistoryRequest::default())
            .await
            .map(drop),
        other => panic!("no test call for {other}: add one to `call`"),
    }
}

/// What a caller with `roles` should get from `path`: `None` for an OK answer, else the refusal code.
fn expected(need: Need, roles: Option<&[Role]>) -> Option<Code> {
    match (need, roles) {
        (Need::Open, _) => None,
        (_, None) => Some(Code::Unauthenticated),
        (Need::AnyCaller, Some(r)) if !r.is_empty() => None,
        (Need::Role(role), Some(r)) if r.contains(&role) => None,
        (_, Some(_)) => Some(Code::PermissionDenied),
    }
}

/// Calls every method in the table and compares each answer with [`expected`]. `roles` is `None` for a caller
/// that is not authenticated, `Some(&[])` for an authenticated identity without roles.
async fn check_every_method(conn: &Connection, who: &str, roles: Option<&[Role]>) -> usize {
    let mut checked = 0;
    // The intended table, not the server's: the calls must be refused as documented, whatever the server lists.
    for (path, need) in INTENDED {
        let result = call(conn, path).await;
        match (expected(need, roles), result) {
            (None, Ok(())) => {}
            (Some(code), Err(status)) => {
                assert_eq!(status.code(), code, "{who} on {path}: {status:?}");
                // The refusal says what is missing without echoing any secret.
                for (_, _, token) in TOKENS {
                    assert!(
                        !status.message().contains(token),
                        "{who} on {path}: token in message"
                    );
                }
            }
            (want, got) => panic!("{who} on {path}: expected {want:?}, got {got:?}"),
        }
        checked += 1;
    }
    checked
}

async fn metrics_text(server: &RunningServer) -> String {
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    let mut stream = tokio::net::TcpStream::connect(server.metrics_addr())
        .await
        .unwrap();
    stream
        .write_all(b"GET /metrics HTTP/1.0\r\nHost: test\r\n\r\n")
        .await
        .unwrap();
    let mut text = String::new();
    stream.read_to_string(&mut text).await.unwrap();
    text
}

/// The value of the sample of `name` with these labels (in any order; 0 when absent).
fn metric(text: &str, name: &str, labels: &[(&str, &str)]) -> f64 {
    text.lines()
        .filter(|l| l.starts_with(&format!("{name}{{")))
        .find(|l| {
            labels
                .iter()
                .all(|(k, v)| l.contains(&format!("{k}=\"{v}\"")))
        })
        .and_then(|l| l.rsplit(' ').next())
        .and_then(|v| v.parse().ok())
        .unwrap_or(0.0)
}

fn refusals(text: &str, reason: &str, method: &str) -> f64 {
    metric(
        text,
        "probity_auth_refusals_total",
        &[("reason", reason), ("method", method)],
    )
}

// ---------------------------------------------------------------------------------------------------------------
// Tests

/// Every method of every service the server registers, from the compiled descriptors: the probity protos (the
/// same bytes the server serves by reflection), gRPC health checking and both reflection versions.
#[test]
fn method_table_is_exactly_the_compiled_services() {
    let sets: [&[u8]; 4] = [
        pb::FILE_DESCRIPTOR_SET,
        tonic_health::pb::FILE_DESCRIPTOR_SET,
        tonic_reflection::pb::v1::FILE_DESCRIPTOR_SET,
        tonic_reflection::pb::v1alpha::FILE_DESCRIPTOR_SET,
    ];
    let mut compiled = BTreeSet::new();
    for bytes in sets {
        let set = prost_types::FileDescriptorSet::decode(bytes).unwrap();
        for file in set.file {
            for service in &file.service {
                for method in &service.method {
                    compiled.insert(format!(
                        "/{}.{}/{}",
                        file.package(),
                        service.name(),
                        method.name()
                    ));
                }
            }
        }
    }
    let table: BTreeSet<String> = METHODS.iter().map(|(p, _)| p.to_string()).collect();
    assert_eq!(METHODS.len(), table.len(), "a method is listed twice");
    assert_eq!(
        compiled.difference(&table).collect::<Vec<_>>(),
        Vec::<&String>::new(),
        "methods without an access rule"
    );
    assert_eq!(
        table.difference(&compiled).collect::<Vec<_>>(),
        Vec::<&String>::new(),
        "access rules for methods that do not exist"
    );
    assert!(compiled.len() >= 16, "{compiled:?}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tls_with_tokens_every_role_against_every_method() {
    let setup = Setup::new();
    let server = setup.start(None).await;
    let addr = server.grpc_addr();
    let before = metrics_text(&server).await;

    for (name, role, _) in TOKENS {
        let conn = setup
            .connect(addr, Some(name), None)
            .connect()
            .await
            .unwrap();
        check_every_method(&conn, name, Some(&[role])).await;
    }
    // No token: only health answers.
    let anonymous = setup.connect(addr, None, None).connect().await.unwrap();
    let n = check_every_method(&anonymous, "no token", None).await;
    assert_eq!(n, INTENDED.len());
    // A token nobody has, and one with a character changed, are not credentials.
    let wrong = setup.path("tokens/wrong");
    std::fs::write(&wrong, "admin-token-Pk5hE0iW6rT1zB8k\n").unwrap();
    let mut args = setup.connect(addr, None, None);
    args.token_file = Some(wrong);
    let conn = args.connect().await.unwrap();
    check_every_method(&conn, "wrong token", None).await;

    // Refusals are counted by reason and method (other tests in this process count too, so at least these; the
    // exact counts are checked against the binary below, which has its own metrics).
    let after = metrics_text(&server).await;
    let promote = "/probity.v1.Challengers/Promote";
    for (reason, at_least) in [
        ("missing_credentials", 1.0),
        ("invalid_token", 1.0),
        ("role_missing", 3.0),
    ] {
        assert!(
            refusals(&after, reason, promote) - refusals(&before, reason, promote) >= at_least,
            "{reason}"
        );
    }
    for (_, _, token) in TOKENS {
        assert!(!after.contains(token), "a token is in /metrics");
    }

    // A plain-text client cannot talk to the TLS port.
    let plain = ConnectArgs {
        server: format!("http://127.0.0.1:{}", addr.port()),
        ..ConnectArgs::default()
    };
    let result = connect_and_call(&plain, "/grpc.health.v1.Health/Check").await;
    assert!(result.is_err(), "plain text reached a TLS server");
    // And a TLS client that does not trust the server's CA cannot either.
    let other_ca = ca("another CA");
    std::fs::write(setup.path("certs/other-ca.crt"), &other_ca.pem).unwrap();
    let mut untrusting = setup.connect(addr, Some("t-admin"), None);
    untrusting.ca_file = Some(setup.path("certs/other-ca.crt"));
    let result = connect_and_call(&untrusting, "/grpc.health.v1.Health/Check").await;
    assert!(
        result.is_err(),
        "a client accepted a certificate from a CA it does not trust"
    );
    server.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mutual_tls_certificate_idsubjects_against_every_method() {
    let setup = Setup::new();
    let server = setup.start(Some("required")).await;
    let addr = server.grpc_addr();
    for (name, role, cn) in CERT_CALLERS {
        let conn = setup.connect(addr, None, Some(cn)).connect().await.unwrap();
        check_every_method(&conn, name, Some(&[role])).await;
    }
    // A certificate the CA signed for a name no caller has: known, but without roles.
    let stranger = setup
        .connect(addr, None, Some("stranger.client.test"))
        .connect()
        .await
        .unwrap();
    check_every_method(&stranger, "unconfigured certificate", Some(&[])).await;
    // A token decides over the certificate: the score certificate with the admin token is admin.
    let both = setup
        .connect(addr, Some("t-admin"), Some("score.client.test"))
        .connect()
        .await
        .unwrap();
    check_every_method(
        &both,
        "score certificate + admin token",
        Some(&[Role::Admin]),
    )
    .await;
    // Required: no certificate, no connection (even with a good token, even for health).
    let result = connect_and_call(
        &setup.connect(addr, Some("t-admin"), None),
        "/grpc.health.v1.Health/Check",
    )
    .await;
    assert!(
        result.is_err(),
        "a client without a certificate got through"
    );
    // A certificate from another CA is refused in the handshake.
    let other = ca("another CA");
    let (c, k) = write_leaf(
        &setup.path("certs"),
        "foreign",
        &leaf(&other, "admin.client.test", &[], false, 7),
    );
    let mut foreign = setup.connect(addr, None, None);
    foreign.client_cert = Some(c);
    foreign.client_key = Some(k);
    let result = connect_and_call(&foreign, "/probity.v1.Models/Reload").await;
    assert!(
        result.is_err(),
        "a certificate from a foreign CA got through"
    );
    server.shutdown().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn optional_client_certificates_take_tokens_and_certificates() {
    let setup = Setup::new();
    let server = setup.start(Some("optional")).await;
    let addr = server.grpc_addr();
    let anonymous = setup.connect(addr, None, None).connect().await.unwrap();
    check_every_method(&anonymous, "no certificate, no token", None).await;
    let token = setup
        .connect(addr, Some("t-report"), None)
        .connect()
        .await
        .unwrap();
    check_every_method(&token, "token only", Some(&[Role::ReportRead])).await;
    let cert = setup
        .connect(addr, None, Some("outcome.client.test"))
        .connect()
        .await
        .unwrap();
    check_every_method(&cert, "certificate only", Some(&[Role::OutcomeWrite])).await;
    server.shutdown().await;
}

/// The server certificate a fresh TLS handshake with `addr` presents.
async fn served_certificate(addr: SocketAddr, ca_pem: &str) -> Vec<u8> {
    let mut roots = rustls::RootCertStore::empty();
    for c in CertificateDer::pem_slice_iter(ca_pem.as_bytes()) {
        roots.add(c.unwrap()).unwrap();
    }
    let config = rustls::ClientConfig::builder_with_provider(Arc::new(
        rustls::crypto::ring::default_provider(),
    ))
    .with_safe_default_protocol_versions()
    .unwrap()
    .with_root_certificates(roots)
    .with_no_client_auth();
    let connector = tokio_rustls::TlsConnector::from(Arc::new(config));
    let tcp = tokio::net::TcpStream::connect(addr).await.unwrap();
    let tls = connector
        .connect(ServerName::try_from("localhost").unwrap(), tcp)
        .await
        .unwrap();
    tls.get_ref().1.peer_certificates().unwrap()[0].to_vec()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn certificate_reload_replaces_it_for_new_connections_and_keeps_it_on_bad_files() {
    let setup = Setup::new();
    let first = std::fs::read(&setup.server_cert).unwrap();
    let first_der = CertificateDer::from_pem_slice(&first).unwrap().to_vec();
    let server = setup.start(None).await;
    let addr = server.grpc_addr();
    assert_eq!(served_certificate(addr, &setup.ca.pem).await, first_der);
    let conn = setup
        .connect(addr, Some("t-score"), None)
        .connect()
        .await
        .unwrap();
    call(&conn, "/probity.v1.Scoring/Score").await.unwrap();

    // A new certificate and key (serial 2): the reload path the Reload call and SIGHUP use.
    let second = server_leaf(&setup.ca, 2);
    assert_ne!(second.der, first_der);
    let (cert_file, key_file) = (setup.server_cert.clone(), setup.server_key.clone());
    std::fs::write(&cert_file, &second.cert_pem).unwrap();
    std::fs::write(&key_file, &second.key_pem).unwrap();
    server.reload().await.unwrap();
    assert_eq!(served_certificate(addr, &setup.ca.pem).await, second.der);
    // The open connection goes on; a new one works too.
    call(&conn, "/probity.v1.Scoring/Score").await.unwrap();
    let fresh = setup
        .connect(addr, Some("t-score"), None)
        .connect()
        .await
        .unwrap();
    call(&fresh, "/probity.v1.Scoring/Score").await.unwrap();

    // Unchanged files: nothing to do.
    let (tls, tokens) = server.security().reload("test");
    assert_eq!(
        (tls, tokens),
        (ReloadOutcome::Unchanged, ReloadOutcome::Unchanged)
    );

    let failed = |text: &str| {
        metric(
            text,
            "probity_security_reloads_total",
            &[("what", "tls"), ("result", "failed")],
        )
    };
    let failed_before = failed(&metrics_text(&server).await);
    // A corrupt certificate file: refused, the second certificate stays.
    std::fs::write(
        &cert_file,
        "-----BEGIN CERTIFICATE-----\nbm90IGEgY2VydA==\n-----END CERTIFICATE-----\n",
    )
    .unwrap();
    let (tls, _) = server.security().reload("test");
    assert!(
        matches!(&tls, ReloadOutcome::Failed(e) if e.key == "server.tls.certificate_file"),
        "{tls:?}"
    );
    assert_eq!(served_certificate(addr, &setup.ca.pem).await, second.der);
    // A certificate whose key is not the one in the key file: refused too.
    let third = server_leaf(&setup.ca, 3);
    std::fs::write(&cert_file, &third.cert_pem).unwrap();
    let (tls, _) = server.security().reload("test");
    assert!(
        matches!(&tls, ReloadOutcome::Failed(e) if e.key == "server.tls.key_file"),
        "{tls:?}"
    );
    assert_eq!(served_certificate(addr, &setup.ca.pem).await, second.der);
    // An empty key file (a half-written rotation).
    std::fs::write(&cert_file, &second.cert_pem).unwrap();
    std::fs::write(&key_file, "").unwrap();
    let (tls, _) = server.security().reload("test");
    assert!(matches!(&tls, ReloadOutcome::Failed(_)), "{tls:?}");
    call(&fresh, "/probity.v1.Scoring/Score").await.unwrap();
    let failed_after = failed(&metrics_text(&server).await);
    assert_eq!(failed_after - failed_before, 3.0);

    // Token rotation: a new token file replaces the old token; a bad one keeps it.
    std::fs::write(
        setup.path("tokens/t-score"),
        "score-token-rotated-0123456789\n",
    )
    .unwrap();
    let (_, tokens) = server.security().reload("test");
    assert_eq!(tokens, ReloadOutcome::Loaded);
    let status = call(&fresh, "/probity.v1.Scoring/Score").await.unwrap_err();
    assert_eq!(
        status.code(),
        Code::Unauthenticated,
        "the old token still works"
    );
    let rotated = setup
        .connect(addr, Some("t-score"), None)
        .connect()
        .await
        .unwrap();
    call(&rotated, "/probity.v1.Scoring/Score").await.unwrap();
    std::fs::write(setup.path("tokens/t-score"), "short\n").unwrap();
    let (_, tokens) = server.security().reload("test");
    assert!(
        matches!(&tokens, ReloadOutcome::Failed(e) if e.key == "access.callers[0].token_file"
            && !e.message.contains("short")),
        "{tokens:?}"
    );
    call(&rotated, "/probity.v1.Scoring/Score").await.unwrap();
    server.shutdown().await;
}

/// Start-up refuses unusable files, naming the key.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn start_refuses_unusable_security_files() {
    let setup = Setup::new();
    let path = setup.path("probity.toml");
    std::fs::write(setup.path("tokens/t-admin"), "too-short\n").unwrap();
    std::fs::write(&path, setup.config(None, "")).unwrap();
    let config = Config::load(&Sources {
        file: Some(path.clone()),
        ..Sources::default()
    })
    .unwrap();
    let err = probity::serve::start(config)
        .await
        .err()
        .unwrap()
        .to_string();
    assert!(
        err.starts_with("access.callers[3].token_file: ") && !err.contains("too-short"),
        "{err}"
    );
    std::fs::write(setup.path("tokens/t-admin"), format!("{}\n", TOKENS[3].2)).unwrap();
    std::fs::write(&setup.server_key, "").unwrap();
    let config = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    let err = probity::serve::start(config)
        .await
        .err()
        .unwrap()
        .to_string();
    assert!(err.starts_with("server.tls.key_file: "), "{err}");
}

/// The real binary, its log captured at debug level: calls with good and wrong tokens, refusals and a SIGHUP
/// certificate reload, and not one token (nor a near miss) in the log or in /metrics.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_never_reach_the_log_or_metrics() {
    let setup = Setup::new();
    let path = setup.path("probity.toml");
    std::fs::write(&path, setup.config(None, "")).unwrap();
    let server = serve::Spawned::start(&path, &[]);
    let addr = server.grpc;
    let admin = setup
        .connect(addr, Some("t-admin"), None)
        .connect()
        .await
        .unwrap();
    call(&admin, "/probity.v1.Models/Reload").await.unwrap();
    for (name, _, _) in TOKENS {
        let c = setup
            .connect(addr, Some(name), None)
            .connect()
            .await
            .unwrap();
        for (path, _) in METHODS {
            let _ = call(&c, path).await;
        }
    }
    let near_miss = setup.path("tokens/near-miss");
    std::fs::write(&near_miss, "admin-token-Pk5hE0iW6rT1zB8J\n").unwrap();
    let mut args = setup.connect(addr, None, None);
    args.token_file = Some(near_miss);
    let wrong = args.connect().await.unwrap();
    assert_eq!(
        call(&wrong, "/probity.v1.Challengers/Promote")
            .await
            .unwrap_err()
            .code(),
        Code::Unauthenticated
    );

    // SIGHUP reloads the certificate.
    let second = server_leaf(&setup.ca, 2);
    std::fs::write(&setup.server_cert, &second.cert_pem).unwrap();
    std::fs::write(&setup.server_key, &second.key_pem).unwrap();
    server.signal("HUP");
    let mut reloaded = false;
    for _ in 0..200 {
        if served_certificate(addr, &setup.ca.pem).await == second.der {
            reloaded = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(reloaded, "SIGHUP did not reload the certificate");

    let metrics = {
        use tokio::io::{AsyncReadExt, AsyncWriteExt};
        let mut s = tokio::net::TcpStream::connect(server.metrics)
            .await
            .unwrap();
        s.write_all(b"GET /metrics HTTP/1.0\r\n\r\n").await.unwrap();
        let mut text = String::new();
        s.read_to_string(&mut text).await.unwrap();
        text
    };
    let (_, log) = server.stop();

    // The log did record what happened, with the callers' names.
    assert!(log.contains("call refused"), "{log}");
    assert!(
        log.contains(r#""caller":"t-score""#),
        "refusals name the caller: {log}"
    );
    assert!(log.contains("TLS certificate reloaded"), "{log}");
    // Each refusal counted once, by reason and method: Promote was refused to the three callers without `admin`
    // and to the near-miss token; nobody called without credentials.
    let promote = "/probity.v1.Challengers/Promote";
    assert_eq!(
        refusals(&metrics, "role_missing", promote),
        3.0,
        "{metrics}"
    );
    assert_eq!(
        refusals(&metrics, "invalid_token", promote),
        1.0,
        "{metrics}"
    );
    assert_eq!(
        refusals(&metrics, "missing_credentials", promote),
        0.0,
        "{metrics}"
    );
    assert_eq!(
        refusals(&metrics, "role_missing", "/probity.v1.Scoring/Score"),
        3.0,
        "{metrics}"
    );
    for secret in TOKENS
        .iter()
        .map(|(_, _, t)| *t)
        .chain(["admin-token-Pk5hE0iW6rT1zB8J"])
    {
        assert!(!log.contains(secret), "a token is in the log");
        assert!(!metrics.contains(secret), "a token is in /metrics");
        // Nor a long piece of one (a truncated or quoted form).
        assert!(
            !log.contains(&secret[secret.len() - 12..]),
            "part of a token is in the log"
        );
    }
}

/// `probity promote` and `probity route-history` dial a TLS server with --ca-file, --tls-server-name and
/// --token-file: the admin token promotes, the score token is refused with the role named, the report token reads
/// the history.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn command_line_tools_dial_with_tls_and_a_token() {
    let setup = Setup::new();
    let server = setup.start(None).await;
    let url = format!("https://127.0.0.1:{}", server.grpc_addr().port());
    let ca = setup.path("certs/ca.crt");
    let cli = |args: &[&str], token: &str| {
        let mut command = std::process::Command::new(env!("CARGO_BIN_EXE_probity"));
        command
            .args(args)
            .args(["--server", &url, "--tls-server-name", "localhost"])
            .arg("--ca-file")
            .arg(&ca)
            .arg("--token-file")
            .arg(setup.path(&format!("tokens/{token}")));
        command
    };
    let promote = [
        "promote",
        "--route",
        "r",
        "--challenger",
        "m2",
        "--requested-by",
        "cli test",
    ];
    let refused = tokio::task::block_in_place(|| cli(&promote, "t-score").output().unwrap());
    assert!(!refused.status.success());
    let stderr = String::from_utf8_lossy(&refused.stderr);
    assert!(
        stderr.contains("t-score does not have the role `admin`") && !stderr.contains(TOKENS[0].2),
        "{stderr}"
    );
    let done = tokio::task::block_in_place(|| cli(&promote, "t-admin").output().unwrap());
    let stdout = String::from_utf8_lossy(&done.stdout);
    assert!(
        done.status.success() && stdout.contains("m -> m2") && stdout.contains("as t-admin"),
        "{stdout}{}",
        String::from_utf8_lossy(&done.stderr)
    );
    let history = tokio::task::block_in_place(|| {
        cli(&["route-history", "--route", "r"], "t-report")
            .output()
            .unwrap()
    });
    let stdout = String::from_utf8_lossy(&history.stdout);
    assert!(
        history.status.success() && stdout.contains("route r: m -> m2 by cli test"),
        "{stdout}"
    );
    server.shutdown().await;
}
