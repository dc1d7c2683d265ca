//! The `[store]` section of the server configuration: where the prediction store lives and how it is written, swept
//! and monitored. With the SQLite backend (the default) and without `store.directory` the log is off and nothing
//! is written; the PostgreSQL backend is always on.
//!
//! ```toml
//! [store]
//! backend = "sqlite"               # or "postgres": one database shared by every replica (DEVELOPERS.md)
//! postgres_url_file = "/run/secrets/probity-store-url"  # postgres: file holding the connection URL; without it
//!                                  # the URL is read from PROBITY_STORE_POSTGRES_URL
//! postgres_ca_file = "/etc/probity/db-ca.pem"  # postgres: CA certificates for TLS (`?sslmode=require`)
//! postgres_start_wait = "30s"      # postgres: how long a starting server waits for a database that does not answer
//! directory = "/var/lib/probity"   # sqlite: predictions.db goes here; both: the route history
//! durability = "normal"            # or "full" (see DEVELOPERS.md, "Prediction store")
//! queue_size = 65536               # predictions waiting for the writer; when full, new ones are dropped and counted
//! batch_size = 1000                # most predictions per transaction
//! flush_interval = "200ms"         # longest a prediction waits in the queue
//! outcome_hold = "1h"              # how long an outcome waits for its prediction
//! retention = "400d"               # predictions older than this are removed
//! sweep_interval = "60s"           # how often maturity, hold and retention are applied
//! psi_window = 10000               # recent predictions per route/model/version in the PSI gauge
//! prior_window = 10000             # recent predictions per route in the base-rate estimate
//! [store.maturity]                   # per route; off unless given
//! fraud = "90d"
//! ```

use std::collections::{BTreeMap, BTreeSet};
use std::path::PathBuf;
use std::time::Duration;

use serde::Deserialize;

use super::sqlite::Durability;

/// The section as written.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawStore {
    backend: Backend,
    postgres_url_file: Option<PathBuf>,
    postgres_ca_file: Option<PathBuf>,
    postgres_start_wait: String,
    directory: Option<PathBuf>,
    durability: String,
    queue_size: u64,
    batch_size: u64,
    flush_interval: String,
    outcome_hold: String,
    retention: String,
    sweep_interval: String,
    psi_window: u64,
    prior_window: u64,
    maturity: BTreeMap<String, String>,
}

impl Default for RawStore {
    fn default() -> Self {
        RawStore {
            backend: Backend::Sqlite,
            postgres_url_file: None,
            postgres_ca_file: None,
            postgres_start_wait: "30s".into(),
            directory: None,
            durability: "normal".into(),
            queue_size: 65_536,
            batch_size: 1_000,
            flush_interval: "200ms".into(),
            outcome_hold: "1h".into(),
            retention: "400d".into(),
            sweep_interval: "60s".into(),
            psi_window: 10_000,
            prior_window: 10_000,
            maturity: BTreeMap::new(),
        }
    }
}

/// Where the prediction store is kept.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Backend {
    /// One SQLite file under `store.directory` per replica.
    #[default]
    Sqlite,
    /// One PostgreSQL database shared by every replica.
    Postgres,
}

/// The validated section.
#[derive(Debug, Clone, PartialEq)]
pub struct StoreConfig {
    /// Where the log is kept.
    pub backend: Backend,
    /// PostgreSQL: the file holding the connection URL (else `PROBITY_STORE_POSTGRES_URL`).
    pub postgres_url_file: Option<PathBuf>,
    /// PostgreSQL: CA certificates for TLS to the database.
    pub postgres_ca_file: Option<PathBuf>,
    /// PostgreSQL: how long a starting server tries again while the database does not answer (connection refused,
    /// reset or timed out), pausing 0.25 s, then twice as long each time up to 5 s; zero stops at the first failure.
    /// Other failures (authentication, a missing database, a newer schema) stop the start at once.
    pub postgres_start_wait: Duration,
    /// The data directory; `None` turns the log off.
    pub directory: Option<PathBuf>,
    /// Disk flush policy.
    pub durability: Durability,
    /// Queue capacity in predictions.
    pub queue_size: usize,
    /// Most predictions per transaction.
    pub batch_size: usize,
    /// Longest wait before a partial batch is written.
    pub flush_interval: Duration,
    /// How long an outcome waits for its prediction before it is counted unmatched.
    pub outcome_hold: Duration,
    /// Age after which predictions are removed.
    pub retention: Duration,
    /// Period of the background sweeps.
    pub sweep_interval: Duration,
    /// Predictions per series in the PSI gauge.
    pub psi_window: usize,
    /// Predictions per route in the base-rate estimate.
    pub prior_window: usize,
    /// Route -> maturity period.
    pub maturity: BTreeMap<String, Duration>,
}

impl Default for StoreConfig {
    fn default() -> Self {
        // The raw defaults always validate.
        StoreConfig::from_raw(RawStore::default(), &BTreeSet::new()).unwrap_or(StoreConfig {
            backend: Backend::Sqlite,
            postgres_url_file: None,
            postgres_ca_file: None,
            postgres_start_wait: Duration::from_secs(30),
            directory: None,
            durability: Durability::Normal,
            queue_size: 65_536,
            batch_size: 1_000,
            flush_interval: Duration::from_millis(200),
            outcome_hold: Duration::from_secs(3600),
            retention: Duration::from_secs(400 * 86_400),
            sweep_interval: Duration::from_secs(60),
            psi_window: 10_000,
            prior_window: 10_000,
            maturity: BTreeMap::new(),
        })
    }
}

/// A refused key: `(dotted key, message)`.
pub type KeyError = (String, String);

