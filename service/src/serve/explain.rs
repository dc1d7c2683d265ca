//! The explanation a scoring request may ask for (`explain` on `Score`, `ScoreBatch`, `ScoreStream`): the row's
//! contributions and the route's top reasons, computed by `probity_models::explain` after the row is scored.
//! A request that asks for none costs one comparison.

use probity_models::{Adverse, ExplainError, Model, ReasonRequest};

use crate::serve::error::ServeError;
use crate::serve::proto as pb;

/// What a request asked for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Level {
    /// The route's top reasons.
    Reasons,
    /// The reasons and every feature's contribution.
    Contributions,
}

/// The level a request's `explain` field asks for; `None` for none, an error naming `field` for an unknown value.
#[inline]
pub fn level(explain: i32, field: &str) -> Result<Option<Level>, ServeError> {
    if explain == 0 {
        return Ok(None);
    }
    match pb::ExplainLevel::try_from(explain) {
        Ok(pb::ExplainLevel::None) => Ok(None),
        Ok(pb::ExplainLevel::Reasons) => Ok(Some(Level::Reasons)),
        Ok(pb::ExplainLevel::Contributions) => Ok(Some(Level::Contributions)),
        Err(_) => Err(ServeError::invalid(
            field,
            format!(
                "unknown explain level {explain}; use 0 (none), 1 (reasons) or 2 (contributions)"
            ),
        )),
    }
}

/// The explanation of one scored row (`values` as the model scored them); `field` names the row for errors.
pub fn explain(
    model: &Model,
    values: &[f64],
    reasons: &ReasonRequest,
    level: Level,
    field: &str,
) -> Result<pb::Explanation, ServeError> {
    let c = model.contributions(values).map_err(|error| match error {
        ExplainError::Eval(error) => ServeError::Eval {
            field: field.to_string(),
            error,
        },
        ExplainError::NoCover { .. } => ServeError::NotExplainable {
            model: model.name().to_string(),
            message: error.to_string(),
        },
    })?;
    let names = model.schema().features();
    let name = |i: usize| names.get(i).map(|f| f.name.clone()).unwrap_or_default();
    let reasons = model
        .reasons(&c, reasons)
        .into_iter()
        .map(|r| pb::Reason {
            code: r.code,
            text: r.text,
            weight: r.weight,
            features: r.features.into_iter().map(name).collect(),
        })
        .collect();
    let contributions = match level {
        Level::Reasons => Vec::new(),
        Level::Contributions => c
            .features
            .iter()
            .enumerate()
            .map(|(i, &v)| pb::Contribution {
                feature: name(i),
                log_odds: v,
            })
            .collect(),
    };
    Ok(pb::Explanation {
        bias: c.bias,
        contributions,
        reasons,
    })
}

/// The route's reason settings from its `[routes.NAME.reasons]` table: `limit` (1 to 20, default 4) and
/// `adverse` (`higher` or `lower`: which direction of the log-odds counts against the subject; default `higher`,
/// the positive class being the bad outcome).
pub fn reasons_config(
    key: &str,
    limit: Option<i64>,
    adverse: Option<&str>,
) -> Result<ReasonRequest, (String, String)> {
    let limit = match limit {
        None => probity_models::DEFAULT_REASONS,
        Some(n @ 1..=20) => n as usize,
        Some(n) => return Err((format!("{key}.limit"), format!("must be 1 to 20, got {n}"))),
    };
    let adverse = match adverse.unwrap_or("higher") {
        "higher" => Adverse::Higher,
        "lower" => Adverse::Lower,
        other => {
            return Err((
                format!("{key}.adverse"),
                format!("must be `higher` or `lower`, got `{other}`"),
            ))
        }
    };
    Ok(ReasonRequest { limit, adverse })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reasons_settings() {
        let r = reasons_config("routes.a.reasons", None, None).unwrap_or_else(|e| panic!("{e:?}"));
        assert_eq!(r, ReasonRequest::default());
        assert_eq!(r.limit, 4);
        let r = reasons_config("routes.a.reasons", Some(2), Some("lower"))
            .unwrap_or_else(|e| panic!("{e:?}"));
        assert_eq!((r.limit, r.adverse), (2, Adverse::Lower));
        let e = reasons_config("routes.a.reasons", Some(0), None).unwrap_err();
        assert_eq!(e.0, "routes.a.reasons.limit");
        let e = reasons_config("routes.a.reasons", None, Some("up")).unwrap_err();
        assert_eq!(e.0, "routes.a.reasons.adverse");
        assert!(level(9, "explain").is_err());
        assert_eq!(level(0, "explain").ok(), Some(None));
        assert_eq!(level(2, "explain").ok(), Some(Some(Level::Contributions)));
    }
}
