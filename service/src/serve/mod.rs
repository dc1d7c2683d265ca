//! `probity serve`: the gRPC scoring service.
//!
//! - [`config`]: layered, validated configuration (defaults, TOML file, `PROBITY_*` environment, flags);
//! - [`registry`]: the model directory, loaded into atomically swapped snapshots, reloaded by file watch, the
//!   Reload call and SIGHUP;
//! - [`scoring`]: route resolution and scoring; [`conversions`]: every wire/domain conversion;
//! - [`grpc`]: the handlers; [`status`]: the one mapping from [`error::ServeError`] to gRPC status;
//! - [`metrics`]: Prometheus metrics and the monitoring HTTP endpoint;
//! - [`outcomes`]: the prediction store in the server (what a scored row logs, the Outcomes service, the sweeps);
//! - [`security`]: TLS (with certificate reload), callers, roles and the access layer every call passes;
//! - [`server`]: [`server::start`], the one function that builds the server for `main` and the tests
//!   ([`server::start_with_store`] is the same with the prediction store in a given [`crate::store::Store`]).

pub mod base_rate;
pub mod calibration_metrics;
pub mod challenger;
pub mod challengers_api;
pub mod compare_metrics;
pub mod config;
pub mod connections;
pub mod conversions;
pub mod error;
pub mod explain;
pub mod feature_metrics;
pub mod grpc;
pub mod limits;
pub mod metrics;
pub mod model_ref;
pub mod outcomes;
pub mod promotion;
pub mod proto;
pub mod refusals;
pub mod registry;
pub mod scoring;
pub mod security;
pub mod server;
pub mod silent;
pub mod status;

use std::path::PathBuf;

use crate::serve::config::{parse_override, Config, ConfigError, LogFormat, Logging, Sources};
pub use crate::serve::server::{start, start_with_store, RunningServer, StartError};

/// Flags of `probity serve`. Each flag overrides the environment, which overrides the file.
#[derive(Debug, Clone, Default, clap::Args)]
pub struct ServeArgs {
    /// TOML configuration file (default: $PROBITY_CONFIG, else built-in defaults only).
    #[arg(long, short = 'c', value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// gRPC listen address (server.grpc_listen).
    #[arg(long, value_name = "HOST:PORT")]
    pub grpc_listen: Option<String>,
    /// Monitoring HTTP listen address for /metrics, /livez, /readyz (server.metrics_listen).
    #[arg(long, value_name = "HOST:PORT")]
    pub metrics_listen: Option<String>,
    /// Directory of model files (models.directory).
    #[arg(long, value_name = "DIR")]
    pub model_dir: Option<PathBuf>,
    /// `text` or `json` (logging.format).
    #[arg(long, value_name = "FORMAT")]
    pub log_format: Option<String>,
    /// Log filter such as `info` or `probity=debug` (logging.level).
    #[arg(long, value_name = "FILTER")]
    pub log_level: Option<String>,
    /// Any other key, e.g. `--set limits.max_batch_rows=500`; repeatable.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub set: Vec<String>,
}

/// Why `probity serve` stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The configuration was refused.
    #[error("invalid configuration")]
    Config(#[from] ConfigError),
    /// The server did not start.
    #[error("cannot start")]
    Start(#[from] StartError),
    /// The async runtime or a signal handler could not be set up.
    #[error("runtime")]
    Runtime(#[from] std::io::Error),
}

impl ServeArgs {
    /// The configuration sources these flags and the process environment describe.
    pub fn sources(&self) -> Result<Sources, ConfigError> {
        let mut overrides = Vec::new();
        let mut flag = |key: &str, value: Option<String>| {
            if let Some(value) = value {
                overrides.push((key.to_string(), value));
            }
        };
        flag("server.grpc_listen", self.grpc_listen.clone());
        flag("server.metrics_listen", self.metrics_listen.clone());
        flag(
            "models.directory",
            self.model_dir.as_ref().map(|p| p.display().to_string()),
        );
        flag("logging.format", self.log_format.clone());
        flag("logging.level", self.log_level.clone());
        for text in &self.set {
            overrides.push(parse_override(text)?);
        }
        let file = self
            .config
            .clone()
            .or_else(|| std::env::var_os("PROBITY_CONFIG").map(PathBuf::from));
        Ok(Sources {
            file,
            env: std::env::vars().collect(),
            overrides,
        })
    }
}

/// Runs `probity serve` until SIGTERM or SIGINT, then drains and stops.
pub fn run(args: &ServeArgs) -> Result<(), RunError> {
    let config = Config::load(&args.sources()?)?;
    init_logging(&config.logging);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    runtime.block_on(async move {
        let server = start(config).await?;
        wait_for_stop_signal().await?;
        tracing::info!("stop signal received; draining");
        server.shutdown().await;
        tracing::info!("stopped");
        Ok(())
    })
}

/// Sets the process-wide log subscriber (once; later calls are ignored).
pub fn init_logging(logging: &Logging) {
    let filter = tracing_subscriber::EnvFilter::try_new(&logging.level)
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    // Colours only for a person at a terminal: a file, a pipe or a process manager's journal gets plain text.
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .with_writer(std::io::stderr);
    let _ = match logging.format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().flatten_event(true).try_init(),
    };
}

/// Waits for SIGTERM (process managers) or SIGINT (Ctrl-C).
pub async fn wait_for_stop_signal() -> std::io::Result<()> {
    let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
    tokio::select! {
        _ = term.recv() => {}
        result = tokio::signal::ctrl_c() => result?,
    }
    Ok(())
}
