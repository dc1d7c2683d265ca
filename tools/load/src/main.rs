//! probity-load: the gRPC load generator of the service benchmark (`tools/bench/service.sh`), and the bare
//! baseline server it is compared with.
//!
//! `probity-load bare --listen ADDR` answers `probity.v1.Scoring/Score` with a fixed response of the same shape
//! as the real server's, doing no work: the cost of tonic, HTTP/2 and protobuf alone.
//!
//! `probity-load run --target ADDR --model FILE --rows FILE ...` sends unary `Score` calls with features by name
//! (the rows of `tools/bench/make_bench_models.py`), from `--concurrency` tasks over `--connections` HTTP/2
//! connections, either as fast as answers come (closed loop) or at `--rate` calls per second (open loop, each
//! task on its own schedule). It prints one JSON line: calls, errors, throughput, latency percentiles and, with
//! `--server-pid`, the server's CPU time per call and its resident memory sampled during the run. With `--ca-file`
//! (and optionally `--client-cert`/`--client-key`, `--token-file`) it calls a TLS server through the same connector
//! as the command-line tools (`probity::client`).
//!
//! `probity-load soak --minutes 10` starts a `probity serve` of its own and runs a sustained mixed load against
//! it (scoring, outcome streams, reloads, reports), failing on any failed request, a stalled p99 or growing
//! memory ([`soak`]).

#![warn(clippy::unwrap_used, clippy::expect_used)]

mod soak;

/// The `probity` binary's allocator (mimalloc), so that the bare server and probity differ only in their work.
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{bail, Context, Result};
use clap::{Parser, Subcommand};
use probity::client::{ConnectArgs, Connection};
use probity::serve::proto as pb;
use probity_models::Model;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Server;
use tonic::{Request, Response, Status};

#[derive(Parser)]
#[command(
    name = "probity-load",
    about = "gRPC load generator and bare baseline server for benchmarks"
)]
struct Args {
    #[command(subcommand)]
    command: Command,
}

// Parsed once at start: the size of the larger variant does not matter.
#[allow(clippy::large_enum_variant)]
#[derive(Subcommand)]
enum Command {
    /// A tonic server answering Score with a fixed response, doing no work.
    Bare {
        #[arg(long, default_value = "127.0.0.1:50061")]
        listen: std::net::SocketAddr,
    },
    /// Sends Score calls and reports throughput and latency.
    Run(RunArgs),
    /// Starts a server and runs a sustained mixed load against it (scoring, outcome streams, reloads, reports).
    Soak(soak::SoakArgs),
    /// Writes one Score request as a gRPC message frame (a zero compression byte, the length as 4 big-endian bytes,
    /// the protobuf bytes): the request body another HTTP/2 load tool (h2load) sends to `/probity.v1.Scoring/Score`.
    Frame {
        /// The model file, for its feature names and categories.
        #[arg(long)]
        model: PathBuf,
        /// Rows: little-endian float64, row-major, one value per model feature; the first row is framed.
        #[arg(long)]
        rows: PathBuf,
        /// Route to call.
        #[arg(long, default_value = "bench")]
        route: String,
        /// Where the frame goes.
        #[arg(long)]
        out: PathBuf,
    },
}

