//! Server configuration, in layers: built-in defaults, then a TOML file, then `PROBITY_<SECTION>_<KEY>`
//! environment variables, then command-line flags.
//!
//! The layers are merged as TOML tables and read into [`RawConfig`] (serde, unknown keys refused, errors naming the
//! key path); [`Config::from_raw`] then checks every value and builds the typed [`Config`] the server runs on. An
//! invalid value stops start-up with an error such as `routes.fraud.target_base_rate: must be in (0, 1), got 1.5`.
//! `deploy/probity.toml` is a complete example.

use std::collections::BTreeMap;
use std::net::{SocketAddr, ToSocketAddrs};
use std::path::{Path, PathBuf};
use std::time::Duration;

use probity_models::{DecisionRule, OutputSpec};
use serde::Deserialize;

/// Sections whose scalar keys environment variables may set (`PROBITY_LIMITS_MAX_BATCH_ROWS` sets
/// `limits.max_batch_rows`). Routes are set in the file only.
/// `log` is the prediction store's section of earlier releases: its variables still map to `log.*` keys, which are
/// refused with the new name.
const ENV_SECTIONS: [&str; 6] = ["server", "models", "limits", "logging", "store", "log"];

/// Why the configuration was refused.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The file could not be read.
    #[error("cannot read config file {path}: {source}")]
    Read {
        /// The file.
        path: PathBuf,
        /// The I/O error.
        source: std::io::Error,
    },
    /// The file is not valid TOML.
    #[error("config file {path}: {message}")]
    Syntax {
        /// The file.
        path: PathBuf,
        /// The TOML reader's message, with line and column.
        message: String,
    },
    /// An override is not of the form `key.path=value`.
    #[error(
        "override `{text}`: expected KEY=VALUE with a dotted key such as limits.max_batch_rows=500"
    )]
    Override {
        /// The override as given.
        text: String,
    },
    /// A key has a value of the wrong type or is unknown, or a value breaks a rule.
    #[error("{key}: {message}")]
    Invalid {
        /// Dotted key path, e.g. `routes.fraud.target_base_rate`.
        key: String,
        /// What is wrong, with the value given.
        message: String,
    },
}

fn invalid(key: impl Into<String>, message: impl Into<String>) -> ConfigError {
    ConfigError::Invalid {
        key: key.into(),
        message: message.into(),
    }
}

/// The configuration as written: every key optional, defaults filled in by serde.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawConfig {
    server: RawServer,
    models: RawModels,
    limits: RawLimits,
    logging: RawLogging,
    store: crate::store::config::RawStore,
    /// The prediction store's section of earlier releases; refused with the new name.
    log: Option<toml::Value>,
    access: crate::serve::security::config::RawAccess,
    routes: BTreeMap<String, RawRoute>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawServer {
    grpc_listen: String,
    metrics_listen: String,
    reflection: bool,
    shutdown_grace_ms: u64,
    max_connection_age_ms: u64,
    admin_token_file: Option<String>,
    plaintext: Option<String>,
    tls: Option<crate::serve::security::config::RawTls>,
}

