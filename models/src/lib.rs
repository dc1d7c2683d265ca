//! Pure computation for probity: the model file, the scoring engine, the path from margin to a calibrated,
//! base-rate-corrected probability, scoring rules and drift statistics.
//!
//! This crate does no I/O and has no async runtime, transport or database dependency; the service crate builds on it.
//!
//! The usual path: [`Model::from_json_str`] loads and validates a model file, a dense row is built with the help of
//! [`Schema`], [`Model::margin`] evaluates it, and [`Model::score`] turns it into a [`Scored`] with log-odds,
//! probability, optional points score and decision.
#![warn(clippy::unwrap_used, clippy::expect_used)]

pub mod calibration;
pub mod compare;
pub mod decision;
pub mod engine;
pub mod error;
pub mod evaluate;
pub mod explain;
pub mod fit;
pub mod link;
pub mod metrics;
pub mod model;
pub mod monitor;
pub mod schema;
pub mod stability;
pub mod transform;

pub use calibration::{Calibration, IsotonicInput};
pub use decision::{Decision, DecisionRule};
pub use error::{CellError, EvalError, ModelError};
pub use explain::{
    Adverse, Contributions, ExplainError, Reason, ReasonFamilies, ReasonFamily, ReasonRequest,
    DEFAULT_REASONS,
};
pub use model::{
    BodyKind, MarginScale, Model, ModelSummary, OddsOf, ReferenceDistribution, ScoreScale,
};
pub use schema::{Cell, CellNote, Feature, FeatureKind, Schema, UNKNOWN_CATEGORY};
pub use stability::{DistributionBins, FeatureStability, TrainingDistribution};
pub use transform::{OutputSpec, Scored};
