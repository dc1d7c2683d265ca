use super::*;

fn write(text: &str) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("probity.toml");
    std::fs::write(&path, text).unwrap();
    (dir, path)
}

fn load(
    text: &str,
    env: &[(&str, &str)],
    overrides: &[(&str, &str)],
) -> Result<Config, ConfigError> {
    let (_dir, path) = write(text);
    // Every case here serves plain text on loopback; `transport_*` tests below leave the key out.
    Config::load(&Sources {
        file: Some(path),
        env: [("PROBITY_SERVER_PLAINTEXT", "loopback")]
            .iter()
            .chain(env)
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect(),
        overrides: overrides
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect(),
    })
}

const MINIMAL: &str = "[routes.fraud]\nmodel = \"harbourline-fraud\"\n";

#[test]
fn defaults_fill_everything_but_routes() {
    let c = load(MINIMAL, &[], &[]).unwrap();
    assert_eq!(c.grpc_listen.port(), 50051);
    assert_eq!(c.limits.max_batch_rows, 1000);
    let r = &c.routes["fraud"];
    assert_eq!(r.model, "harbourline-fraud");
    assert_eq!(r.missing_features, MissingPolicy::RouteAsMissing);
    assert_eq!(r.unknown_features, UnknownFeaturePolicy::Reject);
    assert_eq!(r.output.target_base_rate, None);
}

#[test]
fn file_then_env_then_flags() {
    let text = format!("[limits]\nmax_batch_rows = 10\ndefault_deadline_ms = 50\n{MINIMAL}");
    let c = load(
        &text,
        &[
            ("PROBITY_LIMITS_MAX_BATCH_ROWS", "20"),
            ("PROBITY_LOGGING_FORMAT", "json"),
            ("PROBITY_CONFIG", "x"),
        ],
        &[("limits.max_batch_rows", "30")],
    )
    .unwrap();
    assert_eq!(c.limits.max_batch_rows, 30, "flag wins over env and file");
    assert_eq!(
        c.limits.default_deadline,
        Duration::from_millis(50),
        "file wins over default"
    );
    assert_eq!(c.logging.format, LogFormat::Json, "env wins over default");
}

#[test]
fn errors_name_the_key() {
    let cases: &[(&str, &str)] = &[
        (
            "[routes.fraud]\nmodel = \"m\"\ntarget_base_rate = 1.5\n",
            "routes.fraud.target_base_rate: must be in (0, 1), got 1.5",
        ),
        (
            "[routes.fraud]\ntarget_base_rate = 0.5\n",
            "routes.fraud.model: is required",
        ),
        (
            "[limits]\nmax_batch_rows = 0\n[routes.a]\nmodel = \"m\"\n",
            "limits.max_batch_rows: must be in [1, 1000000], got 0",
        ),
        (
            "[limits]\nmax_batch_row = 5\n[routes.a]\nmodel = \"m\"\n",
            "limits.max_batch_row: unknown field `max_batch_row`",
        ),
        // An empty quoted key at the top (found by the config_load fuzz target): the error says where, `$`.
        ("\"\" = 2\n", "$: unknown field ``"),
        (
            "[server]\ngrpc_listen = \"nowhere\"\n[routes.a]\nmodel = \"m\"\n",
            "server.grpc_listen: must be HOST:PORT",
        ),
        (
            "[routes.a]\nmodel = \"m\"\ndecision = { threshold = 1.2 }\n",
            "routes.a.decision: threshold must be in [0, 1]",
        ),
        (
            "[routes.a]\nmodel = \"m\"\ndecision = { threshold = 0.2, false_positive = 1.0 }\n",
            "routes.a.decision: give exactly one",
        ),
        (
            "[routes.a]\nmodel = \"m\"\nmissing_features = \"skip\"\n",
            "routes.a.missing_features: must be",
        ),
        (
            "[logging]\nformat = \"xml\"\n[routes.a]\nmodel = \"m\"\n",
            "logging.format: must be `text` or `json`",
        ),
        (
            "[limits]\nmax_batch_rows = \"many\"\n[routes.a]\nmodel = \"m\"\n",
            "limits.max_batch_rows: invalid type",
        ),
        ("", "routes: at least one route is needed"),
    ];
    for (text, expected) in cases {
        let err = load(text, &[], &[]).unwrap_err().to_string();
        assert!(
            err.starts_with(expected),
            "config {text:?}\n  expected: {expected}\n  actual:   {err}"
        );
    }
}