impl Default for RawServer {
    fn default() -> Self {
        RawServer {
            grpc_listen: "127.0.0.1:50051".into(),
            metrics_listen: "127.0.0.1:9464".into(),
            reflection: true,
            shutdown_grace_ms: 10_000,
            max_connection_age_ms: 0,
            admin_token_file: None,
            plaintext: None,
            tls: None,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawModels {
    directory: PathBuf,
    watch: bool,
    watch_debounce_ms: u64,
}

impl Default for RawModels {
    fn default() -> Self {
        RawModels {
            directory: PathBuf::from("models"),
            watch: true,
            watch_debounce_ms: 300,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawLimits {
    max_batch_rows: u64,
    max_message_bytes: u64,
    max_concurrent_requests: u64,
    default_deadline_ms: u64,
    max_connections: u64,
    max_streams_per_connection: u64,
}

impl Default for RawLimits {
    fn default() -> Self {
        RawLimits {
            max_batch_rows: 1_000,
            max_message_bytes: 4 * 1024 * 1024,
            max_concurrent_requests: 1_024,
            default_deadline_ms: 1_000,
            max_connections: 1_024,
            max_streams_per_connection: 100,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawLogging {
    format: String,
    level: String,
}

impl Default for RawLogging {
    fn default() -> Self {
        RawLogging {
            format: "text".into(),
            level: "info".into(),
        }
    }
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawRoute {
    model: Option<String>,
    target_base_rate: Option<f64>,
    decision: Option<RawDecision>,
    missing_features: Option<String>,
    unknown_categories: Option<String>,
    unknown_features: Option<String>,
    challengers: Vec<crate::serve::challenger::RawChallenger>,
    base_rate_from_estimate: Option<crate::serve::base_rate::RawEstimateBounds>,
    reasons: Option<RawReasons>,
    record: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawReasons {
    limit: Option<i64>,
    adverse: Option<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawDecision {
    threshold: Option<f64>,
    false_positive: Option<f64>,
    false_negative: Option<f64>,
    edges: Option<Vec<f64>>,
    labels: Option<Vec<String>>,
}

/// The validated configuration.
#[derive(Debug, Clone)]
pub struct Config {
    /// Address of the gRPC listener (port 0 picks a free port).
    pub grpc_listen: SocketAddr,
    /// Address of the HTTP listener for `/metrics`, `/livez` and `/readyz`.
    pub metrics_listen: SocketAddr,
    /// How the gRPC port is secured.
    pub transport: Transport,
    /// Whether gRPC server reflection is on.
    pub reflection: bool,
    /// How long a shutdown waits for in-flight calls before closing them.
    pub shutdown_grace: Duration,
    /// The longest a gRPC connection lives (`server.max_connection_age_ms`; 0, the default, is no limit). Past it the
    /// server sends HTTP/2 GOAWAY: the client opens a new connection for its next calls (possibly to another
    /// replica), and the old one closes once its calls in flight have finished (a long stream keeps it until the
    /// stream ends). Long-lived HTTP/2 connections are balanced per connection, so a fleet behind a
    /// connection-level load balancer needs this to spread load again after replicas are added or restarted.
    pub max_connection_age: Option<Duration>,
    /// The callers and their roles (`[[access.callers]]`).
    pub access: crate::serve::security::config::AccessConfig,
    /// Where the model files are (`*.json`).
    pub model_dir: PathBuf,
    /// Whether to watch the model directory for changes.
    pub watch: bool,
    /// How long to wait for a burst of file events to settle before reloading.
    pub watch_debounce: Duration,
    /// Request limits.
    pub limits: Limits,
    /// Log format and level.
    pub logging: Logging,
    /// The prediction store (`[store]`); off without `store.directory`.
    pub store: crate::store::StoreConfig,
    /// Routes by name.
    pub routes: BTreeMap<String, Route>,
    /// Routes that apply the live base-rate estimate (`routes.<name>.base_rate_from_estimate`), with its bounds;
    /// empty by default.
    pub base_rate_from_estimate: BTreeMap<String, crate::serve::base_rate::EstimateBounds>,
}

/// How the gRPC port is secured.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Transport {
    /// Plain text, allowed only when asked for with `server.plaintext = "loopback"` and only on a loopback
    /// `server.grpc_listen` (127.0.0.0/8, ::1).
    PlaintextLoopback,
    /// TLS with the certificate and key of `[server.tls]`, mutual when a client CA is given.
    Tls(crate::serve::security::config::TlsFiles),
}

/// Request limits.
#[derive(Debug, Clone, Copy)]
pub struct Limits {
    /// Most rows in one `ScoreBatch` call.
    pub max_batch_rows: usize,
    /// Largest encoded message accepted or sent.
    pub max_message_bytes: usize,
    /// Most calls served at once; further calls wait (within their deadline).
    pub max_concurrent_requests: usize,
    /// Deadline of a call that does not set a shorter one.
    pub default_deadline: Duration,
    /// Most client connections open at once on the gRPC port; a connection over it is closed at once (counted in
    /// `probity_connections_refused_total`), so a client can try another replica.
    pub max_connections: usize,
    /// Most calls open at once on one connection (HTTP/2 SETTINGS_MAX_CONCURRENT_STREAMS, RFC 9113 section 6.5.2);
    /// the client queues further calls itself.
    pub max_streams_per_connection: u32,
}

/// Log output.
#[derive(Debug, Clone)]
pub struct Logging {
    /// Text or JSON lines.
    pub format: LogFormat,
    /// A `tracing` filter directive such as `info` or `probity=debug,info`.
    pub level: String,
}

/// Log line format.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

/// One route: which model answers, and what the service adds on top.
#[derive(Debug, Clone)]
pub struct Route {
    /// The route's name.
    pub name: String,
    /// The model it serves (its champion): a name, or `NAME@VERSION` to pin a version.
    pub model: crate::serve::model_ref::ModelRef,
    /// Target base rate and decision rule.
    pub output: OutputSpec,
    /// What to do when a model feature has no value (or a non-finite one).
    pub missing_features: MissingPolicy,
    /// What to do with a category the model does not know.
    pub unknown_categories: UnknownCategoryPolicy,
    /// What to do with a named feature the model does not have.
    pub unknown_features: UnknownFeaturePolicy,
    /// Challengers beside the champion (`model`), silent or live.
    pub challengers: crate::serve::challenger::Challengers,
    /// How many reasons an explanation lists and which direction is adverse (`[routes.NAME.reasons]`).
    pub reasons: probity_models::ReasonRequest,
    /// When the answer's prediction is committed to the prediction store, relative to the answer.
    pub record: RecordMode,
}

/// When a route's predictions are committed to the prediction store (`routes.NAME.record`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum RecordMode {
    /// `after-answer` (the default): the answer goes out at once and the prediction is committed with the next
    /// batch, within `flush_interval`; a killed process loses what was answered since the last commit.
    #[default]
    AfterAnswer,
    /// `before-answer`: the answer goes out only after the batch holding its prediction has committed; a call
    /// whose prediction cannot be committed is refused (UNAVAILABLE) instead of answered.
    BeforeAnswer,
}

impl RecordMode {
    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            RecordMode::AfterAnswer => "after-answer",
            RecordMode::BeforeAnswer => "before-answer",
        }
    }
}

/// Missing-feature policy.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MissingPolicy {
    /// Score with the value missing (the model's missing-value rule) and warn in the response.
    RouteAsMissing,
    /// Refuse the row (INVALID_ARGUMENT).
    Reject,
}

/// Unknown-category policy.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UnknownCategoryPolicy {
    /// Score with the model's unknown-category rule and warn in the response.
    RouteAsUnknown,
    /// Refuse the row (INVALID_ARGUMENT).
    Reject,
}

/// Policy for named features the model does not have.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UnknownFeaturePolicy {
    /// Ignore them and warn in the response.
    Ignore,
    /// Refuse the row (INVALID_ARGUMENT), which catches misspelt names.
    Reject,
}

impl MissingPolicy {
    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            MissingPolicy::RouteAsMissing => "route_as_missing",
            MissingPolicy::Reject => "reject",
        }
    }
}

impl UnknownCategoryPolicy {
    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            UnknownCategoryPolicy::RouteAsUnknown => "route_as_unknown",
            UnknownCategoryPolicy::Reject => "reject",
        }
    }
}

impl UnknownFeaturePolicy {
    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            UnknownFeaturePolicy::Ignore => "ignore",
            UnknownFeaturePolicy::Reject => "reject",
        }
    }
}

