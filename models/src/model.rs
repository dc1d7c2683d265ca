//! The validated, in-memory form of a model file (see `docs/model-format.md`).
//!
//! Parsing and validation live in [`crate::model::load`]; evaluation in [`crate::engine`].

use crate::calibration::Calibration;
use crate::engine::Body;
use crate::schema::Schema;

pub mod load;

/// The scale of the raw margin a model's body produces.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MarginScale {
    /// The margin is the log-odds.
    LogOdds,
    /// The margin is half the log-odds (Friedman, Hastie and Tibshirani 2000).
    HalfLogOdds,
}

impl MarginScale {
    /// Log-odds from a raw margin.
    pub fn to_log_odds(self, margin: f64) -> f64 {
        match self {
            MarginScale::LogOdds => margin,
            MarginScale::HalfLogOdds => 2.0 * margin,
        }
    }

    /// The name used in the model file.
    pub fn as_str(self) -> &'static str {
        match self {
            MarginScale::LogOdds => "log_odds",
            MarginScale::HalfLogOdds => "half_log_odds",
        }
    }
}

/// Which odds a points scale is built on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OddsOf {
    /// Odds of the negative class, `exp(-h)`: the credit convention, the score rises as risk falls.
    Negative,
    /// Odds of the positive class, `exp(h)`.
    Positive,
}

/// Points to double the odds (Siddiqi 2006): `score = points + pdo / ln 2 * (ln(odds) - ln(at_odds))`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ScoreScale {
    /// Points given at odds `at_odds`.
    pub points: f64,
    /// The odds at which the score equals `points`.
    pub at_odds: f64,
    /// Points that double the odds.
    pub pdo: f64,
    /// Which class's odds.
    pub odds_of: OddsOf,
}

impl ScoreScale {
    /// The scaled score for adjusted log-odds `h` (of the positive class).
    pub fn score(&self, h: f64) -> f64 {
        let ln_odds = match self.odds_of {
            OddsOf::Negative => -h,
            OddsOf::Positive => h,
        };
        self.points + self.pdo / std::f64::consts::LN_2 * (ln_odds - self.at_odds.ln())
    }
}

/// What a reference distribution's bins are measured on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DistributionScale {
    /// The final probability.
    Probability,
    /// The adjusted log-odds.
    LogOdds,
}

/// Expected share of scores per bin; bins `(edges[i-1], edges[i]]`, the first open below, the last open above.
#[derive(Debug, Clone, PartialEq)]
pub struct ReferenceDistribution {
    /// What the bins are measured on.
    pub on: DistributionScale,
    /// Interior cut points, strictly increasing.
    pub edges: Vec<f64>,
    /// One more than `edges`, summing to 1.
    pub fractions: Vec<f64>,
}

impl ReferenceDistribution {
    /// The bin of value `v`: the number of edges strictly below it.
    pub fn bin_of(&self, v: f64) -> usize {
        self.edges.partition_point(|&e| e < v)
    }
}

/// Which kind of body a model has.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BodyKind {
    /// A tree ensemble.
    Ensemble,
    /// A linear model.
    Linear,
}

/// Counts that describe a model, for `probity check` and model listings.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelSummary {
    /// Ensemble or linear.
    pub kind: BodyKind,
    /// Number of trees (0 for a linear model).
    pub trees: usize,
    /// Total nodes over all trees, leaves included.
    pub nodes: usize,
    /// Total leaves.
    pub leaves: usize,
    /// Largest depth of any tree (a single leaf has depth 0).
    pub max_depth: usize,
    /// Number of linear terms (0 for an ensemble).
    pub terms: usize,
    /// Bytes held by the compiled trees or terms (the engine's arrays, not the file).
    pub engine_bytes: usize,
}

/// A loaded and validated model.
#[derive(Debug, Clone)]
pub struct Model {
    pub(crate) name: String,
    pub(crate) version: String,
    pub(crate) metadata: serde_json::Value,
    pub(crate) schema: Schema,
    pub(crate) margin_scale: MarginScale,
    pub(crate) base_rate: f64,
    pub(crate) serving_base_rate: Option<f64>,
    pub(crate) body: Body,
    pub(crate) calibration: Option<Calibration>,
    pub(crate) reference: Option<ReferenceDistribution>,
    pub(crate) score_scale: Option<ScoreScale>,
    /// What explanations need beyond the body (per-node covers of a tree ensemble).
    pub(crate) attribution: crate::explain::Attribution,
    /// The deployer's reason families (empty when the file has none).
    pub(crate) families: crate::explain::ReasonFamilies,
    /// Each feature's training distribution, when the file states it (`features[i].training_distribution`).
    pub(crate) distributions: Vec<Option<crate::stability::TrainingDistribution>>,
}

impl Model {
    /// The model's name.
    pub fn name(&self) -> &str {
        &self.name
    }
    /// The model's version.
    pub fn version(&self) -> &str {
        &self.version
    }
    /// Free-form metadata from the file (`null` when absent).
    pub fn metadata(&self) -> &serde_json::Value {
        &self.metadata
    }
    /// The feature schema, in dense-row order.
    pub fn schema(&self) -> &Schema {
        &self.schema
    }
    /// The scale of the raw margin.
    pub fn margin_scale(&self) -> MarginScale {
        self.margin_scale
    }
    /// Base rate of the data the model (or its calibration) was fitted on.
    pub fn base_rate(&self) -> f64 {
        self.base_rate
    }
    /// The base rate of the population the model is meant to serve, when the file says it (`serving_base_rate`):
    /// the target that offline scoring uses when none is given.
    pub fn serving_base_rate(&self) -> Option<f64> {
        self.serving_base_rate
    }
    /// The calibration map, if any.
    pub fn calibration(&self) -> Option<&Calibration> {
        self.calibration.as_ref()
    }
    /// The reference score distribution, if any.
    pub fn reference_distribution(&self) -> Option<&ReferenceDistribution> {
        self.reference.as_ref()
    }
    /// The points scale, if any.
    pub fn score_scale(&self) -> Option<&ScoreScale> {
        self.score_scale.as_ref()
    }
    /// The training distribution of feature `i`, when the file states it.
    pub fn training_distribution(
        &self,
        i: usize,
    ) -> Option<&crate::stability::TrainingDistribution> {
        self.distributions.get(i)?.as_ref()
    }
    /// The features that carry a training distribution, in schema order: (index, distribution).
    pub fn training_distributions(
        &self,
    ) -> impl Iterator<Item = (usize, &crate::stability::TrainingDistribution)> {
        self.distributions
            .iter()
            .enumerate()
            .filter_map(|(i, d)| d.as_ref().map(|d| (i, d)))
    }
}
