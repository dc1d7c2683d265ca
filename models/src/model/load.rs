//! Parsing and validation of the model file (`docs/model-format.md`).
//!
//! Two passes. The first reads the JSON into [`raw`] structs that refuse unknown keys; `serde_path_to_error`
//! gives the JSON path of a structural error. The second checks every rule of the format, builds the error's path
//! in the same style (`ensemble.trees[3].nodes[17].left`), and compiles the body for the engine. Nothing here
//! recurses on input: trees are walked with an explicit stack.

mod distribution;
mod extras;
mod linear;
mod raw;
mod trees;

use crate::engine::Body;
use crate::error::ModelError;
use crate::explain::{Attribution, ReasonFamilies};
use crate::model::{MarginScale, Model};
use crate::schema::{Feature, FeatureKind, Schema};
use crate::stability::TrainingDistribution;

use raw::{RawFeatureType, RawMarginScale, RawModel};

pub use linear::MAX_TERMS;
pub use trees::{MAX_NODES, MAX_TREES};

/// The only `format` value this reader accepts.
pub const FORMAT_TAG: &str = "probity.model";
/// The newest `format_version` this reader accepts; version 1 (no `cover`, no `reason_families`) is still read.
pub const FORMAT_VERSION: u64 = 2;
/// The oldest `format_version` this reader accepts.
pub const OLDEST_FORMAT_VERSION: u64 = 1;
/// Largest document accepted, in bytes.
pub const MAX_DOCUMENT_BYTES: usize = 256 * 1024 * 1024;
/// Longest `name` or `version`.
pub const MAX_NAME_CHARS: usize = 128;

impl Model {
    /// Parses and validates a model file held in a string.
    pub fn from_json_str(text: &str) -> Result<Model, ModelError> {
        Model::from_json_slice(text.as_bytes())
    }

    /// Parses and validates a model file held in bytes (UTF-8 JSON of at most 256 MiB).
    pub fn from_json_slice(bytes: &[u8]) -> Result<Model, ModelError> {
        if bytes.len() > MAX_DOCUMENT_BYTES {
            return Err(ModelError::TooLarge {
                path: "$".into(),
                what: "bytes",
                got: bytes.len(),
                limit: MAX_DOCUMENT_BYTES,
            });
        }
        let raw = parse(bytes)?;
        build(raw)
    }
}

/// First pass: JSON into the raw structs, with the path of any structural error.
fn parse(bytes: &[u8]) -> Result<RawModel, ModelError> {
    let mut de = serde_json::Deserializer::from_slice(bytes);
    let raw: RawModel = serde_path_to_error::deserialize(&mut de).map_err(|e| {
        let path = e.path().to_string();
        structural(path, e.into_inner(), bytes)
    })?;
    // Trailing characters after the document.
    de.end().map_err(|e| structural(String::new(), e, bytes))?;
    Ok(raw)
}

/// Classifies a serde_json error as a syntax error (with position) or a structural one (with path).
fn structural(path: String, e: serde_json::Error, bytes: &[u8]) -> ModelError {
    let (line, column) = (e.line(), e.column());
    let mut message = e.to_string();
    // serde_json appends the position; the path (or our own line/column fields) already says where.
    let suffix = format!(" at line {line} column {column}");
    if let Some(stripped) = message.strip_suffix(&suffix) {
        message = stripped.to_string();
    }
    match e.classify() {
        serde_json::error::Category::Data => ModelError::Structure {
            path: if path.is_empty() || path == "." {
                "$".into()
            } else {
                path
            },
            message,
        },
        _ => {
            // The reader knows where it was in the document, which helps with a truncated file or a number
            // out of the f64 range.
            if !path.is_empty() && path != "." {
                message = format!("{message} (inside {path})");
            }
            if e.classify() == serde_json::error::Category::Syntax
                && comment_at(bytes, line, column)
            {
                message =
                    format!("{message}: a comment? A model file is JSON, which has no comments");
            }
            ModelError::Syntax {
                line,
                column,
                message,
            }
        }
    }
}

/// Whether the text at 1-based `line` and `column` (where serde_json stopped; the column may point at the
/// character after the one that failed) starts a comment: `//`, `/*` or `#`.
fn comment_at(bytes: &[u8], line: usize, column: usize) -> bool {
    let Some(text) = bytes.split(|&b| b == b'\n').nth(line.saturating_sub(1)) else {
        return false;
    };
    let from = column.saturating_sub(2).min(text.len());
    [from, column.saturating_sub(1).min(text.len())]
        .iter()
        .any(|&i| {
            let rest = &text[i..];
            rest.starts_with(b"//") || rest.starts_with(b"/*") || rest.starts_with(b"#")
        })
}

/// Fails unless `v` is finite.
pub(super) fn finite(v: f64, path: impl FnOnce() -> String) -> Result<f64, ModelError> {
    if v.is_finite() {
        Ok(v)
    } else {
        Err(ModelError::rule(
            path(),
            format!("{v} is not a finite number"),
        ))
    }
}