/// Loads `text` as the only layer (no plaintext key added).
fn load_bare(text: &str) -> Result<Config, ConfigError> {
    let (_dir, path) = write(text);
    Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
}

#[test]
fn transport_plaintext_only_when_asked_and_only_on_loopback() {
    let err = load_bare(MINIMAL).unwrap_err().to_string();
    assert!(
        err.starts_with("server.tls: no transport security is configured")
            && err.contains("server.tls.certificate_file and server.tls.key_file")
            && err.contains("server.plaintext = \"loopback\""),
        "{err}"
    );
    for listen in ["127.0.0.1:0", "[::1]:50051", "127.0.0.2:7000"] {
        let c = load_bare(&format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"{listen}\"\n{MINIMAL}"
        ))
        .unwrap();
        assert_eq!(c.transport, Transport::PlaintextLoopback, "{listen}");
    }
    for listen in ["0.0.0.0:50051", "[::]:50051", "192.0.2.10:50051"] {
        let err = load_bare(&format!(
            "[server]\nplaintext = \"loopback\"\ngrpc_listen = \"{listen}\"\n{MINIMAL}"
        ))
        .unwrap_err()
        .to_string();
        assert!(
            err.starts_with("server.plaintext: \"loopback\" needs a loopback server.grpc_listen")
                && err.contains(listen.trim_start_matches('[').split(']').next().unwrap()),
            "{listen}: {err}"
        );
    }
    let err = load_bare(&format!("[server]\nplaintext = \"yes\"\n{MINIMAL}"))
        .unwrap_err()
        .to_string();
    assert!(
        err.starts_with("server.plaintext: must be \"loopback\"") && err.contains("`yes`"),
        "{err}"
    );
}

#[test]
fn env_errors_name_the_key_too() {
    let err = load(
        MINIMAL,
        &[("PROBITY_LIMITS_MAX_CONCURRENT_REQUESTS", "0")],
        &[],
    )
    .unwrap_err();
    assert!(
        err.to_string()
            .starts_with("limits.max_concurrent_requests: must be in [1,"),
        "{err}"
    );
}

#[test]
fn decisions_of_each_form() {
    let text = "[routes.a]\nmodel = \"m\"\ndecision = { false_positive = 1.0, false_negative = 20.0 }\n\
                [routes.b]\nmodel = \"m\"\ndecision = { edges = [0.1, 0.5], labels = [\"approve\", \"review\", \"decline\"] }\n";
    let c = load(text, &[], &[]).unwrap();
    assert_eq!(
        c.routes["a"].output.decision,
        Some(DecisionRule::Costs {
            false_positive: 1.0,
            false_negative: 20.0
        })
    );
    assert!(matches!(
        c.routes["b"].output.decision,
        Some(DecisionRule::Bands { .. })
    ));
}

#[test]
fn overrides_parse() {
    assert_eq!(
        parse_override("a.b=1").unwrap(),
        ("a.b".to_string(), "1".to_string())
    );
    assert!(parse_override("novalue").is_err());
}

#[test]
fn deploy_example_is_valid() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/probity.toml");
    let c = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    assert_eq!(c.routes["card-auth"].model, "harbourline-fraud-trees");
    assert_eq!(
        c.routes["card-auth"]
            .output
            .decision
            .as_ref()
            .and_then(|d| d.threshold()),
        Some(1.0 / 41.0)
    );
}

