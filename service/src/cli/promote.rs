//! `probity promote` and `probity route-history`: the admin call that makes a challenger a route's champion on a
//! running server, and the route's promotion history.

use anyhow::Context;
use probity::client::{ConnectArgs, Connection};
use probity::serve::proto as pb;

/// Arguments of `probity promote`.
#[derive(Debug, clap::Args)]
pub struct PromoteArgs {
    /// The server and the credentials of a caller with the `admin` role.
    #[command(flatten)]
    pub connect: ConnectArgs,
    /// The route.
    #[arg(long)]
    pub route: String,
    /// The challenger model to make champion.
    #[arg(long)]
    pub challenger: String,
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
    /// The server and the credentials of a caller with the `report-read` role.
    #[command(flatten)]
    pub connect: ConnectArgs,
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
    connect: &ConnectArgs,
) -> anyhow::Result<pb::challengers_client::ChallengersClient<Connection>> {
    Ok(pb::challengers_client::ChallengersClient::new(
        connect.connect().await?,
    ))
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
    let who = args
        .requested_by
        .clone()
        .or_else(|| std::env::var("USER").ok())
        .unwrap_or_default();
    let request = tonic::Request::new(pb::PromoteRequest {
        route: args.route.clone(),
        challenger: args.challenger.clone(),
        requested_by: who,
        reason: args.reason.clone(),
    });
    let answer = runtime()?.block_on(async {
        let mut c = client(&args.connect).await?;
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
        let mut c = client(&args.connect).await?;
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
