//! Building and running the server: the one function, [`start`], that both `probity serve` and the tests use.
//!
//! Cross-cutting concerns are stacked once, read top to bottom: the per-call timeout (the caller's `grpc-timeout`
//! or the configured default), then a process-wide concurrency limit (further calls wait for a slot within their
//! deadline), then the services with their message size limits.

use std::future::IntoFuture;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use notify::Watcher;
use tokio::net::TcpListener;
use tokio::sync::watch;
use tokio::task::JoinHandle;
use tonic_health::server::HealthReporter;
use tonic_health::ServingStatus;

use crate::serve::config::{Config, Transport};
use crate::serve::error::ServeError;
use crate::serve::grpc::{ModelsApi, ScoringApi};
use crate::serve::metrics;
use crate::serve::outcomes::{sweep_task, OutcomesApi};
use crate::serve::proto as pb;
use crate::serve::registry::{FileReport, Outcome, Registry};
use crate::serve::scoring::Scorer;
use crate::serve::security::config::ClientCertificates;
use crate::serve::security::layer::AccessLayer;
use crate::serve::security::Security;
use crate::store::{Clock, PredictionStore, SqliteStore, Store, StoreError};

/// Why the server did not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    /// The metrics recorder could not be installed.
    #[error("metrics: {0}")]
    Metrics(String),
    /// The model directory could not be read.
    #[error("models.directory: {0}")]
    ModelDirectory(ServeError),
    /// A listener could not be bound.
    #[error("{key}: cannot listen on {addr}: {source}")]
    Bind {
        /// The configuration key of the address.
        key: &'static str,
        /// The address.
        addr: SocketAddr,
        /// The error.
        source: std::io::Error,
    },
    /// The prediction store could not be opened.
    #[error("store.directory: {0}")]
    Log(crate::store::StoreError),
    /// The shared prediction store (PostgreSQL) could not be opened: no URL, the database unreachable, or its
    /// schema newer than this build. The message never holds the password.
    #[error("store.backend = \"postgres\": {0}")]
    SharedStore(String),
    /// The prediction store's directory cannot be written (read-only file system, permissions).
    #[error(
        "store.directory: {0}; the server does not start without the prediction store it is configured to keep: make \
         the directory writable, or leave out store.directory to run without one"
    )]
    StoreNotWritable(crate::store::StoreError),
    /// The reflection service could not be built.
    #[error("reflection: {0}")]
    Reflection(String),
    /// A TLS or token file could not be used.
    #[error("{0}")]
    Security(crate::serve::security::SecurityError),
    /// The model directory could not be watched.
    #[error("models.watch: cannot watch {dir}: {source}")]
    Watch {
        /// The directory.
        dir: PathBuf,
        /// The error.
        source: notify::Error,
    },
}

/// Reloads the registry and keeps health, readiness and route gauges in step with it.
pub struct Reloader {
    registry: Arc<Registry>,
    routes: Vec<(String, crate::serve::model_ref::ModelRef)>,
    health: HealthReporter,
    security: Arc<Security>,
}

impl Reloader {
    /// Reloads the TLS and token files, then the model directory: what SIGHUP and the Reload call do. A bad
    /// certificate, key or token file keeps the previous one (logged, counted), like a bad model file.
    pub async fn reload_all(&self, trigger: &'static str) -> Result<Vec<FileReport>, ServeError> {
        let security = Arc::clone(&self.security);
        let _ = tokio::task::spawn_blocking(move || security.reload(trigger)).await;
        self.reload(trigger).await
    }

    /// Scans the model directory (`trigger` says why, for the log) and updates health.
    pub async fn reload(&self, trigger: &'static str) -> Result<Vec<FileReport>, ServeError> {
        let result = self.registry.reload().await;
        match &result {
            Ok(report) => {
                let count = |o: Outcome| report.iter().filter(|r| r.outcome == o).count();
                tracing::info!(
                    trigger,
                    loaded = count(Outcome::Loaded),
                    unchanged = count(Outcome::Unchanged),
                    failed = count(Outcome::Failed),
                    removed = count(Outcome::Removed),
                    "model directory scanned"
                );
            }
            Err(error) => tracing::warn!(trigger, %error, "model directory scan failed"),
        }
        self.refresh_health().await;
        result
    }

    /// Routes whose model is not loaded.
    pub fn not_ready(&self) -> Vec<String> {
        let snapshot = self.registry.snapshot();
        self.routes
            .iter()
            .filter(|(_, model)| snapshot.find(model).is_none())
            .map(|(r, _)| r.clone())
            .collect()
    }