/// Checks the character rule of `name` and `version`.
fn identifier(value: &str, path: &str) -> Result<String, ModelError> {
    let n = value.chars().count();
    if n == 0 || n > MAX_NAME_CHARS {
        return Err(ModelError::rule(
            path,
            format!("must be 1 to {MAX_NAME_CHARS} characters, got {n}"),
        ));
    }
    if let Some(c) = value
        .chars()
        .find(|c| !(c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '-')))
    {
        return Err(ModelError::rule(
            path,
            format!("character {c:?} is not allowed (only A-Z a-z 0-9 . _ -)"),
        ));
    }
    Ok(value.to_string())
}

/// Second pass: every rule, then the compiled model.
fn build(raw: RawModel) -> Result<Model, ModelError> {
    if raw.format != FORMAT_TAG {
        return Err(ModelError::rule(
            "format",
            format!("expected \"{FORMAT_TAG}\", got {:?}", raw.format),
        ));
    }
    if !(OLDEST_FORMAT_VERSION..=FORMAT_VERSION).contains(&raw.format_version) {
        return Err(ModelError::rule(
            "format_version",
            format!(
                "unsupported version {}, this reader knows versions {OLDEST_FORMAT_VERSION} to {FORMAT_VERSION}",
                raw.format_version
            ),
        ));
    }
    let version_2 = raw.format_version >= 2;
    let name = identifier(&raw.name, "name")?;
    let version = identifier(&raw.version, "version")?;
    let metadata = match raw.metadata {
        None => serde_json::Value::Null,
        Some(v @ serde_json::Value::Object(_)) => v,
        Some(_) => return Err(ModelError::rule("metadata", "must be an object")),
    };
    let (schema, distributions) = schema(raw.features)?;
    let margin_scale = match raw.margin_scale {
        RawMarginScale::LogOdds => MarginScale::LogOdds,
        RawMarginScale::HalfLogOdds => MarginScale::HalfLogOdds,
    };
    let base_rate = finite(raw.base_rate, || "base_rate".into())?;
    if !(base_rate > 0.0 && base_rate < 1.0) {
        return Err(ModelError::rule(
            "base_rate",
            format!("must be strictly between 0 and 1, got {base_rate}"),
        ));
    }
    let serving_base_rate = raw
        .serving_base_rate
        .map(|p| {
            let p = finite(p, || "serving_base_rate".into())?;
            if p > 0.0 && p < 1.0 {
                Ok(p)
            } else {
                Err(ModelError::rule(
                    "serving_base_rate",
                    format!("must be strictly between 0 and 1, got {p}"),
                ))
            }
        })
        .transpose()?;
    let mut attribution = Attribution::Linear;
    let body = match (raw.ensemble, raw.linear) {
        (Some(e), None) => {
            let (ensemble, paths) = trees::ensemble(e, &schema, version_2)?;
            attribution = paths;
            Body::Ensemble(Box::new(ensemble))
        }
        (None, Some(l)) => Body::Linear(linear::linear(l, &schema)?),
        (None, None) => {
            return Err(ModelError::rule(
                "$",
                "the model needs one of `ensemble` and `linear`",
            ))
        }
        (Some(_), Some(_)) => {
            return Err(ModelError::rule(
                "linear",
                "the model has both `ensemble` and `linear`; exactly one is allowed",
            ))
        }
    };
    let calibration = raw.calibration.map(extras::calibration).transpose()?;
    let reference = raw
        .reference_distribution
        .map(extras::reference)
        .transpose()?;
    let score_scale = raw.score_scale.map(extras::score_scale).transpose()?;
    let families = match raw.reason_families {
        None => ReasonFamilies::default(),
        Some(_) if !version_2 => {
            return Err(ModelError::rule(
                "reason_families",
                "needs format_version 2 or later",
            ))
        }
        Some(f) => extras::reason_families(f, &schema)?,
    };
    Ok(Model {
        name,
        version,
        metadata,
        schema,
        margin_scale,
        base_rate,
        serving_base_rate,
        body,
        calibration,
        reference,
        score_scale,
        attribution,
        families,
        distributions,
    })
}

/// The `features` array as a [`Schema`], and each feature's training distribution when it has one.
fn schema(
    raw: Vec<raw::RawFeature>,
) -> Result<(Schema, Vec<Option<TrainingDistribution>>), ModelError> {
    let mut features = Vec::with_capacity(raw.len());
    let mut raw_distributions = Vec::with_capacity(raw.len());
    for (i, f) in raw.into_iter().enumerate() {
        raw_distributions.push(f.training_distribution);
        let kind = match (f.kind, f.categories) {
            (RawFeatureType::Numeric, None) => FeatureKind::Numeric,
            (RawFeatureType::Numeric, Some(_)) => {
                return Err(ModelError::rule(
                    format!("features[{i}].categories"),
                    "a numeric feature has no categories",
                ))
            }
            (RawFeatureType::Categorical, Some(categories)) => {
                FeatureKind::Categorical { categories }
            }
            (RawFeatureType::Categorical, None) => {
                return Err(ModelError::rule(
                    format!("features[{i}]"),
                    "a categorical feature needs `categories`",
                ))
            }
        };
        features.push(Feature { name: f.name, kind });
    }
    let schema = Schema::new(features)?;
    let distributions = raw_distributions
        .into_iter()
        .zip(schema.features())
        .enumerate()
        .map(|(i, (raw, feature))| {
            raw.map(|d| distribution::training_distribution(i, feature, d))
                .transpose()
        })
        .collect::<Result<Vec<_>, _>>()?;
    Ok((schema, distributions))
}
