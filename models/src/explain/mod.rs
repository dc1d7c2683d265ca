//! Why a row got its score: exact per-feature contributions and the reasons built from them.
//!
//! **Contributions.** For a tree ensemble, the path-dependent Shapley values of [`trees`] (Lundberg, Erion and
//! Lee 2018, Algorithm 2), exact in f64; they need each node's `cover` from the model file. For a linear model,
//! each term's own contribution (the terms are additive, so that is exact); a binned scorecard characteristic
//! gives its bin's points. Either way `bias + sum(features) = log-odds` of the row, up to floating-point rounding.
//!
//! **Scale.** Contributions are on the model's log-odds scale, before calibration and the base-rate correction.
//! A `half_log_odds` model's margin-space values are doubled (exact in binary floating point), so they sum to
//! `2 * margin`, the log-odds. Calibration and the base-rate correction are monotone maps of the log-odds: the
//! contributions explain the log-odds; the calibrated probability moves the same way but is not additive in them.
//!
//! **Reasons.** See [`reasons`].

pub mod reasons;
pub(crate) mod trees;

use crate::engine::Body;
use crate::error::EvalError;
use crate::model::Model;

pub use reasons::{Adverse, Reason, ReasonRequest, DEFAULT_REASONS};
pub(crate) use trees::TreePaths;
pub use trees::Workspace;

/// What explanations of a model need beyond its body.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Attribution {
    /// A linear model: the terms themselves.
    Linear,
    /// A tree ensemble with per-node cover.
    Trees(Box<TreePaths>),
    /// A tree ensemble without cover: explanations are refused, naming the first missing key.
    NoCover { path: String },
}

/// One reason family of the model file: a deployer's code and text for a group of features.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReasonFamily {
    /// The deployer's code.
    pub code: String,
    /// The deployer's short text.
    pub text: String,
    /// The features in the family (indices into the schema).
    pub features: Vec<usize>,
}

/// The model's reason families and which family each feature is in.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct ReasonFamilies {
    pub(crate) families: Vec<ReasonFamily>,
    pub(crate) of_feature: Vec<Option<u32>>,
}

impl ReasonFamilies {
    /// The families in file order.
    pub fn families(&self) -> &[ReasonFamily] {
        &self.families
    }
    /// The family of feature `i`, if it has one.
    pub fn of_feature(&self, i: usize) -> Option<&ReasonFamily> {
        self.of_feature
            .get(i)
            .copied()
            .flatten()
            .and_then(|k| self.families.get(k as usize))
    }
}

/// Why a row could not be explained.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ExplainError {
    /// A tree ensemble whose file has no per-node cover.
    #[error(
        "this model cannot be explained: its trees have no per-node cover (`{path}` is missing); export it \
         again with an exporter that writes `cover` (model format version 2)"
    )]
    NoCover {
        /// The first missing key.
        path: String,
    },
    /// The row could not be evaluated.
    #[error(transparent)]
    Eval(#[from] EvalError),
}

/// A row's contributions on the log-odds scale (see the module overview).
#[derive(Debug, Clone, PartialEq)]
pub struct Contributions {
    /// The part of the log-odds that no feature explains: for trees the cover-weighted mean output, for a
    /// linear model the intercept.
    pub bias: f64,
    /// One contribution per feature, in schema order.
    pub features: Vec<f64>,
    /// The row's log-odds as scoring computes it (before calibration).
    pub log_odds: f64,
}

impl Contributions {
    /// `bias + sum(features)`, in feature order.
    pub fn total(&self) -> f64 {
        self.features.iter().fold(self.bias, |a, &c| a + c)
    }
}

impl Model {
    /// Whether this model can be explained (a linear model, or trees with cover); the error says why not.
    pub fn explainable(&self) -> Result<(), ExplainError> {
        match &self.attribution {
            Attribution::NoCover { path } => Err(ExplainError::NoCover { path: path.clone() }),
            _ => Ok(()),
        }
    }

    /// The model's reason families (empty when the file has none).
    pub fn reason_families(&self) -> &ReasonFamilies {
        &self.families
    }

    /// The contributions of one dense row.
    pub fn contributions(&self, row: &[f64]) -> Result<Contributions, ExplainError> {
        self.contributions_with(row, &mut Workspace::default())
    }

    /// [`Self::contributions`] with buffers reused between calls.
    pub fn contributions_with(
        &self,
        row: &[f64],
        ws: &mut Workspace,
    ) -> Result<Contributions, ExplainError> {
        self.explainable()?;
        let margin = self.margin(row)?;
        let mut features = vec![0.0; row.len()];
        let bias = match (&self.attribution, &self.body) {
            (Attribution::Trees(paths), _) => {
                paths.add_contributions(row, &mut features, ws);
                paths.bias()
            }
            (_, Body::Linear(l)) => {
                for term in &l.terms {
                    features[term.feature()] += term.contribution(row, &self.schema)?;
                }
                l.intercept
            }
            // A tree ensemble always has `Trees` or `NoCover` (refused above).
            (_, Body::Ensemble(_)) => 0.0,
        };
        let scale = self.margin_scale.to_log_odds(1.0);
        if scale != 1.0 {
            for c in &mut features {
                *c *= scale;
            }
        }
        Ok(Contributions {
            bias: bias * scale,
            features,
            log_odds: self.margin_scale.to_log_odds(margin),
        })
    }
}

#[cfg(test)]
mod tests;