    async fn refresh_health(&self) {
        let not_ready = self.not_ready();
        for (route, _) in &self.routes {
            metrics::route_ready(route, !not_ready.contains(route));
        }
        // A route's series (per-feature slot counters included) are registered at zero once its model is loaded,
        // before its first row: a counter that first appears with a value loses, to `rate()` and `increase()`,
        // every row counted before the first scrape.
        let snapshot = self.registry.snapshot();
        for (route, model) in &self.routes {
            if let Some(loaded) = snapshot.find(model) {
                metrics::prediction_series(route, &loaded.model);
            }
        }
        let status = if not_ready.is_empty() {
            ServingStatus::Serving
        } else {
            ServingStatus::NotServing
        };
        self.health.set_service_status("", status).await;
        self.health
            .set_service_status("probity.v1.Scoring", status)
            .await;
        self.health
            .set_service_status("probity.v1.Models", ServingStatus::Serving)
            .await;
    }
}

/// A started server.
pub struct RunningServer {
    grpc_addr: SocketAddr,
    metrics_addr: SocketAddr,
    shutdown: watch::Sender<bool>,
    grpc: JoinHandle<Result<(), tonic::transport::Error>>,
    http: JoinHandle<std::io::Result<()>>,
    background: Vec<JoinHandle<()>>,
    watcher: Option<notify::RecommendedWatcher>,
    grace: Duration,
    reloader: Arc<Reloader>,
    log: Option<Arc<PredictionStore>>,
}

impl RunningServer {
    /// The bound gRPC address (the real port when the configuration asked for port 0).
    pub fn grpc_addr(&self) -> SocketAddr {
        self.grpc_addr
    }

    /// The bound monitoring HTTP address.
    pub fn metrics_addr(&self) -> SocketAddr {
        self.metrics_addr
    }

    /// Reloads the TLS and token files and the model directory now, as the Reload call and SIGHUP do.
    pub async fn reload(&self) -> Result<Vec<FileReport>, ServeError> {
        self.reloader.reload_all("api").await
    }

    /// The TLS and token state (to check a reload's outcome).
    pub fn security(&self) -> &Arc<Security> {
        &self.reloader.security
    }

    /// The prediction store, when it is on.
    pub fn store(&self) -> Option<&Arc<PredictionStore>> {
        self.log.as_ref()
    }

    /// Stops accepting, lets in-flight calls finish within the grace period, then closes what is left.
    pub async fn shutdown(self) {
        let RunningServer {
            shutdown,
            mut grpc,
            mut http,
            background,
            watcher,
            grace,
            log,
            ..
        } = self;
        drop(watcher);
        for task in &background {
            task.abort();
        }
        let _ = shutdown.send(true);
        match tokio::time::timeout(grace, &mut grpc).await {
            Ok(Ok(Ok(()))) => tracing::info!("gRPC server drained"),
            Ok(Ok(Err(error))) => tracing::error!(%error, "gRPC server ended with an error"),
            Ok(Err(join)) => tracing::error!(error = %join, "gRPC server task failed"),
            Err(_) => {
                tracing::warn!(
                    grace_ms = grace.as_millis() as u64,
                    "calls still open after the grace period; closing"
                );
                grpc.abort();
            }
        }
        if tokio::time::timeout(Duration::from_secs(1), &mut http)
            .await
            .is_err()
        {
            http.abort();
        }
        // The calls are done: write what the log still has queued.
        if let Some(log) = log {
            if tokio::task::spawn_blocking(move || log.close())
                .await
                .is_err()
            {
                tracing::error!("prediction store writer did not stop cleanly");
            }
        }
    }
}