#[test]
fn tls_and_access_are_validated_with_the_key_named() {
    let tls = "[server.tls]\ncertificate_file = \"s.crt\"\nkey_file = \"s.key\"\n";
    let mtls = "[server.tls]\ncertificate_file = \"s.crt\"\nkey_file = \"s.key\"\nclient_ca_file = \"ca.crt\"\n";
    let token =
        "[[access.callers]]\nname = \"gw\"\ntoken_file = \"gw.token\"\nroles = [\"score\"]\n";
    let c = load_bare(&format!("{tls}{token}{MINIMAL}")).unwrap();
    let Transport::Tls(files) = &c.transport else {
        panic!("{:?}", c.transport)
    };
    assert_eq!(
        files.client_certificates,
        crate::serve::security::config::ClientCertificates::Off
    );
    assert_eq!(c.access.callers[0].name, "gw");
    let c = load_bare(&format!(
        "{mtls}client_certificates = \"optional\"\n[[access.callers]]\nname = \"ops\"\n\
         certificate_name = \"ops.test\"\nroles = [\"admin\", \"report-read\"]\n{MINIMAL}"
    ))
    .unwrap();
    let Transport::Tls(files) = &c.transport else {
        panic!("{:?}", c.transport)
    };
    assert_eq!(
        files.client_certificates,
        crate::serve::security::config::ClientCertificates::Optional
    );
    let cases: Vec<(String, &str)> = vec![
        (format!("{tls}{MINIMAL}"), "access.callers: a TLS server needs at least one caller"),
        (
            format!("[server.tls]\ncertificate_file = \"s.crt\"\n{token}{MINIMAL}"),
            "server.tls.key_file: is required",
        ),
        (
            format!("{tls}client_certificates = \"required\"\n{token}{MINIMAL}"),
            "server.tls.client_certificates: needs server.tls.client_ca_file",
        ),
        (
            format!("{mtls}client_certificates = \"sometimes\"\n{token}{MINIMAL}"),
            "server.tls.client_certificates: must be \"required\" or \"optional\"",
        ),
        (
            format!("{tls}[[access.callers]]\nname = \"ops\"\ncertificate_name = \"ops.test\"\nroles = [\"admin\"]\n{MINIMAL}"),
            "access.callers[0].certificate_name: needs mutual TLS",
        ),
        (
            format!("{tls}[[access.callers]]\nname = \"gw\"\ntoken_file = \"a\"\nroles = [\"scoring\"]\n{MINIMAL}"),
            "access.callers[0].roles: unknown role `scoring`",
        ),
        (
            format!("{tls}[[access.callers]]\nname = \"gw\"\ntoken_file = \"a\"\nroles = []\n{MINIMAL}"),
            "access.callers[0].roles: at least one of",
        ),
        (
            format!("{mtls}[[access.callers]]\nname = \"gw\"\ntoken_file = \"a\"\ncertificate_name = \"x\"\nroles = [\"score\"]\n{MINIMAL}"),
            "access.callers[0]: give exactly one of token_file",
        ),
        (
            format!("{tls}{token}{token}{MINIMAL}"),
            "access.callers[1].name: `gw` is used by another caller",
        ),
        (
            format!("{tls}{token}[[access.callers]]\nname = \"gw2\"\ntoken_file = \"gw.token\"\nroles = [\"admin\"]\n{MINIMAL}"),
            "access.callers[1].token_file: `gw.token` is also the token file of `gw`",
        ),
        (
            format!("[server]\nplaintext = \"loopback\"\n{tls}{token}{MINIMAL}"),
            "server.plaintext: and [server.tls] exclude each other",
        ),
        (
            format!("[server]\nplaintext = \"loopback\"\nadmin_token_file = \"a\"\n{MINIMAL}"),
            "server.admin_token_file: was replaced by [[access.callers]]",
        ),
    ];
    for (text, expected) in cases {
        let err = load_bare(&text).unwrap_err().to_string();
        assert!(
            err.starts_with(expected),
            "config {text:?}\n  expected: {expected}\n  actual:   {err}"
        );
    }
    // Callers on a plain-text loopback server are allowed (roles enforced there too).
    let c = load_bare(&format!(
        "[server]\nplaintext = \"loopback\"\n{token}{MINIMAL}"
    ))
    .unwrap();
    assert_eq!(c.transport, Transport::PlaintextLoopback);
    assert_eq!(c.access.callers.len(), 1);
}

#[test]
fn deploy_example_security_block_is_valid_when_uncommented() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/probity.toml");
    let text = std::fs::read_to_string(path).unwrap();
    let keys = [
        "[server.tls]",
        "certificate_file",
        "key_file",
        "client_ca_file",
        "client_certificates",
        "[[access.callers]]",
        "name",
        "token_file",
        "certificate_name",
        "roles",
    ];
    let mut uncommented = 0;
    let text: String = text
        .lines()
        .filter(|l| !l.starts_with("plaintext ="))
        .map(|l| match l.strip_prefix("# ") {
            Some(rest) if keys.iter().any(|k| rest.starts_with(k)) => {
                uncommented += 1;
                format!("{rest}\n")
            }
            _ => format!("{l}\n"),
        })
        .collect();
    assert_eq!(uncommented, 13, "the example block changed shape");
    let (_dir, path) = write(&text.replace("127.0.0.1:50051", "0.0.0.0:50051"));
    let c = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    let Transport::Tls(files) = &c.transport else {
        panic!("{:?}", c.transport)
    };
    assert!(files.client_ca_file.is_some());
    assert_eq!(c.access.callers.len(), 2);
}

