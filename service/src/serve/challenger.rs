//! Challengers on a route: the configuration (`[[routes.<name>.challengers]]`), which model answers a request, and
//! which models score it in the background.
//!
//! A route has one champion (`model`) and any number of challengers, each in one of two modes:
//! - `mode = "mirror"`: every request is also scored by the challenger, in the background; the response is the
//!   champion's, and both predictions are logged under the same prediction id with their roles;
//! - `mode = "split"` with `fraction = f`: a share `f` of the entities (by the sticky hash of the request's entity
//!   key, [`probity_models::compare::split`]) is answered by the challenger; with `mirror_back = true` the model that
//!   did not answer scores the request too, in the background, so every request has both predictions.
//!
//! A request without an entity key is answered by the champion (there is nothing to keep sticky). `ScoreBatch`
//! calls are answered by the champion as a whole (one model version per batch, as the contract promises); their
//! rows are still mirrored.

use probity_models::compare::{Assignment, SplitPlan};
use serde::Deserialize;

/// A challenger as written in the configuration file.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawChallenger {
    model: Option<String>,
    mode: Option<String>,
    fraction: Option<f64>,
    mirror_back: Option<bool>,
}

/// How a challenger takes part.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ChallengerMode {
    /// Scores every request in the background; never answers.
    Mirror,
    /// Answers a fixed share of entities.
    Split {
        /// The share of entities it answers.
        fraction: f64,
        /// Whether the model that did not answer also scores the request in the background.
        mirror_back: bool,
    },
}

/// One validated challenger.
#[derive(Debug, Clone, PartialEq)]
pub struct Challenger {
    /// The model name.
    pub model: String,
    /// Its mode.
    pub mode: ChallengerMode,
}

impl Challenger {
    /// `mirror` or `split 0.1` (with `, mirror_back`), for route descriptions.
    pub fn describe(&self) -> String {
        match self.mode {
            ChallengerMode::Mirror => format!("{} mirror", self.model),
            ChallengerMode::Split {
                fraction,
                mirror_back,
            } => format!(
                "{} split {fraction}{}",
                self.model,
                if mirror_back { " mirror_back" } else { "" }
            ),
        }
    }
}

/// The challengers of one route with their split plan.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Challengers {
    /// All challengers in configuration order.
    pub list: Vec<Challenger>,
    /// The split challengers' fractions, in configuration order (the plan's names are model names).
    pub plan: SplitPlan,
}

/// The model that answers and the role it answers in.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Answer {
    /// Model name.
    pub model: String,
    /// `champion` or `challenger`.
    pub role: &'static str,
}

impl Challengers {
    /// Whether the route has any challenger.
    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    /// Which model answers `entity_key` on `route` (the champion when the key is empty).
    pub fn answer(&self, route: &str, champion: &str, entity_key: &str) -> Answer {
        let assignment = if entity_key.is_empty() {
            Assignment::Champion
        } else {
            self.plan.assign(route, entity_key)
        };
        match assignment {
            Assignment::Challenger(k) => Answer {
                model: self.plan.names()[k].clone(),
                role: "challenger",
            },
            Assignment::Champion => Answer {
                model: champion.to_string(),
                role: "champion",
            },
        }
    }

    /// The models that score a request in the background when `answered` answered it, with their roles.
    pub fn shadows(&self, champion: &str, answered: &str) -> Vec<Answer> {
        let mut out = Vec::new();
        for c in &self.list {
            match c.mode {
                ChallengerMode::Mirror => out.push(Answer {
                    model: c.model.clone(),
                    role: "challenger",
                }),
                ChallengerMode::Split {
                    mirror_back: true, ..
                } => {
                    if answered == champion {
                        out.push(Answer {
                            model: c.model.clone(),
                            role: "challenger",
                        });
                    } else if answered == c.model {
                        out.push(Answer {
                            model: champion.to_string(),
                            role: "champion",
                        });
                    }
                }
                ChallengerMode::Split { .. } => {}
            }
        }
        out
    }
}