#[derive(clap::Args)]
struct RunArgs {
    /// Server address, e.g. 127.0.0.1:50051.
    #[arg(long)]
    target: String,
    /// Route to call.
    #[arg(long, default_value = "bench")]
    route: String,
    /// The model file, for its feature names and categories.
    #[arg(long)]
    model: PathBuf,
    /// Rows: little-endian float64, row-major, one value per model feature (dense encoding).
    #[arg(long)]
    rows: PathBuf,
    /// Calls in flight at once.
    #[arg(long, default_value_t = 1)]
    concurrency: usize,
    /// HTTP/2 connections the calls are spread over (at most `concurrency`).
    #[arg(long, default_value_t = 4)]
    connections: usize,
    /// Measured seconds.
    #[arg(long, default_value_t = 10.0)]
    duration: f64,
    /// Seconds of calls before measuring.
    #[arg(long, default_value_t = 1.0)]
    warmup: f64,
    /// Calls per second in total (open loop); closed loop when absent.
    #[arg(long)]
    rate: Option<f64>,
    /// The server's process id: report its CPU time per call and sample its resident memory.
    #[arg(long)]
    server_pid: Option<u32>,
    /// Seconds between resident-memory samples.
    #[arg(long, default_value_t = 5.0)]
    sample_every: f64,
    /// A label copied into the output.
    #[arg(long, default_value = "")]
    label: String,
    /// TLS: the CA that signed the server's certificate (the calls then go over https).
    #[arg(long, value_name = "FILE")]
    ca_file: Option<PathBuf>,
    /// Mutual TLS: client certificate (PEM), with --client-key.
    #[arg(
        long,
        value_name = "FILE",
        requires = "client_key",
        requires = "ca_file"
    )]
    client_cert: Option<PathBuf>,
    /// Mutual TLS: the client certificate's private key (PEM).
    #[arg(long, value_name = "FILE", requires = "client_cert")]
    client_key: Option<PathBuf>,
    /// A file holding the bearer token of a caller with the `score` role.
    #[arg(long, value_name = "FILE")]
    token_file: Option<PathBuf>,
    /// The name the server's certificate is verified against, when not the host of --target.
    #[arg(long, value_name = "NAME", requires = "ca_file")]
    tls_server_name: Option<String>,
}

fn main() -> Result<std::process::ExitCode> {
    let args = Args::parse();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()?;
    match args.command {
        Command::Bare { listen } => runtime.block_on(bare(listen))?,
        Command::Frame {
            model,
            rows,
            route,
            out,
        } => {
            let request = requests(&model, &rows, &route)?
                .into_iter()
                .next()
                .context("no rows")?;
            let body = prost::Message::encode_to_vec(&request);
            let mut frame = Vec::with_capacity(5 + body.len());
            frame.push(0);
            frame.extend_from_slice(&u32::try_from(body.len())?.to_be_bytes());
            frame.extend_from_slice(&body);
            std::fs::write(&out, frame).with_context(|| format!("writing {}", out.display()))?;
        }
        Command::Run(run_args) => runtime.block_on(run(run_args))?,
        Command::Soak(soak_args) => {
            if !runtime.block_on(soak::soak(soak_args))? {
                return Ok(std::process::ExitCode::FAILURE);
            }
        }
    }
    Ok(std::process::ExitCode::SUCCESS)
}

// ------------------------------------------------------------------------------------------------ bare server

struct Bare;

#[tonic::async_trait]
impl pb::scoring_server::Scoring for Bare {
    async fn score(
        &self,
        request: Request<pb::ScoreRequest>,
    ) -> Result<Response<pb::ScoreResponse>, Status> {
        let request = request.into_inner();
        let prediction_id = request
            .row
            .map(|r| r.prediction_id)
            .filter(|id| !id.is_empty())
            .unwrap_or_else(|| "0190f5c2-7a1b-7c3d-9e4f-0123456789ab".to_string());
        // The same fields the real server fills, with fixed values.
        Ok(Response::new(pb::ScoreResponse {
            prediction_id,
            route: request.route,
            model: "bare".into(),
            model_version: "1".into(),
            margin: -1.25,
            log_odds: -1.25,
            calibrated_log_odds: -1.25,
            adjusted_log_odds: -1.25,
            probability: 0.2227,
            score: None,
            decision: None,
            warnings: Vec::new(),
            role: "champion".into(),
            explanation: None,
        }))
    }

    async fn score_batch(
        &self,
        _request: Request<pb::ScoreBatchRequest>,
    ) -> Result<Response<pb::ScoreBatchResponse>, Status> {
        Err(Status::unimplemented("the bare server answers Score only"))
    }

    type ScoreStreamStream = std::pin::Pin<
        Box<dyn tokio_stream::Stream<Item = Result<pb::ScoreStreamResponse, Status>> + Send>,
    >;

    async fn score_stream(
        &self,
        _request: Request<tonic::Streaming<pb::ScoreRequest>>,
    ) -> Result<Response<Self::ScoreStreamStream>, Status> {
        Err(Status::unimplemented("the bare server answers Score only"))
    }
}

