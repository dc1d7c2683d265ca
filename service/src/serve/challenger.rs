//! Challengers on a route: the configuration (`[[routes.<name>.challengers]]`), which model answers a request, and
//! which models score it silently.
//!
//! A route has one champion (`model`) and any number of challengers, each in one of two modes:
//! - `mode = "silent"`: every request is also scored by the challenger, off the answer path; the response is the
//!   champion's, and both predictions are stored under the same prediction id with their roles;
//! - `mode = "live"` with `share = f`: a share `f` of the subjects (by the sticky hash of the request's subject
//!   key, [`probity_models::compare::share`]) is answered by the challenger; with `paired = true` the model that
//!   did not answer scores the request too, silently, so every request has both predictions.
//!
//! A request without a subject key is answered by the champion (there is nothing to keep sticky). `ScoreBatch`
//! calls are answered by the champion as a whole (one model version per batch, as the contract promises); their
//! rows are still scored by the silent challengers.
//!
//! A challenger is named like the champion, `NAME` or `NAME@VERSION` ([`crate::serve::model_ref`]); the next
//! version of the champion's own model is a challenger written `NAME@NEXT` beside a champion `NAME@CURRENT`.
//! Models are told apart by name and version everywhere below, never by name alone.
//!
//! The words of earlier releases (`mirror`, `split`, `fraction`, `mirror_back`) are refused with the new word named.

use probity_models::compare::{Assignment, SharePlan};
use serde::Deserialize;

use crate::serve::model_ref::ModelRef;

/// A challenger as written in the configuration file.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawChallenger {
    model: Option<String>,
    mode: Option<String>,
    share: Option<f64>,
    paired: Option<bool>,
    /// Renamed `share`; refused with that name.
    fraction: Option<toml::Value>,
    /// Renamed `paired`; refused with that name.
    mirror_back: Option<toml::Value>,
}

/// How a challenger takes part.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ChallengerMode {
    /// Scores every request silently; never answers.
    Silent,
    /// Answers a fixed share of subjects.
    Live {
        /// The share of subjects it answers.
        share: f64,
        /// Whether the model that did not answer also scores the request silently.
        paired: bool,
    },
}

/// One validated challenger.
#[derive(Debug, Clone, PartialEq)]
pub struct Challenger {
    /// The model (`NAME` or `NAME@VERSION`).
    pub model: ModelRef,
    /// Its mode.
    pub mode: ChallengerMode,
}

impl Challenger {
    /// `<model> silent` or `<model> live 0.1` (with ` paired`), for route descriptions.
    pub fn describe(&self) -> String {
        match self.mode {
            ChallengerMode::Silent => format!("{} silent", self.model),
            ChallengerMode::Live { share, paired } => format!(
                "{} live {share}{}",
                self.model,
                if paired { " paired" } else { "" }
            ),
        }
    }
}

/// The challengers of one route with their share plan.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Challengers {
    /// All challengers in configuration order.
    pub list: Vec<Challenger>,
    /// The live challengers' shares, in configuration order (the plan's names are the models as written).
    pub plan: SharePlan,
}

/// The model that answers and the role it answers in.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Answer {
    /// The model.
    pub model: ModelRef,
    /// `champion` or `challenger`.
    pub role: &'static str,
}

impl Challengers {
    /// Whether the route has any challenger.
    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    /// Which model answers `subject_key` on `route` (the champion when the key is empty).
    pub fn answer(&self, route: &str, champion: &ModelRef, subject_key: &str) -> Answer {
        let assignment = if subject_key.is_empty() {
            Assignment::Champion
        } else {
            self.plan.assign(route, subject_key)
        };
        let live = |k: usize| {
            let name = self.plan.names().get(k)?;
            self.list
                .iter()
                .find(|c| c.model.to_string() == *name)
                .map(|c| c.model.clone())
        };
        match assignment {
            Assignment::Challenger(k) => match live(k) {
                Some(model) => Answer {
                    model,
                    role: "challenger",
                },
                None => Answer {
                    model: champion.clone(),
                    role: "champion",
                },
            },
            Assignment::Champion => Answer {
                model: champion.clone(),
                role: "champion",
            },
        }
    }