/// Validates a route's challengers; errors are `(dotted key, message)`.
pub fn challengers(
    route: &str,
    champion: &str,
    raw: Vec<RawChallenger>,
    valid_name: impl Fn(&str) -> bool,
) -> Result<Challengers, (String, String)> {
    let mut list = Vec::new();
    for (i, c) in raw.into_iter().enumerate() {
        let key = |k: &str| format!("routes.{route}.challengers[{i}].{k}");
        let RawChallenger {
            model,
            mode,
            fraction,
            mirror_back,
        } = c;
        let model = model.ok_or_else(|| (key("model"), "is required".to_string()))?;
        if !valid_name(&model) {
            return Err((
                key("model"),
                format!("not a model name (1 to 128 of A-Za-z0-9._-), got `{model}`"),
            ));
        }
        if model == champion || list.iter().any(|c: &Challenger| c.model == model) {
            return Err((
                key("model"),
                format!("`{model}` already serves this route as champion or challenger"),
            ));
        }
        let mode = match (mode.as_deref(), fraction, mirror_back) {
            (Some("mirror"), None, None) => ChallengerMode::Mirror,
            (Some("mirror"), _, _) => {
                return Err((
                    key("mode"),
                    "a mirrored challenger takes no fraction or mirror_back".to_string(),
                ))
            }
            (Some("split"), Some(f), back) if (0.0..=1.0).contains(&f) => ChallengerMode::Split {
                fraction: f,
                mirror_back: back.unwrap_or(false),
            },
            (Some("split"), Some(f), _) => {
                return Err((key("fraction"), format!("must be in [0, 1], got {f}")))
            }
            (Some("split"), None, _) => {
                return Err((
                    key("fraction"),
                    "is required for a split challenger".to_string(),
                ))
            }
            (other, _, _) => {
                return Err((
                    key("mode"),
                    format!("must be `mirror` or `split`, got `{}`", other.unwrap_or("")),
                ))
            }
        };
        list.push(Challenger { model, mode });
    }
    let plan = SplitPlan::new(list.iter().filter_map(|c| match c.mode {
        ChallengerMode::Split { fraction, .. } => Some((c.model.clone(), fraction)),
        ChallengerMode::Mirror => None,
    }))
    .map_err(|e| (format!("routes.{route}.challengers"), e.to_string()))?;
    Ok(Challengers { list, plan })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn raw(model: &str, mode: &str, fraction: Option<f64>, back: Option<bool>) -> RawChallenger {
        RawChallenger {
            model: Some(model.into()),
            mode: Some(mode.into()),
            fraction,
            mirror_back: back,
        }
    }

    fn ok(_: &str) -> bool {
        true
    }

    #[test]
    fn validation_names_the_key() {
        let e = challengers("fraud", "a", vec![raw("a", "mirror", None, None)], ok).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].model");
        let e = challengers("fraud", "a", vec![raw("b", "split", None, None)], ok).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].fraction");
        let e =
            challengers("fraud", "a", vec![raw("b", "mirror", Some(0.1), None)], ok).unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers[0].mode");
        let e = challengers(
            "fraud",
            "a",
            vec![
                raw("b", "split", Some(0.7), None),
                raw("c", "split", Some(0.4), None),
            ],
            ok,
        )
        .unwrap_err();
        assert_eq!(e.0, "routes.fraud.challengers");
        assert!(e.1.contains("more than 1"), "{}", e.1);
    }

    #[test]
    fn answers_and_shadows() {
        let c = challengers(
            "fraud",
            "a",
            vec![
                raw("m", "mirror", None, None),
                raw("s", "split", Some(1.0), Some(true)),
            ],
            ok,
        )
        .unwrap();
        // Fraction 1: every keyed entity goes to the split challenger; no key means the champion.
        assert_eq!(c.answer("fraud", "a", "cust-1").model, "s");
        assert_eq!(c.answer("fraud", "a", "").role, "champion");
        let models = |v: Vec<Answer>| v.into_iter().map(|a| (a.model, a.role)).collect::<Vec<_>>();
        assert_eq!(
            models(c.shadows("a", "s")),
            vec![("m".into(), "challenger"), ("a".into(), "champion")]
        );
        assert_eq!(
            models(c.shadows("a", "a")),
            vec![("m".into(), "challenger"), ("s".into(), "challenger")]
        );
    }
}
