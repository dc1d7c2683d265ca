//! Rules of the optional `features[i].training_distribution` (`docs/model-format.md`, Training distribution).

use super::finite;
use super::raw::RawTrainingDistribution;
use crate::error::ModelError;
use crate::schema::{Feature, FeatureKind};
use crate::stability::{
    DistributionBins, TrainingDistribution, MAX_DISTRIBUTION_BINS, SHARE_SUM_TOLERANCE,
};

/// A share: finite and in [0, 1].
fn share(v: f64, path: impl Fn() -> String) -> Result<f64, ModelError> {
    let v = finite(v, &path)?;
    if (0.0..=1.0).contains(&v) {
        Ok(v)
    } else {
        Err(ModelError::rule(
            path(),
            format!("must be in [0, 1], got {v}"),
        ))
    }
}

/// Checks the training distribution of feature `i`: numeric features have `edges` (finite, strictly increasing,
/// at most [`MAX_DISTRIBUTION_BINS`] - 1) and one more share than edges, and no `unknown`; categorical features
/// have no `edges` and one share per category (at most [`MAX_DISTRIBUTION_BINS`] categories). Every share is in
/// [0, 1] and the shares, `missing` and `unknown` sum to 1 within [`SHARE_SUM_TOLERANCE`].
pub(super) fn training_distribution(
    i: usize,
    feature: &Feature,
    raw: RawTrainingDistribution,
) -> Result<TrainingDistribution, ModelError> {
    let base = format!("features[{i}].training_distribution");
    let at = |rest: &str| format!("{base}{rest}");
    let bins = match (&feature.kind, raw.edges) {
        (FeatureKind::Numeric, Some(edges)) => {
            if edges.len() >= MAX_DISTRIBUTION_BINS {
                return Err(ModelError::rule(
                    at(".edges"),
                    format!(
                        "{} edges make {} bins; at most {MAX_DISTRIBUTION_BINS} bins are allowed",
                        edges.len(),
                        edges.len() + 1
                    ),
                ));
            }
            for (j, &e) in edges.iter().enumerate() {
                finite(e, || at(&format!(".edges[{j}]")))?;
                if j > 0 && edges[j - 1] >= e {
                    return Err(ModelError::rule(
                        at(&format!(".edges[{j}]")),
                        format!("must be strictly increasing: {e} follows {}", edges[j - 1]),
                    ));
                }
            }
            if raw.shares.len() != edges.len() + 1 {
                return Err(ModelError::rule(
                    at(".shares"),
                    format!(
                        "{} shares for {} edges; there must be one more share than edges",
                        raw.shares.len(),
                        edges.len()
                    ),
                ));
            }
            if raw.unknown.is_some() {
                return Err(ModelError::rule(
                    at(".unknown"),
                    "a numeric feature has no unknown categories",
                ));
            }
            DistributionBins::Numeric { edges }
        }
        (FeatureKind::Numeric, None) => {
            return Err(ModelError::rule(
                base,
                "a numeric feature's distribution needs `edges`",
            ))
        }
        (FeatureKind::Categorical { .. }, Some(_)) => {
            return Err(ModelError::rule(
                at(".edges"),
                "a categorical feature's distribution has one share per category and no edges",
            ))
        }
        (FeatureKind::Categorical { categories }, None) => {
            if categories.len() > MAX_DISTRIBUTION_BINS {
                return Err(ModelError::rule(
                    base,
                    format!(
                        "the feature has {} categories; a distribution may have at most {MAX_DISTRIBUTION_BINS}",
                        categories.len()
                    ),
                ));
            }
            if raw.shares.len() != categories.len() {
                return Err(ModelError::rule(
                    at(".shares"),
                    format!(
                        "{} shares for {} categories; there must be one share per category",
                        raw.shares.len(),
                        categories.len()
                    ),
                ));
            }
            DistributionBins::Categorical
        }
    };
    let mut shares = Vec::with_capacity(raw.shares.len());
    for (j, &s) in raw.shares.iter().enumerate() {
        shares.push(share(s, || at(&format!(".shares[{j}]")))?);
    }
    let missing = share(raw.missing, || at(".missing"))?;
    let unknown = match raw.unknown {
        Some(u) => share(u, || at(".unknown"))?,
        None => 0.0,
    };
    let sum = shares.iter().sum::<f64>() + missing + unknown;
    if (sum - 1.0).abs() > SHARE_SUM_TOLERANCE {
        return Err(ModelError::rule(
            at(".shares"),
            format!(
                "shares, missing and unknown sum to {sum}, not 1 (tolerance {SHARE_SUM_TOLERANCE})"
            ),
        ));
    }
    Ok(TrainingDistribution {
        bins,
        shares,
        missing,
        unknown,
    })
}
