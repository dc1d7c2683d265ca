//! The live route table and promotion: making a route's challenger its champion, atomically, with a history.
//!
//! Requests read the table through one atomic pointer ([`arc_swap::ArcSwap`]): a request sees either the table
//! before a promotion or the one after, never a mixture, and promotions are serialized by a lock. A promotion swaps
//! the two models' places: the challenger becomes the champion and the old champion takes the challenger's place
//! (same mode and share), so the comparison goes on and can be undone by promoting back.
//!
//! A restore ([`RouteTable::restore`]) returns a route to its previous champion: the champion before the last
//! promotion still standing. Each restore undoes one promotion, so after promotions A -> B -> C two restores lead
//! back to B, then A, and a third is refused (no earlier champion). A restore is the same swap as a promotion (the
//! earlier champion is the challenger the promotion left in its place), refused when that model is not loaded.
//!
//! Every promotion and restore is a [`RouteChange`] (time, kind, route, both models as the route names them with the
//! versions serving then, who asked and from where, the reason). With the prediction store on, changes are appended
//! as JSON lines to `route_history.jsonl` in the log directory, flushed before the call returns, and replayed at
//! start, so a change survives a restart; a recorded change that no longer fits the configuration (the models were
//! renamed) is skipped with a warning. To make a change permanent, write it into the configuration file.

use std::collections::BTreeMap;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};

use arc_swap::ArcSwap;
use serde::{Deserialize, Serialize};

use crate::serve::challenger::{Challenger, ChallengerMode, Challengers};
use crate::serve::config::Route;
use crate::serve::model_ref::ModelRef;

/// The history file's name in the log directory.
pub const HISTORY_FILE: &str = "route_history.jsonl";

/// Routes by name, each behind an `Arc` so that a request keeps its route while a promotion replaces it.
pub type RouteMap = BTreeMap<String, Arc<Route>>;

/// The kind of a change: `promotion` (a challenger made champion) or `restore` (the previous champion back).
pub const PROMOTION: &str = "promotion";
/// See [`PROMOTION`].
pub const RESTORE: &str = "restore";

fn promotion_kind() -> String {
    PROMOTION.to_string()
}

/// One promotion or restore.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RouteChange {
    /// When, in milliseconds since the Unix epoch.
    pub time_ms: i64,
    /// `promotion` or `restore` (lines written before restores existed are promotions).
    #[serde(default = "promotion_kind")]
    pub kind: String,
    /// The route.
    pub route: String,
    /// The champion before, as the route named it (`NAME` or `NAME@VERSION`).
    pub previous_champion: String,
    /// The version of it serving then (empty when it was not loaded, and in lines of earlier releases).
    #[serde(default)]
    pub previous_version: String,
    /// The champion after, as the route names it.
    pub new_champion: String,
    /// The version of it serving then (empty as above).
    #[serde(default)]
    pub new_version: String,
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
    /// The challenger named is not a model reference.
    #[error("challenger: {0}")]
    BadModel(String),
    /// A restore found no earlier champion in the route history.
    #[error("route `{0}` has no earlier champion in the route history: nothing to restore")]
    NoEarlierChampion(String),
    /// The earlier champion is no longer on the route (the configuration changed since).
    #[error("route `{route}`: the earlier champion `{model}` is no longer a challenger of the route, so it cannot be restored")]
    NotOnRoute {
        /// The route.
        route: String,
        /// The earlier champion.
        model: String,
    },
    /// The earlier champion is not loaded.
    #[error("route `{route}`: the earlier champion `{model}` is not loaded (loaded: {loaded}); put its file back in the model directory first")]
    NotLoaded {
        /// The route.
        route: String,
        /// The earlier champion.
        model: String,
        /// The loaded models.
        loaded: String,
    },
    /// The history could not be written, so nothing changed.
    #[error("cannot record the change in {file}: {error}")]
    History {
        /// The history file.
        file: String,
        /// The I/O error.
        error: String,
    },
}

/// The position of the challenger `challenger` names on `route`: the same reference, or for a bare name the route's
/// only challenger of that name.
fn challenger_position(route: &Route, challenger: &ModelRef) -> Result<usize, PromotionError> {
    let list = &route.challengers.list;
    let exact = list.iter().position(|c| c.model == *challenger);
    let by_name = || {
        let mut same = list
            .iter()
            .enumerate()
            .filter(|(_, c)| c.model.name == challenger.name);
        match (same.next(), same.next()) {
            (Some((i, _)), None) if !challenger.is_pinned() => Some(i),
            _ => None,
        }
    };
    exact
        .or_else(by_name)
        .ok_or_else(|| PromotionError::NotAChallenger {
            route: route.name.clone(),
            model: challenger.to_string(),
            known: list
                .iter()
                .map(|c| c.model.to_string())
                .collect::<Vec<_>>()
                .join(", "),
        })
}