/// Opens the PostgreSQL prediction store on a thread of its own (the blocking client runs its own small runtime, which
/// cannot start inside this one). A database that does not answer (refused, reset, timed out, shutting down) is tried
/// again for `store.postgres_start_wait`, pausing 0.25 s and then twice as long each time up to 5 s, each failure
/// logged as a warning: replicas and their database often start together. After that, or at once for any other
/// failure (authentication, a missing database, a newer schema), the start stops with an error that says what was
/// tried: a server configured to keep a shared store does not serve without it, and the process supervisor restarts
/// it.
async fn open_shared(
    config: &crate::store::StoreConfig,
) -> Result<crate::store::postgres::PgStore, StartError> {
    use crate::store::postgres::{ConnectionUrl, PgStore};
    let url = ConnectionUrl::load(config.postgres_url_file.as_deref())
        .map_err(StartError::SharedStore)?;
    let target = url.describe();
    let ca = config.postgres_ca_file.clone();
    let wait = config.postgres_start_wait;
    let opening = target.clone();
    let store = tokio::task::spawn_blocking(move || {
        let started = std::time::Instant::now();
        let mut pause = Duration::from_millis(250);
        let mut attempts = 1u32;
        loop {
            let error = match PgStore::open(url.clone(), ca.as_deref(), Clock::system().now_ms()) {
                Ok(store) => return Ok(store),
                Err(error) => error,
            };
            let waited = started.elapsed();
            let left = wait.saturating_sub(waited);
            if !matches!(error, StoreError::Postgres { lost: true, .. }) || left.is_zero() {
                return Err(if wait.is_zero() || attempts == 1 {
                    format!("{opening}: {error}")
                } else {
                    format!(
                        "{opening}: {error} (no answer in {attempts} attempts over {:.1} s; store.postgres_start_wait = {} s)",
                        waited.as_secs_f64(),
                        wait.as_secs_f64()
                    )
                });
            }
            let next = pause.min(left);
            tracing::warn!(
                database = %opening,
                attempt = attempts,
                retry_in_ms = next.as_millis() as u64,
                error = %error,
                "prediction store database does not answer yet; trying again"
            );
            std::thread::sleep(next);
            pause = (pause * 2).min(Duration::from_secs(5));
            attempts += 1;
        }
    })
    .await
    .map_err(|e| StartError::SharedStore(format!("opening thread failed: {e}")))?
    .map_err(StartError::SharedStore)?;
    tracing::info!(database = %target, "prediction store open (PostgreSQL)");
    Ok(store)
}

/// Loads the models, binds both listeners and starts serving.
pub async fn start(config: Config) -> Result<RunningServer, StartError> {
    start_inner(config, None).await
}

/// [`start`] with the prediction store kept in `store` instead of the SQLite file under `store.directory` (the other
/// `[store]` keys apply; `store.directory`, if given, still holds the route history). For another [`Store`]
/// implementation, and for tests that need a store which fails or stalls on purpose.
pub async fn start_with_store(
    config: Config,
    store: Box<dyn Store>,
) -> Result<RunningServer, StartError> {
    start_inner(config, Some(store)).await
}