#[test]
fn max_connection_age_is_off_by_default_and_layered_like_the_other_keys() {
    assert_eq!(load(MINIMAL, &[], &[]).unwrap().max_connection_age, None);
    let text = format!("[server]\nmax_connection_age_ms = 300000\n{MINIMAL}");
    assert_eq!(
        load(&text, &[], &[]).unwrap().max_connection_age,
        Some(Duration::from_secs(300)),
        "file"
    );
    let c = load(
        &text,
        &[("PROBITY_SERVER_MAX_CONNECTION_AGE_MS", "600000")],
        &[],
    )
    .unwrap();
    assert_eq!(
        c.max_connection_age,
        Some(Duration::from_secs(600)),
        "env wins over file"
    );
    let c = load(
        &text,
        &[("PROBITY_SERVER_MAX_CONNECTION_AGE_MS", "600000")],
        &[("server.max_connection_age_ms", "0")],
    )
    .unwrap();
    assert_eq!(
        c.max_connection_age, None,
        "a flag of 0 turns the limit off again"
    );
    for (value, expected) in [
        (
            "999",
            "server.max_connection_age_ms: must be 0 (no limit) or at least 1000, got 999",
        ),
        (
            "604800001",
            "server.max_connection_age_ms: must be in [0, 604800000], got 604800001",
        ),
        ("\"5m\"", "server.max_connection_age_ms: invalid type"),
    ] {
        let err = load(MINIMAL, &[], &[("server.max_connection_age_ms", value)])
            .unwrap_err()
            .to_string();
        assert!(err.starts_with(expected), "{value}: {err}");
    }
}

#[test]
fn container_configuration_is_valid() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/container/probity.toml");
    let c = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    assert!(matches!(c.transport, Transport::Tls(_)));
    assert_eq!(c.max_connection_age, Some(Duration::from_secs(300)));
    assert_eq!(c.model_dir, PathBuf::from("/models"));
}

/// The TOML of the fleet's ConfigMap (deploy/kubernetes/configmap.yaml) loads as it is: TLS, three callers, the
/// connection age, and the shared PostgreSQL store with its URL from the Secret file.
#[test]
fn kubernetes_configmap_configuration_is_valid() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/kubernetes/configmap.yaml");
    let yaml = std::fs::read_to_string(path).unwrap();
    let mut lines = yaml.lines().skip_while(|l| l.trim() != "probity.toml: |");
    assert!(lines.next().is_some(), "no probity.toml in the ConfigMap");
    let toml: String = lines
        .take_while(|l| l.is_empty() || l.starts_with("    "))
        .map(|l| l.strip_prefix("    ").unwrap_or(l))
        .map(|l| format!("{l}\n"))
        .collect();
    assert!(toml.contains("[routes.card-auth]"));
    let (_dir, path) = write(&toml);
    let c = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap();
    assert!(matches!(c.transport, Transport::Tls(_)));
    assert_eq!(c.access.callers.len(), 3);
    assert_eq!(c.max_connection_age, Some(Duration::from_secs(300)));
    assert_eq!(c.routes["card-auth"].challengers.list.len(), 1);
    assert_eq!(c.store.backend, crate::store::config::Backend::Postgres);
    assert_eq!(
        c.store.postgres_url_file.as_deref(),
        Some(Path::new("/etc/probity/postgres/url"))
    );
}

#[test]
fn route_reasons_settings() {
    let c = load(MINIMAL, &[], &[]).unwrap();
    assert_eq!(
        c.routes["fraud"].reasons,
        probity_models::ReasonRequest::default()
    );
    let text = "[routes.fraud]\nmodel = \"m\"\nreasons = { limit = 2, adverse = \"lower\" }\n";
    let r = &load(text, &[], &[]).unwrap().routes["fraud"];
    assert_eq!(r.reasons.limit, 2);
    assert_eq!(r.reasons.adverse, probity_models::Adverse::Lower);
    let bad = "[routes.fraud]\nmodel = \"m\"\nreasons = { limit = 50 }\n";
    let e = load(bad, &[], &[]).unwrap_err().to_string();
    assert!(
        e.contains("routes.fraud.reasons.limit: must be 1 to 20, got 50"),
        "{e}"
    );
}