/// Where the layers come from; [`Config::load`] merges them in field order.
#[derive(Debug, Default, Clone)]
pub struct Sources {
    /// The TOML file, if any.
    pub file: Option<PathBuf>,
    /// Environment variables (all of them; only `PROBITY_<SECTION>_<KEY>` ones are read).
    pub env: Vec<(String, String)>,
    /// Flag overrides as `(dotted key, value)`.
    pub overrides: Vec<(String, String)>,
}

impl Config {
    /// Merges the layers and validates the result.
    pub fn load(sources: &Sources) -> Result<Config, ConfigError> {
        let mut table = match &sources.file {
            Some(path) => read_file(path)?,
            None => toml::Table::new(),
        };
        for (name, value) in &sources.env {
            if let Some(key) = env_key(name) {
                set_key(
                    &mut table,
                    &key,
                    value,
                    &format!("environment variable {name}"),
                )?;
            }
        }
        for (key, value) in &sources.overrides {
            set_key(&mut table, key, value, &format!("flag for {key}"))?;
        }
        let raw: RawConfig =
            serde_path_to_error::deserialize(toml::Value::Table(table)).map_err(|e| {
                let key = e.path().to_string();
                // The TOML deserializer appends `in <table>` on a second line; the key path says where already.
                let message = e.into_inner().to_string();
                let message = message.lines().next().unwrap_or_default().to_string();
                invalid(
                    if key.is_empty() || key == "." {
                        "$".to_string()
                    } else {
                        key
                    },
                    message,
                )
            })?;
        Config::from_raw(raw)
    }