    /// The models that score a request silently when `answered` answered it, with their roles.
    pub fn silent(&self, champion: &ModelRef, answered: &ModelRef) -> Vec<Answer> {
        let mut out = Vec::new();
        for c in &self.list {
            match c.mode {
                ChallengerMode::Silent => out.push(Answer {
                    model: c.model.clone(),
                    role: "challenger",
                }),
                ChallengerMode::Live { paired: true, .. } => {
                    if answered == champion {
                        out.push(Answer {
                            model: c.model.clone(),
                            role: "challenger",
                        });
                    } else if *answered == c.model {
                        out.push(Answer {
                            model: champion.clone(),
                            role: "champion",
                        });
                    }
                }
                ChallengerMode::Live { .. } => {}
            }
        }
        out
    }
}

/// Validates a route's challengers; errors are `(dotted key, message)`.
pub fn challengers(
    route: &str,
    champion: &ModelRef,
    raw: Vec<RawChallenger>,
) -> Result<Challengers, (String, String)> {
    let mut list = Vec::new();
    for (i, c) in raw.into_iter().enumerate() {
        let key = |k: &str| format!("routes.{route}.challengers[{i}].{k}");
        let RawChallenger {
            model,
            mode,
            share,
            paired,
            fraction,
            mirror_back,
        } = c;
        if fraction.is_some() {
            return Err((key("fraction"), "was renamed: write `share`".to_string()));
        }
        if mirror_back.is_some() {
            return Err((
                key("mirror_back"),
                "was renamed: write `paired`".to_string(),
            ));
        }
        let model = model.ok_or_else(|| (key("model"), "is required".to_string()))?;
        let model = ModelRef::parse(&model).map_err(|e| (key("model"), e.to_string()))?;
        if model == *champion || list.iter().any(|c: &Challenger| c.model == model) {
            return Err((
                key("model"),
                format!("`{model}` already serves this route as champion or challenger"),
            ));
        }
        let mode = match (mode.as_deref(), share, paired) {
            (Some("silent"), None, None) => ChallengerMode::Silent,
            (Some("silent"), _, _) => {
                return Err((
                    key("mode"),
                    "a silent challenger answers nothing: it takes no share or paired".to_string(),
                ))
            }
            (Some("live"), Some(f), paired) if (0.0..=1.0).contains(&f) => ChallengerMode::Live {
                share: f,
                paired: paired.unwrap_or(false),
            },
            (Some("live"), Some(f), _) => {
                return Err((key("share"), format!("must be in [0, 1], got {f}")))
            }
            (Some("live"), None, _) => {
                return Err((
                    key("share"),
                    "is required for a live challenger".to_string(),
                ))
            }
            (Some("mirror"), _, _) => {
                return Err((
                    key("mode"),
                    "`mirror` was renamed: write `silent`".to_string(),
                ))
            }
            (Some("split"), _, _) => {
                return Err((
                    key("mode"),
                    "`split` was renamed: write `live` (with `share`)".to_string(),
                ))
            }
            (other, _, _) => {
                return Err((
                    key("mode"),
                    format!("must be `silent` or `live`, got `{}`", other.unwrap_or("")),
                ))
            }
        };
        list.push(Challenger { model, mode });
    }
    let plan = SharePlan::new(list.iter().filter_map(|c| match c.mode {
        ChallengerMode::Live { share, .. } => Some((c.model.to_string(), share)),
        ChallengerMode::Silent => None,
    }))
    .map_err(|e| (format!("routes.{route}.challengers"), e.to_string()))?;
    Ok(Challengers { list, plan })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn raw(model: &str, mode: &str, share: Option<f64>, paired: Option<bool>) -> RawChallenger {
        RawChallenger {
            model: Some(model.into()),
            mode: Some(mode.into()),
            share,
            paired,
            ..RawChallenger::default()
        }
    }

    fn r(text: &str) -> ModelRef {
        ModelRef::parse(text).unwrap()
    }

    #[test]
    fn validation_names_the_key() {
        let e = challengers("fraud", &r("a"), vec![raw("a", "silent", None, None)]).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].model");
        let e = challengers("fraud", &r("a"), vec![raw("b", "live", None, None)]).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].share");
        let e =
            challengers("fraud", &r("a"), vec![raw("b", "silent", Some(0.1), None)]).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].mode");
        let e = challengers(
            "fraud",
            &r("a"),
            vec![
                raw("b", "live", Some(0.7), None),
                raw("c", "live", Some(0.4), None),
            ],
        )
        .unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers");
        assert!(e.1.contains("more than 1"), "{}", e.1);
    }

    #[test]
    fn answers_and_silent_scorers() {
        let c = challengers(
            "fraud",
            &r("a"),
            vec![
                raw("m", "silent", None, None),
                raw("s", "live", Some(1.0), Some(true)),
            ],
        )
        .unwrap();
        // Share 1: every keyed subject goes to the live challenger; no key means the champion.
        assert_eq!(c.answer("fraud", &r("a"), "cust-1").model, "s");
        assert_eq!(c.answer("fraud", &r("a"), "").role, "champion");
        let models = |v: Vec<Answer>| {
            v.into_iter()
                .map(|a| (a.model.to_string(), a.role))
                .collect::<Vec<_>>()
        };
        assert_eq!(
            models(c.silent(&r("a"), &r("s"))),
            vec![("m".into(), "challenger"), ("a".into(), "champion")]
        );
        assert_eq!(
            models(c.silent(&r("a"), &r("a"))),
            vec![("m".into(), "challenger"), ("s".into(), "challenger")]
        );
    }

    #[test]
    fn the_next_version_of_the_champion_is_a_challenger_told_apart_by_version() {
        let c = challengers(
            "fraud",
            &r("gbm@1"),
            vec![raw("gbm@2", "live", Some(1.0), Some(true))],
        )
        .unwrap();
        let answer = c.answer("fraud", &r("gbm@1"), "cust-1");
        assert_eq!(
            (answer.model.to_string(), answer.role),
            ("gbm@2".into(), "challenger")
        );
        let models = |v: Vec<Answer>| {
            v.into_iter()
                .map(|a| (a.model.to_string(), a.role))
                .collect::<Vec<_>>()
        };
        assert_eq!(
            models(c.silent(&r("gbm@1"), &r("gbm@2"))),
            vec![("gbm@1".into(), "champion")]
        );
        assert_eq!(
            models(c.silent(&r("gbm@1"), &r("gbm@1"))),
            vec![("gbm@2".into(), "challenger")]
        );
        let e = challengers(
            "fraud",
            &r("gbm@1"),
            vec![raw("gbm@1", "silent", None, None)],
        )
        .unwrap_err();
        assert!(e.1.contains("already serves"), "{}", e.1);
        let e =
            challengers("fraud", &r("gbm"), vec![raw("gbm@", "silent", None, None)]).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].model");
    }

    #[test]
    fn the_words_of_earlier_releases_are_refused_with_the_new_ones() {
        for (old, key, new) in [("mirror", "mode", "silent"), ("split", "mode", "live")] {
            let e = challengers("fraud", &r("a"), vec![raw("b", old, None, None)]).unwrap_err();
            assert_eq!(e.0, format!("routes.fraud.challengers[0].{key}"));
            assert!(e.1.contains(&format!("write `{new}`")), "{}", e.1);
        }
        let old = RawChallenger {
            fraction: Some(toml::Value::Float(0.1)),
            ..raw("b", "live", Some(0.1), None)
        };
        let e = challengers("fraud", &r("a"), vec![old]).unwrap_err();
        assert_eq!(
            e,
            (
                "routes.fraud.challengers[0].fraction".into(),
                "was renamed: write `share`".into()
            )
        );
        let old = RawChallenger {
            mirror_back: Some(toml::Value::Boolean(true)),
            ..raw("b", "live", Some(0.1), None)
        };
        let e = challengers("fraud", &r("a"), vec![old]).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].mirror_back");
        assert!(e.1.contains("`paired`"), "{}", e.1);
    }
}