fn range(key: &str, v: u64, low: u64, high: u64) -> Result<usize, KeyError> {
    if (low..=high).contains(&v) {
        Ok(usize::try_from(v).unwrap_or(usize::MAX))
    } else {
        Err((key.into(), format!("must be in [{low}, {high}], got {v}")))
    }
}

/// Parses `500ms`, `30s`, `15m`, `12h`, `90d` (a whole number and a unit).
pub fn parse_duration(text: &str) -> Option<Duration> {
    let text = text.trim();
    let split = text.find(|c: char| !c.is_ascii_digit())?;
    let (digits, unit) = text.split_at(split);
    let n: u64 = digits.parse().ok()?;
    let ms = match unit {
        "ms" => 1,
        "s" => 1_000,
        "m" => 60_000,
        "h" => 3_600_000,
        "d" => 86_400_000,
        _ => return None,
    };
    Some(Duration::from_millis(n.checked_mul(ms)?))
}

fn duration(key: &str, text: &str, min: Duration) -> Result<Duration, KeyError> {
    match parse_duration(text) {
        Some(d) if d >= min => Ok(d),
        Some(_) => Err((
            key.into(),
            format!("must be at least {min:?}, got `{text}`"),
        )),
        None => Err((
            key.into(),
            format!(
                "must be a whole number and a unit (ms, s, m, h, d) such as `90d`, got `{text}`"
            ),
        )),
    }
}

impl StoreConfig {
    /// Whether a prediction store is kept at all.
    pub fn enabled(&self) -> bool {
        self.backend == Backend::Postgres || self.directory.is_some()
    }

    /// Validates the section; maturity keys must be configured routes.
    pub fn from_raw(raw: RawStore, routes: &BTreeSet<String>) -> Result<StoreConfig, KeyError> {
        let RawStore {
            backend,
            postgres_url_file,
            postgres_ca_file,
            postgres_start_wait,
            directory,
            durability,
            queue_size,
            batch_size,
            flush_interval,
            outcome_hold,
            retention,
            sweep_interval,
            psi_window,
            prior_window,
            maturity,
        } = raw;
        if directory.as_ref().is_some_and(|d| d.as_os_str().is_empty()) {
            return Err((
                "store.directory".into(),
                "must not be empty (leave it out to turn the log off)".into(),
            ));
        }
        let durability = match durability.as_str() {
            "normal" => Durability::Normal,
            "full" => Durability::Full,
            other => {
                return Err((
                    "store.durability".into(),
                    format!("must be `normal` or `full`, got `{other}`"),
                ))
            }
        };
        let mut by_route = BTreeMap::new();
        for (route, text) in maturity {
            let key = format!("store.maturity.{route}");
            if !routes.contains(&route) {
                return Err((key, "is not a configured route".into()));
            }
            by_route.insert(route, duration(&key, &text, Duration::from_millis(1))?);
        }
        Ok(StoreConfig {
            backend,
            postgres_url_file,
            postgres_ca_file,
            postgres_start_wait: duration(
                "store.postgres_start_wait",
                &postgres_start_wait,
                Duration::ZERO,
            )?,
            directory,
            durability,
            queue_size: range("store.queue_size", queue_size, 1, 100_000_000)?,
            batch_size: range("store.batch_size", batch_size, 1, 1_000_000)?,
            flush_interval: duration(
                "store.flush_interval",
                &flush_interval,
                Duration::from_millis(1),
            )?,
            outcome_hold: duration("store.outcome_hold", &outcome_hold, Duration::ZERO)?,
            retention: duration("store.retention", &retention, Duration::from_secs(1))?,
            sweep_interval: duration(
                "store.sweep_interval",
                &sweep_interval,
                Duration::from_millis(10),
            )?,
            psi_window: range("store.psi_window", psi_window, 1, 10_000_000)?,
            prior_window: range("store.prior_window", prior_window, 1, 10_000_000)?,
            maturity: by_route,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations_and_refusals() {
        assert_eq!(
            parse_duration("90d"),
            Some(Duration::from_secs(90 * 86_400))
        );
        assert_eq!(parse_duration("250ms"), Some(Duration::from_millis(250)));
        assert_eq!(parse_duration("5"), None);
        assert_eq!(parse_duration("d"), None);
        let routes: BTreeSet<String> = ["fraud".to_string()].into();
        let raw = RawStore {
            maturity: [("credit".to_string(), "1d".to_string())].into(),
            ..RawStore::default()
        };
        let (key, _) = StoreConfig::from_raw(raw, &routes).unwrap_err();
        assert_eq!(key, "store.maturity.credit");
        let raw = RawStore {
            durability: "sometimes".into(),
            ..RawStore::default()
        };
        assert_eq!(
            StoreConfig::from_raw(raw, &routes).unwrap_err().0,
            "store.durability"
        );
        assert_eq!(StoreConfig::default().maturity.len(), 0);
    }

    #[test]
    fn backend_words() {
        let parse = |text: &str| toml::from_str::<RawStore>(text);
        let raw = parse("backend = \"postgres\"\npostgres_url_file = \"/run/url\"").unwrap();
        let cfg = StoreConfig::from_raw(raw, &BTreeSet::new()).unwrap();
        assert_eq!(cfg.backend, Backend::Postgres);
        assert!(cfg.enabled(), "the shared log needs no directory");
        assert_eq!(cfg.postgres_url_file, Some(PathBuf::from("/run/url")));
        let cfg = StoreConfig::from_raw(parse("").unwrap(), &BTreeSet::new()).unwrap();
        assert_eq!(cfg.backend, Backend::Sqlite);
        assert!(!cfg.enabled());
        let error = parse("backend = \"mysql\"").unwrap_err().to_string();
        assert!(
            error.contains("sqlite") && error.contains("postgres"),
            "{error}"
        );
    }
}
