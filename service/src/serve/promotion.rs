//! The live route table and promotion: making a route's challenger its champion, atomically, with a history.
//!
//! Requests read the table through one atomic pointer ([`arc_swap::ArcSwap`]): a request sees either the table
//! before a promotion or the one after, never a mixture, and promotions are serialized by a lock. A promotion swaps
//! the two models' places: the challenger becomes the champion and the old champion takes the challenger's place
//! (same mode and share), so the comparison goes on and can be undone by promoting back.
//!
//! Every promotion is a [`RouteChange`] (time, route, both models, who asked and from where, the reason). With the
//! prediction store on, changes are appended as JSON lines to `route_history.jsonl` in the log directory, flushed
//! before the call returns, and replayed at start, so a promotion survives a restart; a recorded change that no
//! longer fits the configuration (the models were renamed) is skipped with a warning. To make a promotion
//! permanent, write it into the configuration file.

use std::collections::BTreeMap;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use arc_swap::ArcSwap;
use serde::{Deserialize, Serialize};

use crate::serve::challenger::{Challenger, ChallengerMode, Challengers};
use crate::serve::config::Route;

/// The history file's name in the log directory.
pub const HISTORY_FILE: &str = "route_history.jsonl";

/// Routes by name, each behind an `Arc` so that a request keeps its route while a promotion replaces it.
pub type RouteMap = BTreeMap<String, Arc<Route>>;

/// One promotion.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RouteChange {
    /// When, in milliseconds since the Unix epoch.
    pub time_ms: i64,
    /// The route.
    pub route: String,
    /// The champion before.
    pub previous_champion: String,
    /// The champion after (the promoted challenger).
    pub new_champion: String,
    /// Who asked, as the caller stated it.
    pub requested_by: String,
    /// The caller's network address.
    pub peer: String,
    /// Why, as the caller stated it.
    pub reason: String,
}

/// Why a promotion was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PromotionError {
    /// No such route.
    #[error("route `{0}` is not configured")]
    NoRoute(String),
    /// The model is not a challenger of the route.
    #[error("`{model}` is not a challenger of route `{route}` (challengers: {known})")]
    NotAChallenger {
        /// The route.
        route: String,
        /// The model asked for.
        model: String,
        /// The route's challengers.
        known: String,
    },
    /// The history could not be written, so nothing changed.
    #[error("cannot record the promotion in {file}: {error}")]
    History {
        /// The history file.
        file: String,
        /// The I/O error.
        error: String,
    },
}