async fn bare(listen: std::net::SocketAddr) -> Result<()> {
    eprintln!("bare scoring server on {listen}");
    // Bound and configured as `probity serve` does (TCP_NODELAY on), so the baseline differs only in the work.
    let listener = tokio::net::TcpListener::bind(listen).await?;
    let incoming = tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true));
    Server::builder()
        .add_service(pb::scoring_server::ScoringServer::new(Bare))
        .serve_with_incoming_shutdown(incoming, async {
            let _ = tokio::signal::ctrl_c().await;
        })
        .await?;
    Ok(())
}

// --------------------------------------------------------------------------------------------- load generator

/// Requests with features by name, one per row.
fn requests(model: &Path, rows: &Path, route: &str) -> Result<Vec<pb::ScoreRequest>> {
    let text =
        std::fs::read_to_string(model).with_context(|| format!("reading {}", model.display()))?;
    let model_path = model;
    let model = Model::from_json_str(&text).with_context(|| model_path.display().to_string())?;
    let bytes = std::fs::read(rows).with_context(|| format!("reading {}", rows.display()))?;
    let width = model.schema().len();
    let values: Vec<f64> = bytes
        .chunks_exact(8)
        .map(|b| f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]]))
        .collect();
    if width == 0 || values.is_empty() || !values.len().is_multiple_of(width) {
        bail!(
            "{}: {} values are not rows of {width}",
            rows.display(),
            values.len()
        );
    }
    let features = model.schema().features();
    let mut out = Vec::new();
    for row in values.chunks_exact(width).take(2000) {
        let mut named = HashMap::with_capacity(width);
        for (f, &x) in features.iter().zip(row) {
            if x.is_nan() {
                continue; // absent means missing
            }
            let kind = if f.is_categorical() {
                let cats = f.categories();
                pb::feature_value::Kind::Category(cats.get(x as usize).cloned().unwrap_or_default())
            } else {
                pb::feature_value::Kind::Number(x)
            };
            named.insert(f.name.clone(), pb::FeatureValue { kind: Some(kind) });
        }
        out.push(pb::ScoreRequest {
            explain: 0,
            route: route.to_string(),
            row: Some(pb::Row {
                features: Some(pb::row::Features::Named(pb::NamedFeatures {
                    values: named,
                })),
                ..Default::default()
            }),
        });
    }
    Ok(out)
}

/// User plus system CPU seconds of a process, from `/proc/PID/stat` (proc(5), fields 14 and 15, in clock ticks
/// of 1/100 s on Linux).
fn cpu_seconds(pid: u32) -> Option<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    let after = stat.rsplit_once(')')?.1;
    let fields: Vec<&str> = after.split_whitespace().collect();
    let utime: f64 = fields.get(11)?.parse().ok()?;
    let stime: f64 = fields.get(12)?.parse().ok()?;
    Some((utime + stime) / 100.0)
}

/// Resident set size in KiB, from `/proc/PID/status` (`VmRSS`).
fn rss_kib(pid: u32) -> Option<u64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = status.lines().find(|l| l.starts_with("VmRSS:"))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

struct TaskResult {
    latencies_us: Vec<u32>,
    errors: u64,
    first_error: Option<String>,
}

async fn worker(
    mut client: pb::scoring_client::ScoringClient<Connection>,
    requests: Arc<Vec<pb::ScoreRequest>>,
    start_at: usize,
    measure_from: Instant,
    stop_at: Instant,
    interval: Option<Duration>,
) -> TaskResult {
    let mut result = TaskResult {
        latencies_us: Vec::with_capacity(1 << 16),
        errors: 0,
        first_error: None,
    };
    let mut k = start_at;
    let mut next = Instant::now();
    loop {
        if interval.is_some() {
            // Open loop: the latency counts from the scheduled send time, so a stalled server cannot hide its
            // queueing (no coordinated omission).
            tokio::time::sleep_until(next.into()).await;
        }
        let sent = if interval.is_some() {
            next
        } else {
            Instant::now()
        };
        if sent >= stop_at {
            break;
        }
        let request = requests[k % requests.len()].clone();
        k += 1;
        let answer = client.score(request).await;
        let done = Instant::now();
        if sent >= measure_from {
            match answer {
                Ok(_) => result
                    .latencies_us
                    .push(done.duration_since(sent).as_micros().min(u32::MAX as u128) as u32),
                Err(status) => {
                    result.errors += 1;
                    if result.first_error.is_none() {
                        result.first_error = Some(status.to_string());
                    }
                }
            }
        }
        if let Some(every) = interval {
            next += every;
        }
    }
    result
}