#[test]
fn names_of_earlier_releases_are_refused_with_the_new_name() {
    let store_hint = "log: the prediction store's section was renamed: write [store]";
    // The section in the file, its variables and its overrides all meet the same refusal.
    let err = load(&format!("[log]\ndirectory = \"d\"\n{MINIMAL}"), &[], &[])
        .unwrap_err()
        .to_string();
    assert!(err.starts_with(store_hint), "{err}");
    let err = load(MINIMAL, &[("PROBITY_LOG_DIRECTORY", "d")], &[])
        .unwrap_err()
        .to_string();
    assert!(err.starts_with(store_hint), "{err}");
    let err = load(MINIMAL, &[], &[("log.directory", "d")])
        .unwrap_err()
        .to_string();
    assert!(err.starts_with(store_hint), "{err}");
    // The new names load; the process log keeps its own section and variables.
    let c = load(
        MINIMAL,
        &[
            ("PROBITY_STORE_DIRECTORY", "d"),
            ("PROBITY_LOGGING_LEVEL", "debug"),
        ],
        &[],
    )
    .unwrap();
    assert_eq!(c.store.directory.as_deref(), Some(Path::new("d")));
    assert_eq!(c.logging.level, "debug");
    // Challenger words of earlier releases name their replacements.
    for (text, expected) in [
        (
            "mode = \"mirror\"",
            "routes.fraud.challengers[0].mode: `mirror` was renamed: write `silent`",
        ),
        (
            "mode = \"split\"\nfraction = 0.1",
            "routes.fraud.challengers[0].fraction: was renamed: write `share`",
        ),
        (
            "mode = \"live\"\nshare = 0.1\nmirror_back = true",
            "routes.fraud.challengers[0].mirror_back: was renamed: write `paired`",
        ),
    ] {
        let err = load(
            &format!("{MINIMAL}[[routes.fraud.challengers]]\nmodel = \"other\"\n{text}\n"),
            &[],
            &[],
        )
        .unwrap_err()
        .to_string();
        assert_eq!(err, expected);
    }
    let c = load(
        &format!("{MINIMAL}[[routes.fraud.challengers]]\nmodel = \"other\"\nmode = \"live\"\nshare = 0.1\npaired = true\n"),
        &[],
        &[],
    )
    .unwrap();
    assert_eq!(
        c.routes["fraud"].challengers.list[0].describe(),
        "other live 0.1 paired"
    );
}

#[test]
fn route_record_words_and_the_store_it_needs() {
    let c = load(MINIMAL, &[], &[]).unwrap();
    assert_eq!(c.routes["fraud"].record, RecordMode::AfterAnswer);
    let text = "[store]\ndirectory = \"/var/lib/probity\"\n\
                [routes.fraud]\nmodel = \"m\"\n[routes.credit]\nmodel = \"m\"\nrecord = \"before-answer\"\n";
    let c = load(text, &[], &[]).unwrap();
    assert_eq!(c.routes["credit"].record, RecordMode::BeforeAnswer);
    assert_eq!(c.routes["fraud"].record, RecordMode::AfterAnswer);
    let bad = "[store]\ndirectory = \"/var/lib/probity\"\n[routes.credit]\nmodel = \"m\"\nrecord = \"sync\"\n";
    let e = load(bad, &[], &[]).unwrap_err().to_string();
    assert!(
        e.contains("routes.credit.record: must be `after-answer` or `before-answer`, got `sync`"),
        "{e}"
    );
    // Waiting for a record needs a store to record in.
    let no_store = "[routes.credit]\nmodel = \"m\"\nrecord = \"before-answer\"\n";
    let e = load(no_store, &[], &[]).unwrap_err().to_string();
    assert!(
        e.contains("routes.credit.record") && e.contains("store.directory"),
        "{e}"
    );
}

#[test]
fn a_syntax_error_on_a_long_line_stays_short() {
    // The config_load fuzz target's input (fuzz/regressions/config_load/long-line-syntax-error-message).
    let text = std::fs::read(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/../fuzz/regressions/config_load/long-line-syntax-error-message"
    ))
    .unwrap();
    let (_dir, path) = write(&String::from_utf8_lossy(&text));
    let error = Config::load(&Sources {
        file: Some(path),
        ..Sources::default()
    })
    .unwrap_err();
    let message = error.to_string();
    assert!(matches!(error, ConfigError::Syntax { .. }), "{message}");
    assert!(
        message.lines().all(|l| l.chars().count() <= 400),
        "{message}"
    );
    assert!(
        message.chars().count() < 2_000,
        "{} characters",
        message.chars().count()
    );
}