/// The route with `challenger` as champion and the old champion in the challenger's place.
pub fn swapped(route: &Route, challenger: &str) -> Result<Route, PromotionError> {
    let Some(position) = route
        .challengers
        .list
        .iter()
        .position(|c| c.model == challenger)
    else {
        return Err(PromotionError::NotAChallenger {
            route: route.name.clone(),
            model: challenger.to_string(),
            known: route
                .challengers
                .list
                .iter()
                .map(|c| c.model.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        });
    };
    let mut list = route.challengers.list.clone();
    list[position] = Challenger {
        model: route.model.clone(),
        mode: list[position].mode,
    };
    let plan = probity_models::compare::SharePlan::new(list.iter().filter_map(|c| match c.mode {
        ChallengerMode::Live { share, .. } => Some((c.model.clone(), share)),
        ChallengerMode::Silent => None,
    }))
    // The shares are the validated ones, only the names moved.
    .unwrap_or_else(|_| route.challengers.plan.clone());
    Ok(Route {
        model: challenger.to_string(),
        challengers: Challengers { list, plan },
        ..route.clone()
    })
}

/// The live routes and their promotion history.
pub struct RouteTable {
    current: ArcSwap<RouteMap>,
    history: Mutex<Vec<RouteChange>>,
    history_file: Option<PathBuf>,
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl RouteTable {
    /// The configured routes, without a history file.
    pub fn new(routes: BTreeMap<String, Route>) -> RouteTable {
        RouteTable {
            current: ArcSwap::from_pointee(
                routes.into_iter().map(|(k, v)| (k, Arc::new(v))).collect(),
            ),
            history: Mutex::new(Vec::new()),
            history_file: None,
        }
    }

    /// The same table, recording to `dir/route_history.jsonl` and replaying what is already there.
    pub fn with_history_dir(mut self, dir: &Path) -> RouteTable {
        self.load_history(dir);
        self
    }

    /// Records to `dir/route_history.jsonl` from now on, after replaying what is already there.
    pub fn load_history(&mut self, dir: &Path) {
        let file = dir.join(HISTORY_FILE);
        if let Ok(text) = std::fs::read_to_string(&file) {
            for (n, line) in text
                .lines()
                .enumerate()
                .filter(|(_, l)| !l.trim().is_empty())
            {
                match serde_json::from_str::<RouteChange>(line) {
                    Ok(change) => self.replay(change),
                    Err(error) => {
                        tracing::warn!(file = %file.display(), line = n + 1, %error, "route history line skipped")
                    }
                }
            }
        }
        self.history_file = Some(file);
    }

    fn replay(&mut self, change: RouteChange) {
        let map = self.current.load_full();
        let fits = map
            .get(&change.route)
            .filter(|r| r.model == change.previous_champion)
            .map(|r| swapped(r, &change.new_champion));
        match fits {
            Some(Ok(route)) => {
                let mut next = (*map).clone();
                next.insert(change.route.clone(), Arc::new(route));
                self.current.store(Arc::new(next));
                lock(&self.history).push(change);
            }
            _ => tracing::warn!(route = %change.route, from = %change.previous_champion,
                to = %change.new_champion, "recorded promotion does not fit the configuration; skipped"),
        }
    }

    /// The routes now.
    pub fn load(&self) -> Arc<RouteMap> {
        self.current.load_full()
    }

    /// Makes `challenger` the champion of `route`; the change is recorded before it takes effect.
    pub fn promote(
        &self,
        route: &str,
        challenger: &str,
        requested_by: &str,
        peer: &str,
        reason: &str,
    ) -> Result<RouteChange, PromotionError> {
        // One promotion at a time; readers are never blocked.
        let mut history = lock(&self.history);
        let map = self.current.load_full();
        let old = map
            .get(route)
            .ok_or_else(|| PromotionError::NoRoute(route.to_string()))?;
        let new = swapped(old, challenger)?;
        let change = RouteChange {
            time_ms: crate::store::clock::system_now_ms(),
            route: route.to_string(),
            previous_champion: old.model.clone(),
            new_champion: challenger.to_string(),
            requested_by: requested_by.to_string(),
            peer: peer.to_string(),
            reason: reason.to_string(),
        };
        if let Some(file) = &self.history_file {
            append(file, &change).map_err(|error| PromotionError::History {
                file: file.display().to_string(),
                error: error.to_string(),
            })?;
        }
        let mut next = (*map).clone();
        next.insert(route.to_string(), Arc::new(new));
        self.current.store(Arc::new(next));
        history.push(change.clone());
        tracing::info!(%route, from = %change.previous_champion, to = %change.new_champion,
            requested_by = %change.requested_by, peer = %change.peer, "challenger promoted");
        Ok(change)
    }

    /// Sets the target base rate of `route` (a route applying the live estimate, `serve::base_rate`), swapping the
    /// table atomically; serialized with promotions. False when the route is gone.
    pub fn set_target_base_rate(&self, route: &str, rate: f64) -> bool {
        let _serial = lock(&self.history);
        let map = self.current.load_full();
        let Some(old) = map.get(route) else {
            return false;
        };
        let mut new = (**old).clone();
        new.output.target_base_rate = Some(rate);
        let mut next = (*map).clone();
        next.insert(route.to_string(), Arc::new(new));
        self.current.store(Arc::new(next));
        true
    }

    /// The promotions of `route` (all routes when empty), oldest first.
    pub fn history(&self, route: &str) -> Vec<RouteChange> {
        lock(&self.history)
            .iter()
            .filter(|c| route.is_empty() || c.route == route)
            .cloned()
            .collect()
    }
}

fn append(file: &Path, change: &RouteChange) -> std::io::Result<()> {
    let mut f = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(file)?;
    let line = serde_json::to_string(change).map_err(std::io::Error::other)?;
    writeln!(f, "{line}")?;
    f.sync_data()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::serve::config::{Config, Sources};

    fn routes() -> BTreeMap<String, Route> {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("p.toml");
        std::fs::write(
            &path,
            "[server]\nplaintext = \"loopback\"\n[routes.fraud]\nmodel = \"a\"\n[[routes.fraud.challengers]]\nmodel = \"b\"\nmode = \"live\"\n\
             share = 0.2\npaired = true\n[[routes.fraud.challengers]]\nmodel = \"c\"\nmode = \"silent\"\n",
        )
        .unwrap();
        Config::load(&Sources {
            file: Some(path),
            ..Sources::default()
        })
        .unwrap()
        .routes
    }

    #[test]
    fn promotion_swaps_places_records_and_replays() {
        let dir = tempfile::tempdir().unwrap();
        let table = RouteTable::new(routes()).with_history_dir(dir.path());
        let before = table.load();
        let e = table.promote("fraud", "x", "ops", "peer", "").unwrap_err();
        assert!(matches!(e, PromotionError::NotAChallenger { .. }), "{e}");
        let change = table
            .promote("fraud", "b", "ops-lead", "127.0.0.1:1", "better log-loss")
            .unwrap();
        assert_eq!(
            (
                change.previous_champion.as_str(),
                change.new_champion.as_str()
            ),
            ("a", "b")
        );
        let r = &table.load()["fraud"];
        assert_eq!(r.model, "b");
        assert_eq!(r.challengers.list[0].model, "a");
        assert_eq!(r.challengers.plan.names(), ["a".to_string()]);
        // A request that started before the promotion keeps the old route.
        assert_eq!(before["fraud"].model, "a");
        // A restart replays the history.
        let again = RouteTable::new(routes()).with_history_dir(dir.path());
        assert_eq!(again.load()["fraud"].model, "b");
        assert_eq!(again.history("fraud"), vec![change]);
        assert!(again.history("other").is_empty());
    }
}