    /// Validates a raw configuration.
    pub fn from_raw(raw: RawConfig) -> Result<Config, ConfigError> {
        let RawConfig {
            server,
            models,
            limits,
            logging,
            store,
            log,
            access,
            routes,
        } = raw;
        if log.is_some() {
            return Err(invalid(
                "log",
                "the prediction store's section was renamed: write [store] (environment PROBITY_STORE_*, \
                 --set store.KEY=VALUE); [logging] is the process log",
            ));
        }
        let RawServer {
            grpc_listen,
            metrics_listen,
            reflection,
            shutdown_grace_ms,
            max_connection_age_ms,
            admin_token_file,
            plaintext,
            tls,
        } = server;
        if admin_token_file.is_some() {
            return Err(invalid(
                "server.admin_token_file",
                "was replaced by [[access.callers]]: give the caller a name, token_file = \"...\" and \
                 roles = [\"admin\"] (README, Security)",
            ));
        }
        let RawModels {
            directory,
            watch,
            watch_debounce_ms,
        } = models;
        if directory.as_os_str().is_empty() {
            return Err(invalid("models.directory", "must not be empty"));
        }
        if routes.is_empty() {
            return Err(invalid(
                "routes",
                "at least one route is needed, e.g. [routes.fraud] model = \"...\"",
            ));
        }
        let mut estimate_bounds = BTreeMap::new();
        let routes = routes
            .into_iter()
            .map(|(name, mut raw)| {
                if let Some(b) = raw.base_rate_from_estimate.take() {
                    estimate_bounds.insert(name.clone(), b);
                }
                Ok((name.clone(), route(&name, raw)?))
            })
            .collect::<Result<BTreeMap<_, _>, ConfigError>>()?;
        pinned_everywhere_or_nowhere(&routes)?;
        let names = routes.keys().cloned().collect();
        let store = crate::store::StoreConfig::from_raw(store, &names)
            .map_err(|(key, message)| invalid(key, message))?;
        if !store.enabled() {
            if let Some(name) = routes
                .iter()
                .find(|(_, r)| r.record == RecordMode::BeforeAnswer)
                .map(|(name, _)| name)
            {
                return Err(invalid(
                    format!("routes.{name}.record"),
                    "`before-answer` needs the prediction store: set store.directory (or store.backend = \"postgres\")",
                ));
            }
        }
        let window = store.enabled().then_some(store.prior_window);
        let base_rate_from_estimate = estimate_bounds
            .into_iter()
            .map(|(name, raw)| {
                crate::serve::base_rate::bounds(&name, raw, window)
                    .map(|b| (name, b))
                    .map_err(|(key, message)| invalid(key, message))
            })
            .collect::<Result<BTreeMap<_, _>, ConfigError>>()?;
        let grpc_listen = socket_addr("server.grpc_listen", &grpc_listen)?;
        let metrics_listen = socket_addr("server.metrics_listen", &metrics_listen)?;
        let tls = crate::serve::security::config::tls(tls).map_err(|(k, m)| invalid(k, m))?;
        let access = crate::serve::security::config::access(access, tls.as_ref(), valid_name)
            .map_err(|(k, m)| invalid(k, m))?;
        let transport = transport(plaintext.as_deref(), tls, grpc_listen)?;
        Ok(Config {
            grpc_listen,
            metrics_listen,
            transport,
            reflection,
            shutdown_grace: Duration::from_millis(shutdown_grace_ms),
            max_connection_age: match in_range(
                "server.max_connection_age_ms",
                max_connection_age_ms,
                0,
                7 * 24 * 3_600_000,
            )? {
                0 => None,
                1..1_000 => {
                    return Err(invalid(
                        "server.max_connection_age_ms",
                        format!(
                            "must be 0 (no limit) or at least 1000, got {max_connection_age_ms}: \
                             shorter connections spend the calls on handshakes"
                        ),
                    ))
                }
                ms => Some(Duration::from_millis(ms)),
            },
            access,
            model_dir: directory,
            watch,
            watch_debounce: Duration::from_millis(in_range(
                "models.watch_debounce_ms",
                watch_debounce_ms,
                0,
                60_000,
            )?),
            limits: self::limits(limits)?,
            logging: self::logging(logging)?,
            store,
            routes,
            base_rate_from_estimate,
        })
    }
}

