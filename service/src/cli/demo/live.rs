//! The live demo: the real server on loopback with the demo models, the traffic run, the summary, then serving
//! until Ctrl-C or SIGTERM (or straight to a graceful stop with `--exit-after-run`).
//!
//! The server is configured like any other: the models are written into a temporary model directory and a TOML
//! configuration beside it names the routes, each with the demo data's live base rate as its target (the same
//! target the offline demo uses, so both give the same bits), turns the prediction store on, and scores with the second
//! model as a challenger on the first model's route. After the traffic, the fraud labels go back as outcomes and
//! the report and comparison come from the server.

use std::path::{Path, PathBuf};

use anyhow::Context;
use probity::serve::config::{Config, Sources};
use probity_models::Model;

use super::loop_report;
use super::offline::write_scored;
use super::outcomes;
use super::summary::{self, TITLE};
use super::traffic::{self, Plan, Target};
use super::{DemoArgs, DemoData, DemoModel, DemoRun, CAUTIONS};

/// The file name of the configuration the demo writes.
const CONFIG_FILE: &str = "probity-demo.toml";

/// Runs the live demo.
pub fn run(args: &DemoArgs, data: &DemoData, models: Vec<DemoModel>) -> anyhow::Result<()> {
    let dir = DemoDir::create()?;
    let log_dir = args.data_dir.clone().unwrap_or_else(|| dir.0.join("store"));
    std::fs::create_dir_all(&log_dir)
        .with_context(|| format!("cannot create {}", log_dir.display()))?;
    let config = write_config(args, data, &models, &dir.0, &log_dir)?;
    probity::serve::init_logging(&config.logging);
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    let result = runtime.block_on(serve_and_drive(
        args, data, &models, config, &dir.0, &log_dir,
    ));
    drop(dir);
    result
}

async fn serve_and_drive(
    args: &DemoArgs,
    data: &DemoData,
    models: &[DemoModel],
    config: Config,
    dir: &Path,
    log_dir: &Path,
) -> anyhow::Result<()> {
    let server = probity::serve::start(config)
        .await
        .context("cannot start the demo server")?;
    let (grpc, metrics) = (server.grpc_addr(), server.metrics_addr());
    println!("{TITLE}");
    println!("gRPC server    {grpc} (reflection on)");
    println!("metrics        http://{metrics}/metrics");
    for m in models {
        println!(
            "route {:<20} -> {} {}, target base rate {}",
            m.route,
            m.model.name(),
            m.model.version(),
            data.live_base_rate
        );
    }
    if let [champion, challenger, ..] = models {
        println!(
            "  challenger on {}: {} {}, silent (scores every request off the answer path; the answer stays the \
             champion's)",
            champion.route,
            challenger.model.name(),
            challenger.model.version()
        );
    }
    println!("prediction store {}", log_dir.display());
    print!("{}", summary::data_section(data));
    println!(
        "\nsending every transaction to every route over {} gRPC connections ({} calls in flight): ScoreBatch \
         calls of {} rows, one block in five as unary Score calls",
        args.connections,
        usize::from(args.connections) * usize::from(args.calls_per_connection),
        args.batch_rows
    );
    let targets: Vec<Target<'_>> = models
        .iter()
        .map(|m| Target {
            route: &m.route,
            model: &m.model,
        })
        .collect();
    let plan = Plan {
        connections: args.connections.into(),
        calls_per_connection: args.calls_per_connection.into(),
        batch_rows: args.batch_rows.into(),
    };
    let traffic_start_ms = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX));
    let traffic = match traffic::drive(grpc, data, &targets, plan).await {
        Ok(t) => t,
        Err(e) => {
            server.shutdown().await;
            return Err(e.context("the demo traffic run stopped"));
        }
    };
    print!("{}", summary::traffic_section(&traffic));

    let runs: Option<Vec<DemoRun>> = traffic
        .results
        .iter()
        .map(|answers| run_of(data, answers))
        .collect();
    let model_refs: Vec<&Model> = models.iter().map(|m| &m.model).collect();
    match &runs {
        Some(runs) => {
            for (model, run) in model_refs.iter().zip(runs) {
                print!("{}", summary::model_section(model, run, data));
                print!("{}", summary::reasons_section(model, run, data));
            }
            print!("{}", summary::yardstick(data));
            if let Some(path) = &args.write_scored {
                write_scored(path, data, &model_refs, runs)?;
                println!("scored transactions written to {}", path.display());
            }
        }
        None => println!("\nsome rows have no answer, so no model figures are shown"),
    }
    let pictures = match close_the_loop(args, data, models, grpc, log_dir, traffic_start_ms).await {
        Ok(p) => p,
        Err(e) => {
            server.shutdown().await;
            return Err(e.context("the demo's outcome loop stopped"));
        }
    };
    // Only what still exists after the run: with --exit-after-run the server stops and a temporary folder goes.
    let serving = !args.exit_after_run;
    let kept = args.data_dir.is_some();
    println!("\nwhere to look next");
    if serving {
        println!("  metrics   http://{metrics}/metrics (Prometheus text format); /livez and /readyz beside it");
        println!(
            "  gRPC      {grpc}: any gRPC client; server reflection is on (probity.v1.Scoring, probity.v1.Models, \
             probity.v1.Outcomes, probity.v1.Challengers, grpc.health.v1.Health)"
        );
    }
    if serving || kept {
        println!(
            "  models    {}{}",
            dir.join("models").display(),
            if serving {
                ": a new model file version here is served without a restart"
            } else {
                ""
            }
        );
        println!("  config    {}", dir.join(CONFIG_FILE).display());
        println!(
            "  store     probity report --store {0} (add --json), probity compare --store {0} --route {1}{2}",
            log_dir.display(),
            models.first().map_or("", |m| m.route.as_str()),
            if kept {
                ""
            } else {
                " (a temporary folder, removed when the demo stops; --data-dir keeps it)"
            }
        );
    }
    if !pictures.is_empty() {
        println!(
            "  pictures  {} SVG files in {}",
            pictures.len(),
            args.svg_dir.display()
        );
    }
    if !serving && !kept {
        println!("  (the server has stopped and its temporary folder is removed; --data-dir keeps the store)");
    }
    println!("\n{CAUTIONS}");

    if traffic.failed_calls > 0 {
        server.shutdown().await;
        anyhow::bail!(
            "{} of {} calls failed",
            traffic.failed_calls,
            traffic.unary.calls + traffic.batch.calls
        );
    }
    if !args.exit_after_run {
        eprintln!("serving on {grpc} until Ctrl-C or SIGTERM");
        probity::serve::wait_for_stop_signal()
            .await
            .context("cannot wait for a stop signal")?;
        eprintln!("stopping: draining calls in flight");
    }
    server.shutdown().await;
    Ok(())
}