async fn start_inner(
    config: Config,
    store: Option<Box<dyn Store>>,
) -> Result<RunningServer, StartError> {
    let Config {
        grpc_listen,
        metrics_listen,
        transport,
        reflection,
        shutdown_grace,
        max_connection_age,
        access,
        model_dir,
        watch: watch_dir,
        watch_debounce,
        limits,
        logging: _,
        store: store_config,
        routes,
        base_rate_from_estimate,
    } = config;
    let handle = metrics::install().map_err(StartError::Metrics)?;
    let security = Arc::new(Security::load(&transport, &access).map_err(StartError::Security)?);
    let registry = Arc::new(
        Registry::new(model_dir.clone())
            .with_single_version(crate::serve::config::single_version_names(&routes)),
    );
    let (health, health_service) = tonic_health::server::health_reporter();
    let reloader = Arc::new(Reloader {
        registry: Arc::clone(&registry),
        routes: routes
            .values()
            .map(|r| (r.name.clone(), r.model.clone()))
            .collect(),
        health,
        security: Arc::clone(&security),
    });
    reloader
        .reload("start")
        .await
        .map_err(StartError::ModelDirectory)?;
    for problem in &registry.snapshot().problems {
        tracing::error!(file = %problem.file, error = %problem.error, "model file not loaded at start");
    }
    for route in reloader.not_ready() {
        tracing::error!(%route, "route not ready at start: its model is not loaded");
    }

    let log = match (store, &store_config.directory) {
        (Some(store), _) => Some(PredictionStore::start(
            store,
            store_config.clone(),
            Clock::system(),
        )),
        (None, _) if store_config.backend == crate::store::config::Backend::Postgres => {
            let store = open_shared(&store_config).await?;
            Some(PredictionStore::start(
                Box::new(store),
                store_config.clone(),
                Clock::system(),
            ))
        }
        (None, Some(dir)) => {
            let store =
                SqliteStore::open(dir, store_config.durability).map_err(|error| match error {
                    crate::store::StoreError::NotWritable { .. } => {
                        StartError::StoreNotWritable(error)
                    }
                    other => StartError::Log(other),
                })?;
            tracing::info!(dir = %dir.display(), durability = store_config.durability.as_str(), "prediction store open");
            Some(PredictionStore::start(
                Box::new(store),
                store_config.clone(),
                Clock::system(),
            ))
        }
        (None, None) => None,
    };
    crate::serve::base_rate::publish_configured(&routes);
    let scorer = Arc::new(
        Scorer::new(Arc::clone(&registry), routes, limits)
            .with_store(log.clone())
            .with_route_history(store_config.directory.as_deref())
            .with_silent(),
    );
    let challengers = pb::challengers_server::ChallengersServer::new(
        crate::serve::challengers_api::ChallengersApi::new(Arc::clone(&scorer)),
    );
    let outcomes = pb::outcomes_server::OutcomesServer::new(
        OutcomesApi::new(log.clone()).with_routes(Arc::clone(scorer.route_table())),
    )
    .max_decoding_message_size(limits.max_message_bytes)
    .max_encoding_message_size(limits.max_message_bytes);
    let scoring = pb::scoring_server::ScoringServer::new(ScoringApi::new(
        Arc::clone(&scorer),
        limits.default_deadline,
    ))
    .max_decoding_message_size(limits.max_message_bytes)
    .max_encoding_message_size(limits.max_message_bytes);
    let models = pb::models_server::ModelsServer::new(ModelsApi::new(
        Arc::clone(&scorer),
        Arc::clone(&reloader),
    ))
    .max_decoding_message_size(limits.max_message_bytes)
    .max_encoding_message_size(limits.max_message_bytes);
    let (reflection_v1, reflection_v1alpha) = if reflection {
        let builder = || {
            tonic_reflection::server::Builder::configure()
                .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
                .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        };
        let v1 = builder()
            .build_v1()
            .map_err(|e| StartError::Reflection(e.to_string()))?;
        let v1alpha = builder()
            .build_v1alpha()
            .map_err(|e| StartError::Reflection(e.to_string()))?;
        (Some(v1), Some(v1alpha))
    } else {
        (None, None)
    };

    let grpc_listener =
        TcpListener::bind(grpc_listen)
            .await
            .map_err(|source| StartError::Bind {
                key: "server.grpc_listen",
                addr: grpc_listen,
                source,
            })?;
    let grpc_addr = grpc_listener.local_addr().unwrap_or(grpc_listen);
    let http_listener =
        TcpListener::bind(metrics_listen)
            .await
            .map_err(|source| StartError::Bind {
                key: "server.metrics_listen",
                addr: metrics_listen,
                source,
            })?;
    let metrics_addr = http_listener.local_addr().unwrap_or(metrics_listen);

    let (shutdown, shutdown_rx) = watch::channel(false);
    // The access check is the outermost layer: a refused call never takes a concurrency slot.
    let mut builder = tonic::transport::Server::builder().timeout(limits.default_deadline);
    if let Some(age) = max_connection_age {
        // Past its age a connection gets GOAWAY and closes once its calls in flight have finished. No
        // `max_connection_age_grace`: in tonic 0.14 setting it replaces the GOAWAY by a plain close at age + grace,
        // cutting calls in flight (tests/connections.rs sees the GOAWAY).
        builder = builder.max_connection_age(age);
    }
    builder = builder.max_concurrent_streams(limits.max_streams_per_connection);
    let gate = crate::serve::connections::Gate::new(limits.max_connections);
    let router = builder
        .layer(AccessLayer::new(Arc::clone(&security)))
        .layer(tower::limit::GlobalConcurrencyLimitLayer::new(
            limits.max_concurrent_requests,
        ))
        // Counts and logs what the gRPC layer refuses before a handler runs (crate::serve::refusals).
        .layer(crate::serve::refusals::RefusalLayer)
        .add_service(health_service)
        .add_service(scoring)
        .add_service(models)
        .add_service(outcomes)
        .add_service(challengers)
        .add_optional_service(reflection_v1)
        .add_optional_service(reflection_v1alpha);
    let grpc = match security.tls() {
        None => {
            let incoming =
                crate::serve::connections::plain_incoming(grpc_listener, gate, shutdown_rx.clone());
            tokio::spawn(
                router.serve_with_incoming_shutdown(incoming, stopped(shutdown_rx.clone())),
            )
        }
        Some(tls) => {
            let incoming = crate::serve::security::tls::incoming(
                grpc_listener,
                tls,
                gate,
                shutdown_rx.clone(),
            );
            tokio::spawn(
                router.serve_with_incoming_shutdown(incoming, stopped(shutdown_rx.clone())),
            )
        }
    };

    let ready = Arc::clone(&reloader);
    let app = metrics::http_app(handle, Arc::new(move || ready.not_ready()));
    let http = tokio::spawn(
        axum::serve(http_listener, app)
            .with_graceful_shutdown(stopped(shutdown_rx))
            .into_future(),
    );

    let mut background = vec![hangup_task(Arc::clone(&reloader))];
    if let Some(log) = &log {
        background.push(sweep_task(Arc::clone(log)));
        if !base_rate_from_estimate.is_empty() {
            background.push(crate::serve::base_rate::task(
                Arc::clone(scorer.route_table()),
                Arc::clone(log),
                base_rate_from_estimate,
            ));
        }
        background.push(crate::serve::calibration_metrics::task(
            Arc::clone(&scorer),
            store_config.sweep_interval,
        ));
        if scorer.routes().values().any(|r| !r.challengers.is_empty()) {
            background.push(crate::serve::compare_metrics::task(
                Arc::clone(&scorer),
                store_config.sweep_interval,
            ));
        }
    }
    let watcher = if watch_dir {
        let (watcher, task) = watch_task(model_dir, watch_debounce, Arc::clone(&reloader))?;
        background.push(task);
        Some(watcher)
    } else {
        None
    };
    let transport = match transport {
        Transport::PlaintextLoopback => "plaintext-loopback",
        Transport::Tls(files) => match files.client_certificates {
            ClientCertificates::Off => "tls",
            ClientCertificates::Optional => "tls, client certificates optional",
            ClientCertificates::Required => "mutual tls",
        },
    };
    tracing::info!(%grpc_addr, %metrics_addr, transport, callers = access.callers.len(), "probity serving");
    Ok(RunningServer {
        grpc_addr,
        metrics_addr,
        shutdown,
        grpc,
        http,
        background,
        watcher,
        grace: shutdown_grace,
        reloader,
        log,
    })
}

