//! `probity promote` and `probity route-history`: the admin call that makes a challenger a route's champion on a
//! running server, and the route's promotion history.

use std::path::PathBuf;

use anyhow::Context;
use probity::serve::proto as pb;

/// Arguments of `probity promote`.
#[derive(Debug, clap::Args)]
pub struct PromoteArgs {
    /// The server's gRPC address.
    #[arg(long, default_value = "http://127.0.0.1:50051")]
    pub server: String,
    /// The route.
    #[arg(long)]
    pub route: String,
    /// The challenger model to make champion.
    #[arg(long)]
    pub challenger: String,
    /// A file holding the server's admin token (`server.admin_token_file`).
    #[arg(long, value_name = "FILE")]
    pub token_file: PathBuf,
    /// Who asks (recorded with the change); defaults to the USER environment variable.
    #[arg(long)]
    pub requested_by: Option<String>,
    /// Why (recorded with the change).
    #[arg(long, default_value = "")]
    pub reason: String,
}

/// Arguments of `probity route-history`.
#[derive(Debug, clap::Args)]
pub struct HistoryArgs {
    /// The server's gRPC address.
    #[arg(long, default_value = "http://127.0.0.1:50051")]
    pub server: String,
    /// Only this route.
    #[arg(long, default_value = "")]
    pub route: String,
    /// Print JSON lines instead of the table.
    #[arg(long)]
    pub json: bool,
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")
}

async fn client(
    server: &str,
) -> anyhow::Result<pb::challengers_client::ChallengersClient<tonic::transport::Channel>> {
    let channel = tonic::transport::Channel::from_shared(server.to_string())
        .with_context(|| format!("--server: `{server}` is not a URL"))?
        .connect()
        .await
        .with_context(|| format!("--server: cannot connect to {server}"))?;
    Ok(pb::challengers_client::ChallengersClient::new(channel))
}

fn line(c: &pb::RouteChange) -> String {
    format!(
        "{} route {}: {} -> {} by {} from {}{}",
        c.time_unix_ms,
        c.route,
        c.previous_champion,
        c.new_champion,
        c.requested_by,
        c.peer,
        if c.reason.is_empty() {
            String::new()
        } else {
            format!(" ({})", c.reason)
        }
    )
}

/// Runs `probity promote`.
pub fn run_promote(args: &PromoteArgs) -> anyhow::Result<()> {
    let token = std::fs::read_to_string(&args.token_file)
        .with_context(|| format!("--token-file: reading {}", args.token_file.display()))?;
    let who = args
        .requested_by
        .clone()
        .or_else(|| std::env::var("USER").ok())
        .unwrap_or_default();
    let mut request = tonic::Request::new(pb::PromoteRequest {
        route: args.route.clone(),
        challenger: args.challenger.clone(),
        requested_by: who,
        reason: args.reason.clone(),
    });
    let value = format!("Bearer {}", token.trim())
        .parse()
        .context("--token-file: the token is not valid header text")?;
    request.metadata_mut().insert("authorization", value);
    let answer = runtime()?.block_on(async {
        let mut c = client(&args.server).await?;
        c.promote(request)
            .await
            .map_err(|s| anyhow::anyhow!("{}: {}", s.code(), s.message()))
    })?;
    match answer.into_inner().change {
        Some(c) => println!("promoted: {}", line(&c)),
        None => anyhow::bail!("the server answered without the change"),
    }
    Ok(())
}

/// Runs `probity route-history`.
pub fn run_history(args: &HistoryArgs) -> anyhow::Result<()> {
    let answer = runtime()?.block_on(async {
        let mut c = client(&args.server).await?;
        c.route_history(pb::RouteHistoryRequest {
            route: args.route.clone(),
        })
        .await
        .map_err(|s| anyhow::anyhow!("{}: {}", s.code(), s.message()))
    })?;
    let changes = answer.into_inner().changes;
    if changes.is_empty() && !args.json {
        println!("no promotion recorded");
    }
    for c in &changes {
        if args.json {
            println!(
                "{}",
                serde_json::json!({
                    "time_unix_ms": c.time_unix_ms, "route": c.route,
                    "previous_champion": c.previous_champion, "new_champion": c.new_champion,
                    "requested_by": c.requested_by, "peer": c.peer, "reason": c.reason,
                })
            );
        } else {
            println!("{}", line(c));
        }
    }
    Ok(())
}