/// Sends the labels back as outcomes, prints the server's report and the comparison, writes the pictures; returns
/// the picture files.
async fn close_the_loop(
    args: &DemoArgs,
    data: &DemoData,
    models: &[DemoModel],
    grpc: std::net::SocketAddr,
    log_dir: &Path,
    traffic_start_ms: i64,
) -> anyhow::Result<Vec<PathBuf>> {
    let channel = tonic::transport::Endpoint::from_shared(format!("http://{grpc}"))
        .context("demo server address")?
        .connect()
        .await
        .with_context(|| format!("cannot connect to the demo server at {grpc}"))?;
    let routes: Vec<&str> = models.iter().map(|m| m.route.as_str()).collect();
    let (list, not_yet) = outcomes::schedule(data, &routes, traffic_start_ms);
    let transactions = list.len() / routes.len().max(1);
    let sent = outcomes::send(channel.clone(), list, transactions, not_yet).await?;
    print!("{}", loop_report::outcomes_section(&sent));

    let rows = data.labels.len() as u64;
    let mut expected: Vec<(String, String, u64)> = models
        .iter()
        .map(|m| (m.route.clone(), "champion".to_string(), rows))
        .collect();
    let has_challenger = models.len() > 1;
    let route = routes.first().copied().unwrap_or_default();
    if has_challenger {
        expected.push((route.to_string(), "challenger".to_string(), rows));
    }
    let (report, complete) = outcomes::settled_report(
        channel.clone(),
        &expected,
        std::time::Duration::from_secs(60),
    )
    .await?;
    print!("{}", loop_report::report_section(&report, route, complete));
    if has_challenger {
        print!("{}", loop_report::compare_section(channel, route).await?);
    }
    let written = loop_report::write_svgs(log_dir, &args.svg_dir, route, has_challenger)?;
    println!(
        "
pictures written to {}:",
        args.svg_dir.display()
    );
    for path in &written {
        if let Some(name) = path.file_name() {
            println!("  {}", name.to_string_lossy());
        }
    }
    Ok(written)
}