fn percentile(sorted: &[u32], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i] as f64
}

async fn run(args: RunArgs) -> Result<()> {
    let requests = Arc::new(requests(&args.model, &args.rows, &args.route)?);
    let concurrency = args.concurrency.max(1);
    let connections = args.connections.clamp(1, concurrency);
    let scheme = if args.ca_file.is_some() {
        "https"
    } else {
        "http"
    };
    let (endpoint, token) = ConnectArgs {
        server: format!("{scheme}://{}", args.target),
        ca_file: args.ca_file.clone(),
        client_cert: args.client_cert.clone(),
        client_key: args.client_key.clone(),
        token_file: args.token_file.clone(),
        tls_server_name: args.tls_server_name.clone(),
    }
    .endpoint()?;
    let mut channels = Vec::with_capacity(connections);
    for _ in 0..connections {
        let channel = endpoint
            .clone()
            .tcp_nodelay(true)
            .connect()
            .await
            .with_context(|| format!("connecting to {}", args.target))?;
        channels.push(InterceptedService::new(channel, token.clone()));
    }
    let start = Instant::now();
    let measure_from = start + Duration::from_secs_f64(args.warmup);
    let stop_at = measure_from + Duration::from_secs_f64(args.duration);
    let interval = args
        .rate
        .map(|r| Duration::from_secs_f64(concurrency as f64 / r.max(1e-3)));
    let mut tasks = Vec::with_capacity(concurrency);
    for t in 0..concurrency {
        let client = pb::scoring_client::ScoringClient::new(channels[t % connections].clone());
        tasks.push(tokio::spawn(worker(
            client,
            Arc::clone(&requests),
            t * 131,
            measure_from,
            stop_at,
            interval,
        )));
    }
    // CPU and memory of the server over the measured window.
    let pid = args.server_pid;
    let sampler = tokio::spawn(async move {
        tokio::time::sleep_until(measure_from.into()).await;
        let cpu0 = pid.and_then(cpu_seconds);
        let mut rss = Vec::new();
        let every = Duration::from_secs_f64(args.sample_every.max(0.1));
        let mut next = measure_from;
        while next < stop_at {
            if let Some(kib) = pid.and_then(rss_kib) {
                rss.push(kib);
            }
            next += every;
            tokio::time::sleep_until(next.min(stop_at).into()).await;
        }
        let cpu1 = pid.and_then(cpu_seconds);
        if let Some(kib) = pid.and_then(rss_kib) {
            rss.push(kib);
        }
        (cpu0.zip(cpu1).map(|(a, b)| b - a), rss)
    });
    let mut latencies = Vec::new();
    let mut errors = 0;
    let mut first_error = None;
    for task in tasks {
        let r = task.await?;
        latencies.extend(r.latencies_us);
        errors += r.errors;
        first_error = first_error.or(r.first_error);
    }
    let (server_cpu, rss) = sampler.await?;
    latencies.sort_unstable();
    let calls = latencies.len() as f64;
    let out = serde_json::json!({
        "label": args.label,
        "target": args.target,
        "concurrency": concurrency,
        "connections": connections,
        "rate": args.rate,
        "seconds": args.duration,
        "calls": latencies.len(),
        "errors": errors,
        "first_error": first_error,
        "calls_per_s": calls / args.duration,
        "p50_us": percentile(&latencies, 0.50),
        "p90_us": percentile(&latencies, 0.90),
        "p99_us": percentile(&latencies, 0.99),
        "max_us": latencies.last().copied(),
        "server_cpu_s": server_cpu,
        "server_cpu_us_per_call": server_cpu.map(|c| c * 1e6 / calls.max(1.0)),
        "server_rss_kib": rss,
    });
    println!("{out}");
    Ok(())
}
