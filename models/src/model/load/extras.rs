//! Rules of the optional `calibration`, `reference_distribution`, `score_scale` and `reason_families` objects.

use super::finite;
use super::raw::{
    RawCalibration, RawDistributionScale, RawIsotonicInput, RawOddsOf, RawReasonFamily,
    RawReference, RawScoreScale,
};
use crate::calibration::{Calibration, IsotonicInput};
use crate::error::ModelError;
use crate::explain::{ReasonFamilies, ReasonFamily};
use crate::model::{DistributionScale, OddsOf, ReferenceDistribution, ScoreScale};
use crate::schema::Schema;

/// How far the reference fractions may sum from 1 (`docs/model-format.md`).
const FRACTION_SUM_TOLERANCE: f64 = 1e-6;

fn positive(v: f64, path: &str) -> Result<f64, ModelError> {
    let v = finite(v, || path.into())?;
    if v > 0.0 {
        Ok(v)
    } else {
        Err(ModelError::rule(path, format!("must be > 0, got {v}")))
    }
}

fn non_negative(v: f64, path: &str) -> Result<f64, ModelError> {
    let v = finite(v, || path.into())?;
    if v >= 0.0 {
        Ok(v)
    } else {
        Err(ModelError::rule(path, format!("must be >= 0, got {v}")))
    }
}

/// Finite and strictly increasing; the error names the first offending entry.
fn increasing(values: &[f64], path: &str) -> Result<(), ModelError> {
    for (i, &v) in values.iter().enumerate() {
        finite(v, || format!("{path}[{i}]"))?;
        if i > 0 && values[i - 1] >= v {
            return Err(ModelError::rule(
                format!("{path}[{i}]"),
                format!("must be strictly increasing: {v} follows {}", values[i - 1]),
            ));
        }
    }
    Ok(())
}

/// Checks a calibration map.
pub(super) fn calibration(raw: RawCalibration) -> Result<Calibration, ModelError> {
    match (raw.platt, raw.isotonic, raw.beta, raw.temperature) {
        (Some(p), None, None, None) => Ok(Calibration::Platt {
            a: positive(p.a, "calibration.platt.a")?,
            b: finite(p.b, || "calibration.platt.b".into())?,
        }),
        (None, Some(iso), None, None) => {
            if iso.x.len() != iso.y.len() {
                return Err(ModelError::rule(
                    "calibration.isotonic.y",
                    format!(
                        "{} values of y for {} values of x",
                        iso.y.len(),
                        iso.x.len()
                    ),
                ));
            }
            if iso.x.len() < 2 {
                return Err(ModelError::rule(
                    "calibration.isotonic.x",
                    format!(
                        "an isotonic map needs at least 2 points, got {}",
                        iso.x.len()
                    ),
                ));
            }
            increasing(&iso.x, "calibration.isotonic.x")?;
            for (i, &y) in iso.y.iter().enumerate() {
                let path = || format!("calibration.isotonic.y[{i}]");
                if !(0.0..=1.0).contains(&y) {
                    return Err(ModelError::rule(
                        path(),
                        format!("must be in [0, 1], got {y}"),
                    ));
                }
                if i > 0 && iso.y[i - 1] > y {
                    return Err(ModelError::rule(
                        path(),
                        format!("must be non-decreasing: {y} follows {}", iso.y[i - 1]),
                    ));
                }
            }
            let input = match iso.input {
                RawIsotonicInput::LogOdds => IsotonicInput::LogOdds,
                RawIsotonicInput::Probability => IsotonicInput::Probability,
            };
            Ok(Calibration::Isotonic {
                input,
                x: iso.x,
                y: iso.y,
            })
        }
        (None, None, Some(b), None) => Ok(Calibration::Beta {
            a: non_negative(b.a, "calibration.beta.a")?,
            b: non_negative(b.b, "calibration.beta.b")?,
            c: finite(b.c, || "calibration.beta.c".into())?,
        }),
        (None, None, None, Some(t)) => Ok(Calibration::Temperature {
            t: positive(t.t, "calibration.temperature.t")?,
        }),
        _ => Err(ModelError::rule(
            "calibration",
            "needs exactly one of `platt`, `isotonic`, `beta` and `temperature`",
        )),
    }
}