async fn stopped(mut rx: watch::Receiver<bool>) {
    let _ = rx.wait_for(|stop| *stop).await;
}

/// Reloads on SIGHUP.
fn hangup_task(reloader: Arc<Reloader>) -> JoinHandle<()> {
    tokio::spawn(async move {
        let mut hangup = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup())
        {
            Ok(s) => s,
            Err(error) => {
                tracing::warn!(%error, "cannot listen for SIGHUP; reload by file watch or the Reload call");
                return;
            }
        };
        while hangup.recv().await.is_some() {
            let _ = reloader.reload_all("sighup").await;
        }
    })
}

/// Watches the model directory; a burst of events becomes one reload after `debounce` of quiet.
fn watch_task(
    dir: PathBuf,
    debounce: Duration,
    reloader: Arc<Reloader>,
) -> Result<(notify::RecommendedWatcher, JoinHandle<()>), StartError> {
    let wake = Arc::new(tokio::sync::Notify::new());
    let waker = Arc::clone(&wake);
    let mut watcher =
        notify::recommended_watcher(move |event: notify::Result<notify::Event>| match event {
            // Reads (our own scans among them) must not trigger a scan; a write being closed must.
            Ok(event) => match event.kind {
                notify::EventKind::Access(notify::event::AccessKind::Close(
                    notify::event::AccessMode::Write,
                )) => waker.notify_one(),
                notify::EventKind::Access(_) => {}
                _ => waker.notify_one(),
            },
            Err(error) => tracing::warn!(%error, "model directory watch error"),
        })
        .map_err(|source| StartError::Watch {
            dir: dir.clone(),
            source,
        })?;
    watcher
        .watch(&dir, notify::RecursiveMode::NonRecursive)
        .map_err(|source| StartError::Watch {
            dir: dir.clone(),
            source,
        })?;
    let task = tokio::spawn(async move {
        loop {
            wake.notified().await;
            // Let the burst settle: events during the sleep leave one stored wake-up, consumed here.
            loop {
                tokio::select! {
                    _ = wake.notified() => continue,
                    _ = tokio::time::sleep(debounce) => break,
                }
            }
            let _ = reloader.reload("watch").await;
        }
    });
    Ok((watcher, task))
}