/// One route's answers as a [`DemoRun`], when every row has one.
fn run_of(data: &DemoData, answers: &[Option<probity_models::Scored>]) -> Option<DemoRun> {
    let spec = data.spec();
    let mut run = DemoRun {
        spec: spec.clone(),
        fields: Vec::with_capacity(answers.len()),
        probabilities: Vec::with_capacity(answers.len()),
        log_odds: Vec::with_capacity(answers.len()),
        seconds: None,
    };
    let mut buf = String::new();
    for answer in answers {
        let s = answer.as_ref()?;
        run.probabilities.push(s.probability);
        run.log_odds.push(s.adjusted_log_odds);
        let mut record = csv::StringRecord::new();
        crate::cli::score::push_scores(
            &mut record,
            s,
            &spec,
            crate::cli::score::Precision::Full,
            &mut buf,
        );
        run.fields.push(record);
    }
    Some(run)
}

/// Writes the models and the configuration into `dir` and loads the configuration as `probity serve` would.
fn write_config(
    args: &DemoArgs,
    data: &DemoData,
    models: &[DemoModel],
    dir: &Path,
    log_dir: &Path,
) -> anyhow::Result<Config> {
    let model_dir = dir.join("models");
    std::fs::create_dir(&model_dir)
        .with_context(|| format!("cannot create {}", model_dir.display()))?;
    let mut routes = toml::Table::new();
    for (i, m) in models.iter().enumerate() {
        let file = model_dir.join(format!("{i:02}-{}.json", m.model.name()));
        std::fs::write(&file, &m.bytes)
            .with_context(|| format!("cannot write {}", file.display()))?;
        let mut route = toml::Table::new();
        route.insert("model".into(), m.model.name().into());
        route.insert("target_base_rate".into(), data.live_base_rate.into());
        if let (0, Some(challenger)) = (i, models.get(1)) {
            let mut c = toml::Table::new();
            c.insert("model".into(), challenger.model.name().into());
            c.insert("mode".into(), "silent".into());
            route.insert("challengers".into(), toml::Value::Array(vec![c.into()]));
        }
        routes.insert(m.route.clone(), route.into());
    }
    let text = format!(
        "# Written by `probity demo`; `probity serve --config {CONFIG_FILE}` serves the same routes.\n\
         [server]\n# Plain text on loopback: the demo's client and server share this machine.\n\
         plaintext = \"loopback\"\ngrpc_listen = {}\nmetrics_listen = {}\nreflection = true\nshutdown_grace_ms = 5000\n\n\
         [models]\ndirectory = {}\n\n[logging]\nlevel = \"warn\"\n\n\
         [limits]\n# The outcome stream stays open while every outcome is sent.\ndefault_deadline_ms = 120000\n\n\
         [store]\ndirectory = {}\nflush_interval = \"50ms\"\n\n{}",
        toml::Value::from(args.grpc_listen.as_str()),
        toml::Value::from(args.metrics_listen.as_str()),
        toml::Value::from(model_dir.display().to_string()),
        toml::Value::from(log_dir.display().to_string()),
        toml::to_string(&toml::Table::from_iter([(
            "routes".to_string(),
            toml::Value::from(routes)
        )]))
        .context("cannot write the demo configuration")?
    );
    let path = dir.join(CONFIG_FILE);
    std::fs::write(&path, text).with_context(|| format!("cannot write {}", path.display()))?;
    Config::load(&Sources {
        file: Some(path),
        env: Vec::new(),
        overrides: Vec::new(),
    })
    .context("the demo configuration was refused")
}

/// A fresh directory under the system's temporary directory, removed when dropped.
struct DemoDir(PathBuf);

impl DemoDir {
    fn create() -> anyhow::Result<DemoDir> {
        let base = std::env::temp_dir();
        for attempt in 0..100u32 {
            let path = base.join(format!("probity-demo-{}-{attempt}", std::process::id()));
            match std::fs::create_dir(&path) {
                Ok(()) => return Ok(DemoDir(path)),
                Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
                Err(e) => {
                    return Err(e).with_context(|| format!("cannot create {}", path.display()))
                }
            }
        }
        anyhow::bail!("cannot create a demo directory under {}", base.display())
    }
}

impl Drop for DemoDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}
