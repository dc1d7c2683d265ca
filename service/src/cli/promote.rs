//! `probity promote`, `probity restore` and `probity route-history`: the admin calls that make a challenger a
//! route's champion on a running server and return a route to its previous champion, and the route's history of
//! both.

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
    /// The challenger to make champion: NAME@VERSION, or NAME when the route has one challenger of that name.
    #[arg(long)]
    pub challenger: String,
    /// Who asks (recorded with the change) [default: the USER, else the LOGNAME environment variable; required
    /// where neither is set, as in containers and service units].
    #[arg(long)]
    pub requested_by: Option<String>,
    /// Promote even when the comparison's verdict is that the champion is better.
    #[arg(long)]
    pub force: bool,
    /// Why (recorded with the change).
    #[arg(long, default_value = "")]
    pub reason: String,
}

/// Arguments of `probity restore`.
#[derive(Debug, clap::Args)]
pub struct RestoreArgs {
    /// The server and the credentials of a caller with the `admin` role.
    #[command(flatten)]
    pub connect: ConnectArgs,
    /// The route to return to the champion it had before its last promotion.
    #[arg(long)]
    pub route: String,
    /// Who asks (recorded with the change) [default: the USER, else the LOGNAME environment variable; required
    /// where neither is set].
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

/// The versions that served, when the route names a model without one (` [versions 3 -> 4]`).
fn versions(c: &pb::RouteChange) -> String {
    let named = c.previous_champion.contains('@') && c.new_champion.contains('@');
    if named || (c.previous_champion_version.is_empty() && c.new_champion_version.is_empty()) {
        return String::new();
    }
    let v = |s: &str| {
        if s.is_empty() {
            "not loaded".to_string()
        } else {
            s.to_string()
        }
    };
    format!(
        " [versions {} -> {}]",
        v(&c.previous_champion_version),
        v(&c.new_champion_version)
    )
}

fn line(c: &pb::RouteChange) -> String {
    format!(
        "{} route {}: {}{} -> {} by {} from {}{}{}",
        super::when::iso(c.time_unix_ms),
        c.route,
        if c.kind == "restore" { "restore " } else { "" },
        c.previous_champion,
        c.new_champion,
        c.requested_by,
        c.peer,
        if c.reason.is_empty() {
            String::new()
        } else {
            format!(" ({})", c.reason)
        },
        versions(c)
    )
}

/// Who asks: the flag, else USER, else LOGNAME; an error naming the flag where none is set.
fn requester(flag: Option<&str>, env: impl Fn(&str) -> Option<String>) -> anyhow::Result<String> {
    flag.map(str::to_string)
        .or_else(|| env("USER"))
        .or_else(|| env("LOGNAME"))
        .filter(|who| !who.trim().is_empty())
        .ok_or_else(|| {
            anyhow::anyhow!("give --requested-by: who asks is recorded with the change, and neither USER nor LOGNAME is set")
        })
}

/// Runs `probity promote`: shows the route's comparison verdict first, and refuses to promote against a verdict
/// that the champion is better unless `--force`.
pub fn run_promote(args: &PromoteArgs) -> anyhow::Result<()> {
    let who = requester(args.requested_by.as_deref(), |k| std::env::var(k).ok())?;
    let rt = runtime()?;
    let changed = rt.block_on(async {
        let mut c = client(&args.connect).await?;
        let compared = c
            .compare(pb::CompareRequest {
                route: args.route.clone(),
                challenger: args.challenger.clone(),
                ..Default::default()
            })
            .await;
        match &compared {
            Ok(answer) => {
                let a = answer.get_ref();
                super::emit(&format!("comparison verdict: {} ({})\n", a.verdict, a.verdict_code))?;
                if a.verdict_code == "champion_better" && !args.force {
                    anyhow::bail!(
                        "not promoted: the comparison says the champion is better; give --force to promote anyway"
                    );
                }
            }
            Err(s) => super::emit(&format!(
                "comparison verdict: unknown ({})\n",
                probity::client::status_text(s)
            ))?,
        }
        c.promote(tonic::Request::new(pb::PromoteRequest {
            route: args.route.clone(),
            challenger: args.challenger.clone(),
            requested_by: who,
            reason: args.reason.clone(),
        }))
        .await
        .map_err(|s| anyhow::anyhow!(probity::client::status_text(&s)))
    })?;
    match changed.into_inner().change {
        Some(c) => super::emit(&format!("promoted: {}\n", line(&c)))?,
        None => anyhow::bail!("the server answered without the change"),
    }
    Ok(())
}

/// Runs `probity restore`.
pub fn run_restore(args: &RestoreArgs) -> anyhow::Result<()> {
    let who = requester(args.requested_by.as_deref(), |k| std::env::var(k).ok())?;
    let changed = runtime()?.block_on(async {
        let mut c = client(&args.connect).await?;
        c.restore(pb::RestoreRequest {
            route: args.route.clone(),
            requested_by: who,
            reason: args.reason.clone(),
        })
        .await
        .map_err(|s| anyhow::anyhow!(probity::client::status_text(&s)))
    })?;
    match changed.into_inner().change {
        Some(c) => super::emit(&format!("restored: {}\n", line(&c)))?,
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
        .map_err(|s| anyhow::anyhow!(probity::client::status_text(&s)))
    })?;
    let changes = answer.into_inner().changes;
    if changes.is_empty() && !args.json {
        super::emit("no promotion or restore recorded\n")?;
    }
    for c in &changes {
        if args.json {
            let json = serde_json::json!({
                "time": super::when::iso(c.time_unix_ms), "time_unix_ms": c.time_unix_ms, "kind": c.kind,
                "route": c.route, "previous_champion": c.previous_champion,
                "previous_champion_version": c.previous_champion_version, "new_champion": c.new_champion,
                "new_champion_version": c.new_champion_version,
                "requested_by": c.requested_by, "peer": c.peer, "reason": c.reason,
            });
            super::emit(&format!("{json}\n"))?;
        } else {
            super::emit(&format!("{}\n", line(c)))?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::requester;

    #[test]
    fn who_asks_falls_back_from_the_flag_to_user_to_logname_then_says_what_to_give() {
        let env = |vars: &'static [(&'static str, &'static str)]| {
            move |k: &str| {
                vars.iter()
                    .find(|(n, _)| *n == k)
                    .map(|(_, v)| v.to_string())
            }
        };
        assert_eq!(
            requester(Some("ana"), env(&[("USER", "u")])).unwrap(),
            "ana"
        );
        assert_eq!(
            requester(None, env(&[("USER", "u"), ("LOGNAME", "l")])).unwrap(),
            "u"
        );
        assert_eq!(requester(None, env(&[("LOGNAME", "l")])).unwrap(), "l");
        let err = requester(None, env(&[])).unwrap_err().to_string();
        assert!(err.contains("--requested-by"), "{err}");
    }
}