/// Checks a reference distribution.
pub(super) fn reference(raw: RawReference) -> Result<ReferenceDistribution, ModelError> {
    increasing(&raw.edges, "reference_distribution.edges")?;
    if raw.fractions.len() != raw.edges.len() + 1 {
        return Err(ModelError::rule(
            "reference_distribution.fractions",
            format!(
                "{} fractions for {} edges; there must be one more fraction than edges",
                raw.fractions.len(),
                raw.edges.len()
            ),
        ));
    }
    for (i, &f) in raw.fractions.iter().enumerate() {
        if !(0.0..=1.0).contains(&f) {
            return Err(ModelError::rule(
                format!("reference_distribution.fractions[{i}]"),
                format!("must be in [0, 1], got {f}"),
            ));
        }
    }
    let sum: f64 = raw.fractions.iter().sum();
    if (sum - 1.0).abs() > FRACTION_SUM_TOLERANCE {
        return Err(ModelError::rule(
            "reference_distribution.fractions",
            format!("fractions sum to {sum}, not 1 (tolerance {FRACTION_SUM_TOLERANCE})"),
        ));
    }
    let on = match raw.on {
        RawDistributionScale::Probability => DistributionScale::Probability,
        RawDistributionScale::LogOdds => DistributionScale::LogOdds,
    };
    Ok(ReferenceDistribution {
        on,
        edges: raw.edges,
        fractions: raw.fractions,
    })
}

/// Checks a points scale.
pub(super) fn score_scale(raw: RawScoreScale) -> Result<ScoreScale, ModelError> {
    Ok(ScoreScale {
        points: finite(raw.points, || "score_scale.points".into())?,
        at_odds: positive(raw.at_odds, "score_scale.at_odds")?,
        pdo: positive(raw.pdo, "score_scale.pdo")?,
        odds_of: match raw.odds_of {
            RawOddsOf::Negative => OddsOf::Negative,
            RawOddsOf::Positive => OddsOf::Positive,
        },
    })
}

/// Longest reason code.
pub const MAX_REASON_CODE_CHARS: usize = 32;
/// Longest reason text.
pub const MAX_REASON_TEXT_CHARS: usize = 200;

/// Checks the `reason_families` array: codes unique, texts short, every feature in range and in one family at most.
pub(super) fn reason_families(
    raw: Vec<RawReasonFamily>,
    schema: &Schema,
) -> Result<ReasonFamilies, ModelError> {
    let mut of_feature: Vec<Option<u32>> = vec![None; schema.len()];
    let mut families = Vec::with_capacity(raw.len());
    let mut codes = std::collections::HashSet::new();
    for (k, f) in raw.into_iter().enumerate() {
        let path = |rest: &str| format!("reason_families[{k}]{rest}");
        let n = f.code.chars().count();
        if n == 0 || n > MAX_REASON_CODE_CHARS || f.code.chars().any(char::is_control) {
            return Err(ModelError::rule(
                path(".code"),
                format!("must be 1 to {MAX_REASON_CODE_CHARS} printable characters, got {n}"),
            ));
        }
        if !codes.insert(f.code.clone()) {
            return Err(ModelError::rule(
                path(".code"),
                format!("duplicate reason code {:?}", f.code),
            ));
        }
        let n = f.text.chars().count();
        if n == 0 || n > MAX_REASON_TEXT_CHARS || f.text.chars().any(char::is_control) {
            return Err(ModelError::rule(
                path(".text"),
                format!("must be 1 to {MAX_REASON_TEXT_CHARS} printable characters, got {n}"),
            ));
        }
        if f.features.is_empty() {
            return Err(ModelError::rule(
                path(".features"),
                "a family needs at least one feature",
            ));
        }
        let mut features = Vec::with_capacity(f.features.len());
        for (j, &i) in f.features.iter().enumerate() {
            let Some(slot) = of_feature.get_mut(i as usize) else {
                return Err(ModelError::rule(
                    path(&format!(".features[{j}]")),
                    format!(
                        "feature index {i} is out of range (the model has {} features)",
                        schema.len()
                    ),
                ));
            };
            if let Some(other) = slot {
                return Err(ModelError::rule(
                    path(&format!(".features[{j}]")),
                    format!("feature {i} is already in reason family {other}"),
                ));
            }
            *slot = Some(k as u32);
            features.push(i as usize);
        }
        families.push(ReasonFamily {
            code: f.code,
            text: f.text,
            features,
        });
    }
    Ok(ReasonFamilies {
        families,
        of_feature,
    })
}