/// The route with `challenger` as champion and the old champion in the challenger's place.
pub fn swapped(route: &Route, challenger: &ModelRef) -> Result<Route, PromotionError> {
    let position = challenger_position(route, challenger)?;
    let challenger = &route.challengers.list[position].model;
    let mut list = route.challengers.list.clone();
    list[position] = Challenger {
        model: route.model.clone(),
        mode: list[position].mode,
    };
    let plan = probity_models::compare::SharePlan::new(list.iter().filter_map(|c| match c.mode {
        ChallengerMode::Live { share, .. } => Some((c.model.to_string(), share)),
        ChallengerMode::Silent => None,
    }))
    // The shares are the validated ones, only the names moved.
    .unwrap_or_else(|_| route.challengers.plan.clone());
    Ok(Route {
        model: challenger.clone(),
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
            .filter(|r| r.model.to_string() == change.previous_champion)
            .and_then(|r| {
                let new = ModelRef::parse(&change.new_champion).ok()?;
                swapped(r, &new).ok()
            })
            .filter(|r| r.model.to_string() == change.new_champion);
        match fits {
            Some(route) => {
                let mut next = (*map).clone();
                next.insert(change.route.clone(), Arc::new(route));
                self.current.store(Arc::new(next));
                lock(&self.history).push(change);
            }
            None => tracing::warn!(route = %change.route, from = %change.previous_champion,
                to = %change.new_champion, kind = %change.kind,
                "recorded route change does not fit the configuration; skipped"),
        }
    }

    /// The routes now.
    pub fn load(&self) -> Arc<RouteMap> {
        self.current.load_full()
    }

    /// Makes `challenger` (`NAME` or `NAME@VERSION`; a bare name picks the route's only challenger of that name) the
    /// champion of `route`; the change is recorded before it takes effect. `version_of` gives the version serving for
    /// a model reference (recorded with the change; empty when not loaded).
    pub fn promote(
        &self,
        route: &str,
        challenger: &str,
        requested_by: &str,
        peer: &str,
        reason: &str,
        version_of: impl Fn(&ModelRef) -> Option<String>,
    ) -> Result<RouteChange, PromotionError> {
        let challenger =
            ModelRef::parse(challenger).map_err(|e| PromotionError::BadModel(e.to_string()))?;
        // One change at a time; readers are never blocked.
        let mut history = lock(&self.history);
        let map = self.current.load_full();
        let old = map
            .get(route)
            .ok_or_else(|| PromotionError::NoRoute(route.to_string()))?;
        let new = swapped(old, &challenger)?;
        self.commit(
            &mut history,
            &map,
            PROMOTION,
            old,
            new,
            (requested_by, peer, reason),
            &version_of,
        )
    }

    /// Returns `route` to its previous champion: the champion before the last promotion that no restore has undone
    /// yet (module documentation). Refused when there is none, when that model is no longer a challenger of the
    /// route, or when `version_of` says it is not loaded (`loaded` lists what is, for the message).
    pub fn restore(
        &self,
        route: &str,
        requested_by: &str,
        peer: &str,
        reason: &str,
        version_of: impl Fn(&ModelRef) -> Option<String>,
        loaded: impl Fn() -> String,
    ) -> Result<RouteChange, PromotionError> {
        let mut history = lock(&self.history);
        let map = self.current.load_full();
        let old = map
            .get(route)
            .ok_or_else(|| PromotionError::NoRoute(route.to_string()))?;
        let earlier = earlier_champions(&history, route)
            .pop()
            .ok_or_else(|| PromotionError::NoEarlierChampion(route.to_string()))?;
        let not_on_route = || PromotionError::NotOnRoute {
            route: route.to_string(),
            model: earlier.clone(),
        };
        let target = ModelRef::parse(&earlier).map_err(|_| not_on_route())?;
        // The exact reference the promotion left on the route, not another version of the same name.
        if !old.challengers.list.iter().any(|c| c.model == target) {
            return Err(not_on_route());
        }
        if version_of(&target).is_none() {
            return Err(PromotionError::NotLoaded {
                route: route.to_string(),
                model: earlier.clone(),
                loaded: loaded(),
            });
        }
        let new = swapped(old, &target)?;
        self.commit(
            &mut history,
            &map,
            RESTORE,
            old,
            new,
            (requested_by, peer, reason),
            &version_of,
        )
    }

    /// Records a change and publishes the new route (the caller holds the history lock).
    #[allow(clippy::too_many_arguments)]
    fn commit(
        &self,
        history: &mut Vec<RouteChange>,
        map: &RouteMap,
        kind: &str,
        old: &Route,
        new: Route,
        (requested_by, peer, reason): (&str, &str, &str),
        version_of: &dyn Fn(&ModelRef) -> Option<String>,
    ) -> Result<RouteChange, PromotionError> {
        let change = RouteChange {
            time_ms: crate::store::clock::system_now_ms(),
            kind: kind.to_string(),
            route: old.name.clone(),
            previous_champion: old.model.to_string(),
            previous_version: version_of(&old.model).unwrap_or_default(),
            new_champion: new.model.to_string(),
            new_version: version_of(&new.model).unwrap_or_default(),
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
        let mut next = map.clone();
        next.insert(old.name.clone(), Arc::new(new));
        self.current.store(Arc::new(next));
        history.push(change.clone());
        tracing::info!(route = %change.route, kind, from = %change.previous_champion,
            from_version = %change.previous_version, to = %change.new_champion,
            to_version = %change.new_version, requested_by = %change.requested_by, peer = %change.peer,
            "route champion changed");
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

    /// The promotions and restores of `route` (all routes when empty), oldest first.
    pub fn history(&self, route: &str) -> Vec<RouteChange> {
        lock(&self.history)
            .iter()
            .filter(|c| route.is_empty() || c.route == route)
            .cloned()
            .collect()
    }
}

/// The champions a restore can return to, the next one last: each promotion of `route` puts its previous champion
/// on the stack and each restore takes one off.
fn earlier_champions(history: &[RouteChange], route: &str) -> Vec<String> {
    let mut stack = Vec::new();
    for change in history.iter().filter(|c| c.route == route) {
        if change.kind == RESTORE {
            stack.pop();
        } else {
            stack.push(change.previous_champion.clone());
        }
    }
    stack
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

    /// Every model is loaded at version `v-NAME`.
    fn loaded(m: &ModelRef) -> Option<String> {
        Some(format!("v-{}", m.name))
    }

    #[test]
    fn promotion_swaps_places_records_and_replays() {
        let dir = tempfile::tempdir().unwrap();
        let table = RouteTable::new(routes()).with_history_dir(dir.path());
        let before = table.load();
        let e = table
            .promote("fraud", "x", "ops", "peer", "", loaded)
            .unwrap_err();
        assert!(matches!(e, PromotionError::NotAChallenger { .. }), "{e}");
        let change = table
            .promote(
                "fraud",
                "b",
                "ops-lead",
                "127.0.0.1:1",
                "better log-loss",
                loaded,
            )
            .unwrap();
        assert_eq!(
            (
                change.kind.as_str(),
                change.previous_version.as_str(),
                change.new_version.as_str()
            ),
            ("promotion", "v-a", "v-b")
        );
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

    #[test]
    fn restore_undoes_one_promotion_at_a_time_and_is_recorded_like_one() {
        let dir = tempfile::tempdir().unwrap();
        let table = RouteTable::new(routes()).with_history_dir(dir.path());
        let none = || "none".to_string();
        let e = table
            .restore("fraud", "ops", "peer", "", loaded, none)
            .unwrap_err();
        assert_eq!(e, PromotionError::NoEarlierChampion("fraud".into()));
        table.promote("fraud", "b", "ops", "p", "", loaded).unwrap();
        table.promote("fraud", "c", "ops", "p", "", loaded).unwrap();
        assert_eq!(table.load()["fraud"].model, "c");
        // The earlier champion must be loaded.
        let e = table
            .restore("fraud", "ops", "p", "", |_: &ModelRef| None, none)
            .unwrap_err();
        assert!(
            matches!(e, PromotionError::NotLoaded { ref model, .. } if model == "b"),
            "{e}"
        );
        assert_eq!(
            table.load()["fraud"].model,
            "c",
            "a refused restore changes nothing"
        );
        let back = table
            .restore("fraud", "ana", "p", "c drifts", loaded, none)
            .unwrap();
        assert_eq!(
            (
                back.kind.as_str(),
                back.previous_champion.as_str(),
                back.new_champion.as_str()
            ),
            ("restore", "c", "b")
        );
        assert_eq!(
            (back.requested_by.as_str(), back.reason.as_str()),
            ("ana", "c drifts")
        );
        assert_eq!(table.load()["fraud"].model, "b");
        table
            .restore("fraud", "ana", "p", "", loaded, none)
            .unwrap();
        assert_eq!(table.load()["fraud"].model, "a");
        let e = table
            .restore("fraud", "ana", "p", "", loaded, none)
            .unwrap_err();
        assert_eq!(e, PromotionError::NoEarlierChampion("fraud".into()));
        // A restart replays promotions and restores alike.
        let again = RouteTable::new(routes()).with_history_dir(dir.path());
        assert_eq!(again.load()["fraud"].model, "a");
        assert_eq!(again.history("fraud").len(), 4);
    }
}