/// The transport of the gRPC port. Plain text is never a default: it must be asked for, and only for loopback.
fn transport(
    plaintext: Option<&str>,
    tls: Option<crate::serve::security::config::TlsFiles>,
    grpc_listen: SocketAddr,
) -> Result<Transport, ConfigError> {
    let key = "server.plaintext";
    match (plaintext, tls) {
        (None, Some(files)) => Ok(Transport::Tls(files)),
        (Some(_), Some(_)) => Err(invalid(
            key,
            "and [server.tls] exclude each other: remove one",
        )),
        (None, None) => Err(invalid(
            "server.tls",
            "no transport security is configured: set server.tls.certificate_file and server.tls.key_file \
             (TLS), or server.plaintext = \"loopback\" to serve gRPC in plain text on a loopback \
             server.grpc_listen",
        )),
        (Some("loopback"), None) if grpc_listen.ip().is_loopback() => Ok(Transport::PlaintextLoopback),
        (Some("loopback"), None) => Err(invalid(
            key,
            format!(
                "\"loopback\" needs a loopback server.grpc_listen (127.0.0.1, ::1 or localhost), got {grpc_listen}; \
                 use [server.tls] for any other address"
            ),
        )),
        (Some(other), None) => Err(invalid(
            key,
            format!("must be \"loopback\" (plain text on a loopback address) or absent, got `{other}`"),
        )),
    }
}

fn read_file(path: &Path) -> Result<toml::Table, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.into(),
        source,
    })?;
    text.parse::<toml::Table>()
        .map_err(|e| ConfigError::Syntax {
            path: path.into(),
            message: bounded_lines(e.to_string().trim()),
        })
}

