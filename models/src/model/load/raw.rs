//! The model file as written, before any rule is checked: serde structs that refuse unknown keys.
//!
//! A node, a linear term and a calibration are written as an object with one kind key (`leaf`, `numeric`, ...).
//! They are read into structs of optional fields rather than serde enums so that the "exactly one kind" rule is
//! ours to check and to report with its path. Indices are `u32`: every limit of the format is below it.

use serde::Deserialize;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawModel {
    pub format: String,
    pub format_version: u64,
    pub name: String,
    pub version: String,
    pub metadata: Option<serde_json::Value>,
    pub features: Vec<RawFeature>,
    pub margin_scale: RawMarginScale,
    pub base_rate: f64,
    pub serving_base_rate: Option<f64>,
    pub ensemble: Option<RawEnsemble>,
    pub linear: Option<RawLinear>,
    pub calibration: Option<RawCalibration>,
    pub reference_distribution: Option<RawReference>,
    pub score_scale: Option<RawScoreScale>,
    pub reason_families: Option<Vec<RawReasonFamily>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawReasonFamily {
    pub code: String,
    pub text: String,
    pub features: Vec<u32>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawMarginScale {
    LogOdds,
    HalfLogOdds,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawFeatureType {
    Numeric,
    Categorical,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawFeature {
    pub name: String,
    #[serde(rename = "type")]
    pub kind: RawFeatureType,
    pub categories: Option<Vec<String>>,
    pub training_distribution: Option<RawTrainingDistribution>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawTrainingDistribution {
    pub edges: Option<Vec<f64>>,
    pub shares: Vec<f64>,
    pub missing: f64,
    pub unknown: Option<f64>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawPrecision {
    Float64,
    Float32,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawEnsemble {
    pub base_margin: f64,
    pub split_precision: RawPrecision,
    pub trees: Vec<RawTree>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawTree {
    pub nodes: Vec<RawNode>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawNode {
    pub leaf: Option<f64>,
    pub numeric: Option<RawNumericSplit>,
    pub categorical: Option<Box<RawCategoricalSplit>>,
    pub left: Option<u32>,
    pub right: Option<u32>,
    pub cover: Option<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
pub(crate) enum RawOp {
    #[serde(rename = "<")]
    Lt,
    #[serde(rename = "<=")]
    Le,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawSide {
    Left,
    Right,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawNumericSplit {
    pub feature: u32,
    pub op: RawOp,
    pub threshold: RawThreshold,
    pub missing: RawSide,
}

/// A numeric split's threshold: a JSON number, or the text `"inf"` or `"-inf"` for an infinite one (JSON has no
/// literal for it; scikit-learn's HistGradientBoosting writes `+inf` for a split that sends every non-missing
/// value left and missing values right).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct RawThreshold(pub f64);

impl<'de> Deserialize<'de> for RawThreshold {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        #[derive(Deserialize)]
        #[serde(untagged)]
        enum Form {
            Number(f64),
            Text(String),
        }
        match Form::deserialize(d) {
            Ok(Form::Number(x)) => Ok(RawThreshold(x)),
            Ok(Form::Text(t)) if t == "inf" => Ok(RawThreshold(f64::INFINITY)),
            Ok(Form::Text(t)) if t == "-inf" => Ok(RawThreshold(f64::NEG_INFINITY)),
            Ok(Form::Text(t)) => Err(serde::de::Error::custom(format!(
                "threshold {t:?}: expected a number, \"inf\" or \"-inf\""
            ))),
            Err(_) => Err(serde::de::Error::custom(
                "threshold: expected a number, \"inf\" or \"-inf\"",
            )),
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawCategoricalSplit {
    pub feature: u32,
    pub left_categories: Vec<u32>,
    pub missing: RawSide,
    pub unknown: RawSide,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawLinear {
    pub intercept: f64,
    pub terms: Vec<RawTerm>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawTerm {
    pub numeric: Option<RawNumericTerm>,
    pub categorical: Option<RawCategoricalTerm>,
    pub binned: Option<RawBinnedTerm>,
}

fn zero() -> f64 {
    0.0
}
fn one() -> f64 {
    1.0
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawNumericTerm {
    pub feature: u32,
    pub coefficient: f64,
    #[serde(default = "zero")]
    pub center: f64,
    #[serde(default = "one")]
    pub scale: f64,
    pub missing: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawCategoricalTerm {
    pub feature: u32,
    pub coefficients: Vec<f64>,
    pub unknown: Option<f64>,
    pub missing: Option<f64>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawClosed {
    #[default]
    Left,
    Right,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawBinnedTerm {
    pub feature: u32,
    pub edges: Vec<f64>,
    #[serde(default)]
    pub closed: RawClosed,
    pub contributions: Vec<f64>,
    pub missing: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawCalibration {
    pub platt: Option<RawPlatt>,
    pub isotonic: Option<RawIsotonic>,
    pub beta: Option<RawBeta>,
    pub temperature: Option<RawTemperature>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawPlatt {
    pub a: f64,
    pub b: f64,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawIsotonicInput {
    LogOdds,
    Probability,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawIsotonic {
    pub input: RawIsotonicInput,
    pub x: Vec<f64>,
    pub y: Vec<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawBeta {
    pub a: f64,
    pub b: f64,
    pub c: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawTemperature {
    pub t: f64,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawDistributionScale {
    Probability,
    LogOdds,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawReference {
    pub on: RawDistributionScale,
    pub edges: Vec<f64>,
    pub fractions: Vec<f64>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(crate) enum RawOddsOf {
    Negative,
    Positive,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawScoreScale {
    pub points: f64,
    pub at_odds: f64,
    pub pdo: f64,
    pub odds_of: RawOddsOf,
}