/// The TOML reader's message with each line cut to 200 characters: it quotes the offending line of the file, which
/// may be any length (found by the config_load fuzz target: a 4,010-byte line gave an 8,135-character message).
fn bounded_lines(message: &str) -> String {
    message
        .lines()
        .map(|line| match line.char_indices().nth(200) {
            Some((at, _)) => format!("{}...", &line[..at]),
            None => line.to_string(),
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// `PROBITY_LIMITS_MAX_BATCH_ROWS` -> `limits.max_batch_rows`; other variables -> `None`. The shared store's
/// connection URL (`PROBITY_STORE_POSTGRES_URL`) is a secret read by the store itself, not a configuration key.
fn env_key(name: &str) -> Option<String> {
    if name == crate::store::postgres::ENV_URL {
        return None;
    }
    let rest = name.strip_prefix("PROBITY_")?.to_ascii_lowercase();
    ENV_SECTIONS.iter().find_map(|section| {
        let key = rest.strip_prefix(section)?.strip_prefix('_')?;
        (!key.is_empty()).then(|| format!("{section}.{key}"))
    })
}

/// Sets a dotted key to a value given as text: read as a TOML value when it is one (`500`, `true`, `0.5`,
/// `["a"]`), as a string otherwise.
fn set_key(
    table: &mut toml::Table,
    key: &str,
    text: &str,
    origin: &str,
) -> Result<(), ConfigError> {
    let value = format!("v = {text}")
        .parse::<toml::Table>()
        .ok()
        .and_then(|mut t| t.remove("v"))
        .unwrap_or_else(|| toml::Value::String(text.to_string()));
    let parts: Vec<&str> = key.split('.').collect();
    if parts.iter().any(|p| p.is_empty()) {
        return Err(invalid(key, format!("bad key from {origin}")));
    }
    let (last, parents) = parts
        .split_last()
        .ok_or_else(|| invalid(key, format!("bad key from {origin}")))?;
    let mut node = table;
    for (depth, part) in parents.iter().enumerate() {
        let entry = node
            .entry(part.to_string())
            .or_insert_with(|| toml::Value::Table(toml::Table::new()));
        node = match entry {
            toml::Value::Table(t) => t,
            _ => {
                return Err(invalid(
                    parts[..=depth].join("."),
                    format!("is not a table (set by {origin})"),
                ))
            }
        };
    }
    node.insert(last.to_string(), value);
    Ok(())
}

/// Parses `KEY=VALUE` flag text.
pub fn parse_override(text: &str) -> Result<(String, String), ConfigError> {
    match text.split_once('=') {
        Some((key, value)) if !key.trim().is_empty() => {
            Ok((key.trim().to_string(), value.to_string()))
        }
        _ => Err(ConfigError::Override {
            text: text.to_string(),
        }),
    }
}

fn socket_addr(key: &str, text: &str) -> Result<SocketAddr, ConfigError> {
    text.to_socket_addrs()
        .ok()
        .and_then(|mut addrs| addrs.next())
        .ok_or_else(|| {
            invalid(
                key,
                format!("must be HOST:PORT (e.g. 127.0.0.1:50051), got `{text}`"),
            )
        })
}

fn in_range(key: &str, value: u64, low: u64, high: u64) -> Result<u64, ConfigError> {
    if (low..=high).contains(&value) {
        Ok(value)
    } else {
        Err(invalid(
            key,
            format!("must be in [{low}, {high}], got {value}"),
        ))
    }
}

fn limits(raw: RawLimits) -> Result<Limits, ConfigError> {
    let RawLimits {
        max_batch_rows,
        max_message_bytes,
        max_concurrent_requests,
        default_deadline_ms,
        max_connections,
        max_streams_per_connection,
    } = raw;
    let usize_of = |v: u64| usize::try_from(v).unwrap_or(usize::MAX);
    Ok(Limits {
        max_batch_rows: usize_of(in_range(
            "limits.max_batch_rows",
            max_batch_rows,
            1,
            1_000_000,
        )?),
        max_message_bytes: usize_of(in_range(
            "limits.max_message_bytes",
            max_message_bytes,
            1024,
            1 << 30,
        )?),
        max_concurrent_requests: usize_of(in_range(
            "limits.max_concurrent_requests",
            max_concurrent_requests,
            1,
            1_000_000,
        )?),
        default_deadline: Duration::from_millis(in_range(
            "limits.default_deadline_ms",
            default_deadline_ms,
            1,
            3_600_000,
        )?),
        max_connections: usize_of(in_range(
            "limits.max_connections",
            max_connections,
            1,
            1_000_000,
        )?),
        max_streams_per_connection: u32::try_from(in_range(
            "limits.max_streams_per_connection",
            max_streams_per_connection,
            1,
            100_000,
        )?)
        .unwrap_or(u32::MAX),
    })
}

fn logging(raw: RawLogging) -> Result<Logging, ConfigError> {
    let RawLogging { format, level } = raw;
    let format = match format.as_str() {
        "text" => LogFormat::Text,
        "json" => LogFormat::Json,
        other => {
            return Err(invalid(
                "logging.format",
                format!("must be `text` or `json`, got `{other}`"),
            ))
        }
    };
    if let Err(e) = tracing_subscriber::EnvFilter::try_new(&level) {
        return Err(invalid(
            "logging.level",
            format!("not a log filter (`{level}`): {e}"),
        ));
    }
    Ok(Logging { format, level })
}

/// The same character rule as model names (`docs/model-format.md`).
fn valid_name(name: &str) -> bool {
    (1..=128).contains(&name.len())
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"._-".contains(&b))
}

fn route(name: &str, raw: RawRoute) -> Result<Route, ConfigError> {
    let key = |k: &str| format!("routes.{name}.{k}");
    if !valid_name(name) {
        return Err(invalid(
            format!("routes.{name}"),
            "route names are 1 to 128 characters of A-Za-z0-9._-",
        ));
    }
    let RawRoute {
        model,
        target_base_rate,
        decision,
        missing_features,
        unknown_categories,
        unknown_features,
        challengers,
        base_rate_from_estimate: _,
        reasons,
        record,
    } = raw;
    let record = match record.as_deref().unwrap_or("after-answer") {
        "after-answer" => RecordMode::AfterAnswer,
        "before-answer" => RecordMode::BeforeAnswer,
        other => {
            return Err(invalid(
                key("record"),
                format!("must be `after-answer` or `before-answer`, got `{other}`"),
            ))
        }
    };
    let reasons = reasons.unwrap_or_default();
    let reasons = crate::serve::explain::reasons_config(
        &key("reasons"),
        reasons.limit,
        reasons.adverse.as_deref(),
    )
    .map_err(|(key, message)| invalid(key, message))?;
    let model = model.ok_or_else(|| {
        invalid(
            key("model"),
            "is required (the model this route serves: NAME, or NAME@VERSION to pin a version)",
        )
    })?;
    let model = crate::serve::model_ref::ModelRef::parse(&model)
        .map_err(|e| invalid(key("model"), e.to_string()))?;
    if let Some(rate) = target_base_rate {
        if !(rate > 0.0 && rate < 1.0) {
            return Err(invalid(
                key("target_base_rate"),
                format!("must be in (0, 1), got {rate}"),
            ));
        }
    }
    let decision = decision
        .map(|d| decision_rule(&key("decision"), d))
        .transpose()?;
    let missing_features = match missing_features.as_deref().unwrap_or("route_as_missing") {
        "route_as_missing" => MissingPolicy::RouteAsMissing,
        "reject" => MissingPolicy::Reject,
        other => {
            return Err(invalid(
                key("missing_features"),
                format!("must be `route_as_missing` or `reject`, got `{other}`"),
            ))
        }
    };
    let unknown_categories = match unknown_categories.as_deref().unwrap_or("route_as_unknown") {
        "route_as_unknown" => UnknownCategoryPolicy::RouteAsUnknown,
        "reject" => UnknownCategoryPolicy::Reject,
        other => {
            return Err(invalid(
                key("unknown_categories"),
                format!("must be `route_as_unknown` or `reject`, got `{other}`"),
            ))
        }
    };
    let unknown_features = match unknown_features.as_deref().unwrap_or("reject") {
        "ignore" => UnknownFeaturePolicy::Ignore,
        "reject" => UnknownFeaturePolicy::Reject,
        other => {
            return Err(invalid(
                key("unknown_features"),
                format!("must be `ignore` or `reject`, got `{other}`"),
            ))
        }
    };
    let challengers = crate::serve::challenger::challengers(name, &model, challengers)
        .map_err(|(key, message)| invalid(key, message))?;
    Ok(Route {
        name: name.to_string(),
        model,
        output: OutputSpec {
            target_base_rate,
            decision,
        },
        missing_features,
        unknown_categories,
        unknown_features,
        challengers,
        reasons,
        record,
    })
}

/// A model name is pinned (`NAME@VERSION`) in every reference of the configuration or in none: a bare name means
/// "the one version loaded" (the registry then loads one version of it at a time), which cannot hold beside a pinned
/// reference that expects several. The first reference that breaks the rule is named with the one it contradicts.
fn pinned_everywhere_or_nowhere(routes: &BTreeMap<String, Route>) -> Result<(), ConfigError> {
    let mut first: BTreeMap<&str, (String, bool)> = BTreeMap::new();
    for (name, route) in routes {
        let refs = std::iter::once((format!("routes.{name}.model"), &route.model)).chain(
            route
                .challengers
                .list
                .iter()
                .enumerate()
                .map(|(i, c)| (format!("routes.{name}.challengers[{i}].model"), &c.model)),
        );
        for (key, model) in refs {
            match first.get(model.name.as_str()) {
                Some((other, pinned)) if *pinned != model.is_pinned() => {
                    return Err(invalid(
                        key,
                        format!(
                            "`{model}` and {other} name model `{}` one with a version and one without; pin the \
                             version (`{}@VERSION`) in every reference to it, or in none",
                            model.name, model.name
                        ),
                    ))
                }
                Some(_) => {}
                None => {
                    first.insert(&model.name, (key, model.is_pinned()));
                }
            }
        }
    }
    Ok(())
}

/// The model names the routes name without a version: the registry serves one version of each at a time.
pub fn single_version_names(
    routes: &BTreeMap<String, Route>,
) -> std::collections::BTreeSet<String> {
    routes
        .values()
        .flat_map(|r| std::iter::once(&r.model).chain(r.challengers.list.iter().map(|c| &c.model)))
        .filter(|m| !m.is_pinned())
        .map(|m| m.name.clone())
        .collect()
}

/// Exactly one form: `threshold`, the cost pair `false_positive` + `false_negative`, or bands `edges` + `labels`.
fn decision_rule(key: &str, raw: RawDecision) -> Result<DecisionRule, ConfigError> {
    let RawDecision {
        threshold,
        false_positive,
        false_negative,
        edges,
        labels,
    } = raw;
    let rule = match (threshold, false_positive, false_negative, edges, labels) {
        (Some(threshold), None, None, None, None) => DecisionRule::Threshold { threshold },
        (None, Some(false_positive), Some(false_negative), None, None) => {
            DecisionRule::Costs { false_positive, false_negative }
        }
        (None, None, None, Some(edges), Some(labels)) => DecisionRule::Bands { edges, labels },
        _ => {
            return Err(invalid(
                key,
                "give exactly one of: threshold; false_positive and false_negative (costs); edges and labels (bands)",
            ))
        }
    };
    rule.validate().map_err(|e| invalid(key, e.to_string()))?;
    Ok(rule)
}

#[cfg(test)]
mod tests;
