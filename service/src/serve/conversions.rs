//! Every conversion between wire messages (`probity.v1`) and domain types, in one place.
//!
//! Wire messages are destructured without `..`, so a field added to the contract breaks the build here until it
//! is handled. Conversions that need the model's schema and the route's policies (a row) are functions; the
//! others are `TryFrom`/`From`. Field paths in errors follow the message structure: `row.named.values["amount"]`,
//! `rows[3].dense.values[2]`.

use std::time::UNIX_EPOCH;

use probity_models::schema::UNKNOWN_CATEGORY;
use probity_models::{BodyKind, FeatureKind, Schema, Scored};

use crate::serve::config::{MissingPolicy, Route, UnknownCategoryPolicy, UnknownFeaturePolicy};
use crate::serve::error::ServeError;
use crate::serve::proto as pb;
use crate::serve::registry::{FileProblem, FileReport, LoadedModel, Outcome};
use crate::serve::scoring::{PreparedRow, RowWarning, WarningKind};

/// Longest caller-chosen prediction id.
const MAX_PREDICTION_ID: usize = 128;
/// Longest subject key.
const MAX_SUBJECT_KEY: usize = 256;
/// Most tags on one row, and the longest tag key and value.
const MAX_TAGS: usize = 32;
const MAX_TAG_KEY: usize = 64;
const MAX_TAG_VALUE: usize = 256;
/// Longest category text that is not one of the model's categories; a longer one is refused, not routed as unknown.
pub const MAX_CATEGORY_BYTES: usize = 1024;
/// Most names in a named row that the model does not have. Each becomes a warning under the `ignore` policy, so
/// without a bound a small request could ask for a response many times its size.
pub const MAX_EXTRA_FEATURES: usize = 1024;
/// Most characters of a caller's text repeated in an error or warning message.
const SHOWN_CHARS: usize = 64;

/// A caller's text for a message: quoted, cut to [`SHOWN_CHARS`] characters with its full length when longer.
fn shown(text: &str) -> String {
    if text.chars().count() <= SHOWN_CHARS {
        format!("{text:?}")
    } else {
        let head: String = text.chars().take(SHOWN_CHARS).collect();
        format!("{head:?}... ({} bytes)", text.len())
    }
}

/// Checks a row's identity fields and turns its features into a dense row for `schema` under `route`'s policies.
/// `field` is the row's path in the request (`row` or `rows[i]`).
pub fn prepare_row(
    row: pb::Row,
    field: &str,
    schema: &Schema,
    route: &Route,
) -> Result<PreparedRow, ServeError> {
    let pb::Row {
        prediction_id,
        subject_key,
        tags,
        features,
    } = row;
    check_identity(field, &prediction_id, &subject_key, &tags)?;
    let mut warnings = Vec::new();
    let values = match features {
        None => {
            return Err(ServeError::invalid(
                format!("{field}.features"),
                "is required: set `named` or `dense`",
            ));
        }
        Some(pb::row::Features::Named(named)) => {
            named_row(named, field, schema, route, &mut warnings)?
        }
        Some(pb::row::Features::Dense(dense)) => {
            dense_row(dense, field, schema, route, &mut warnings)?
        }
    };
    let prediction_id = if prediction_id.is_empty() {
        uuid::Uuid::now_v7().to_string()
    } else {
        prediction_id
    };
    Ok(PreparedRow {
        prediction_id,
        subject_key,
        tags,
        values,
        warnings,
    })
}

fn check_identity(
    field: &str,
    prediction_id: &str,
    subject_key: &str,
    tags: &std::collections::HashMap<String, String>,
) -> Result<(), ServeError> {
    if prediction_id.len() > MAX_PREDICTION_ID
        || !prediction_id.bytes().all(|b| b.is_ascii_graphic())
    {
        return Err(ServeError::invalid(
            format!("{field}.prediction_id"),
            format!(
                "must be at most {MAX_PREDICTION_ID} printable ASCII characters without spaces"
            ),
        ));
    }
    if subject_key.len() > MAX_SUBJECT_KEY {
        return Err(ServeError::invalid(
            format!("{field}.subject_key"),
            format!(
                "is {} bytes long, the limit is {MAX_SUBJECT_KEY}",
                subject_key.len()
            ),
        ));
    }
    if tags.len() > MAX_TAGS {
        return Err(ServeError::invalid(
            format!("{field}.tags"),
            format!("has {} entries, the limit is {MAX_TAGS}", tags.len()),
        ));
    }
    for (key, value) in tags {
        if key.is_empty() || key.len() > MAX_TAG_KEY {
            return Err(ServeError::invalid(
                format!("{field}.tags[{}]", shown(key)),
                format!("tag keys are 1 to {MAX_TAG_KEY} bytes"),
            ));
        }
        if value.len() > MAX_TAG_VALUE {
            return Err(ServeError::invalid(
                format!("{field}.tags[{}]", shown(key)),
                format!("tag values are at most {MAX_TAG_VALUE} bytes"),
            ));
        }
    }
    Ok(())
}

/// The value for a missing (or non-finite, `kind` says which) numeric or categorical feature under the policy.
fn missing(
    route: &Route,
    path: impl FnOnce() -> String,
    feature: &str,
    kind: WarningKind,
    warnings: &mut Vec<RowWarning>,
) -> Result<f64, ServeError> {
    let message = match kind {
        WarningKind::MissingFeature => "is missing",
        WarningKind::NonFiniteValue => "is not a finite number",
        WarningKind::UnknownCategory | WarningKind::IgnoredFeature => "is not usable",
    };
    match route.missing_features {
        MissingPolicy::Reject => Err(ServeError::invalid(
            path(),
            format!(
                "{message} (route `{}` rejects missing features)",
                route.name
            ),
        )),
        MissingPolicy::RouteAsMissing => {
            warnings.push(RowWarning {
                kind,
                feature: feature.to_string(),
                message: format!("{message}; routed as missing"),
            });
            Ok(f64::NAN)
        }
    }
}

fn unknown_category(
    route: &Route,
    path: impl FnOnce() -> String,
    feature: &str,
    what: String,
    warnings: &mut Vec<RowWarning>,
) -> Result<f64, ServeError> {
    match route.unknown_categories {
        UnknownCategoryPolicy::Reject => Err(ServeError::invalid(
            path(),
            format!("{what} (route `{}` rejects unknown categories)", route.name),
        )),
        UnknownCategoryPolicy::RouteAsUnknown => {
            warnings.push(RowWarning {
                kind: WarningKind::UnknownCategory,
                feature: feature.to_string(),
                message: format!("{what}; routed as an unknown category"),
            });
            Ok(UNKNOWN_CATEGORY)
        }
    }
}

fn named_row(
    named: pb::NamedFeatures,
    field: &str,
    schema: &Schema,
    route: &Route,
    warnings: &mut Vec<RowWarning>,
) -> Result<Vec<f64>, ServeError> {
    let pb::NamedFeatures { values: given } = named;
    if given.len() > schema.len() + MAX_EXTRA_FEATURES {
        return Err(ServeError::invalid(
            format!("{field}.named.values"),
            format!(
                "has {} entries; the model has {} features and a row may name at most {MAX_EXTRA_FEATURES} \
                 others",
                given.len(),
                schema.len()
            ),
        ));
    }
    // Each given name looked up once in the model's name index (a fast hash); then the features in schema
    // order, so that the first error reported does not depend on map iteration order.
    let mut slots: Vec<Option<&Option<pb::feature_value::Kind>>> = vec![None; schema.len()];
    let mut matched = 0usize;
    for (name, v) in &given {
        if let Some(slot) = schema.index_of(name).and_then(|i| slots.get_mut(i)) {
            *slot = Some(&v.kind);
            matched += 1;
        }
    }
    let mut values = Vec::with_capacity(schema.len());
    for ((index, feature), value) in schema.features().iter().enumerate().zip(slots) {
        let name = feature.name.as_str();
        let path = || format!("{field}.named.values[{name:?}]");
        let encoded = match (&feature.kind, value) {
            (_, None) | (_, Some(None)) => {
                missing(route, path, name, WarningKind::MissingFeature, warnings)?
            }
            (FeatureKind::Numeric, Some(Some(pb::feature_value::Kind::Number(x)))) => {
                if x.is_finite() {
                    *x
                } else {
                    missing(route, path, name, WarningKind::NonFiniteValue, warnings)?
                }
            }
            (FeatureKind::Numeric, Some(Some(pb::feature_value::Kind::Category(_)))) => {
                return Err(ServeError::invalid(
                    path(),
                    "is a numeric feature; send `number`, not `category`",
                ));
            }
            (FeatureKind::Categorical { .. }, Some(Some(pb::feature_value::Kind::Number(_)))) => {
                return Err(ServeError::invalid(
                    path(),
                    "is a categorical feature; send the category name as `category` (category indices go in a dense row)",
                ));
            }
            (
                FeatureKind::Categorical { categories },
                Some(Some(pb::feature_value::Kind::Category(text))),
            ) => match schema.category_of(index, text) {
                Some(i) => i as f64,
                // The offline rule for a cell (`Schema::read_text`): an empty, `NA` or `null` category is missing.
                None if matches!(
                    schema.read_text(index, text).map(|c| c.note),
                    Ok(Some(probity_models::CellNote::Missing))
                ) =>
                {
                    missing(route, path, name, WarningKind::MissingFeature, warnings)?
                }
                None if text.len() > MAX_CATEGORY_BYTES => {
                    return Err(ServeError::invalid(
                        path(),
                        format!(
                            "category {} is not one of the model's categories and longer than \
                             {MAX_CATEGORY_BYTES} bytes",
                            shown(text)
                        ),
                    ));
                }
                None => {
                    let what = format!(
                        "category {} is not one of the model's {} categories",
                        shown(text),
                        categories.len()
                    );
                    unknown_category(route, path, name, what, warnings)?
                }
            },
        };
        values.push(encoded);
    }
    if matched < given.len() {
        let mut extra: Vec<&String> = given
            .keys()
            .filter(|k| schema.index_of(k).is_none())
            .collect();
        extra.sort();
        match route.unknown_features {
            UnknownFeaturePolicy::Reject => {
                let first = shown(extra.first().map(|s| s.as_str()).unwrap_or_default());
                return Err(ServeError::invalid(
                    format!("{field}.named.values[{first}]"),
                    format!(
                        "the model has no feature {first} (route `{}` rejects unknown features)",
                        route.name
                    ),
                ));
            }
            UnknownFeaturePolicy::Ignore => {
                warnings.extend(extra.into_iter().map(|name| RowWarning {
                    kind: WarningKind::IgnoredFeature,
                    feature: if name.len() > MAX_CATEGORY_BYTES {
                        shown(name)
                    } else {
                        name.clone()
                    },
                    message: "the model has no such feature; ignored".to_string(),
                }))
            }
        }
    }
    Ok(values)
}

fn dense_row(
    dense: pb::DenseFeatures,
    field: &str,
    schema: &Schema,
    route: &Route,
    warnings: &mut Vec<RowWarning>,
) -> Result<Vec<f64>, ServeError> {
    let pb::DenseFeatures { mut values } = dense;
    if values.len() != schema.len() {
        return Err(ServeError::invalid(
            format!("{field}.dense.values"),
            format!(
                "has {} values, the model has {} features",
                values.len(),
                schema.len()
            ),
        ));
    }
    for (i, (value, feature)) in values.iter_mut().zip(schema.features()).enumerate() {
        let name = feature.name.as_str();
        let path = || format!("{field}.dense.values[{i}] ({name})");
        let x = *value;
        *value = match &feature.kind {
            _ if x.is_nan() => missing(route, path, name, WarningKind::MissingFeature, warnings)?,
            FeatureKind::Numeric if x.is_infinite() => {
                missing(route, path, name, WarningKind::NonFiniteValue, warnings)?
            }
            FeatureKind::Numeric => x,
            FeatureKind::Categorical { categories } => {
                if x >= 0.0 && x.fract() == 0.0 && x < categories.len() as f64 {
                    x
                } else {
                    let what = format!(
                        "{x} is not a category index of the model (0 to {})",
                        categories.len() - 1
                    );
                    unknown_category(route, path, name, what, warnings)?
                }
            }
        };
    }
    Ok(values)
}

/// The wire response for one scored row.
pub fn score_response(
    route: &str,
    loaded: &LoadedModel,
    role: &str,
    row: PreparedRow,
    scored: Scored,
) -> pb::ScoreResponse {
    let Scored {
        margin,
        log_odds,
        calibrated_log_odds,
        adjusted_log_odds,
        probability,
        score,
        decision,
    } = scored;
    let PreparedRow {
        prediction_id,
        subject_key: _,
        tags: _,
        values: _,
        warnings,
    } = row;
    pb::ScoreResponse {
        prediction_id,
        route: route.to_string(),
        model: loaded.model.name().to_string(),
        model_version: loaded.model.version().to_string(),
        margin,
        log_odds,
        calibrated_log_odds,
        adjusted_log_odds,
        probability,
        score,
        decision: decision.map(|d| d.as_str().to_string()),
        warnings: warnings.into_iter().map(pb::Warning::from).collect(),
        role: role.to_string(),
        explanation: None,
    }
}

impl From<RowWarning> for pb::Warning {
    fn from(w: RowWarning) -> pb::Warning {
        let RowWarning {
            kind,
            feature,
            message,
        } = w;
        let kind = match kind {
            WarningKind::MissingFeature => pb::WarningKind::MissingFeature,
            WarningKind::NonFiniteValue => pb::WarningKind::NonFiniteValue,
            WarningKind::UnknownCategory => pb::WarningKind::UnknownCategory,
            WarningKind::IgnoredFeature => pb::WarningKind::IgnoredFeature,
        };
        pb::Warning {
            kind: kind.into(),
            feature,
            message,
        }
    }
}

/// The wire description of a loaded model version.
pub fn model_info(loaded: &LoadedModel) -> pb::ModelInfo {
    let LoadedModel {
        model,
        file,
        loaded_at,
        fingerprint,
    } = loaded;
    let summary = model.summary();
    pb::ModelInfo {
        name: model.name().to_string(),
        version: model.version().to_string(),
        file: file.clone(),
        kind: match summary.kind {
            BodyKind::Ensemble => "ensemble",
            BodyKind::Linear => "linear",
        }
        .to_string(),
        feature_count: model.schema().len() as u64,
        tree_count: summary.trees as u64,
        term_count: summary.terms as u64,
        margin_scale: model.margin_scale().as_str().to_string(),
        base_rate: model.base_rate(),
        loaded_at_unix_seconds: loaded_at
            .duration_since(UNIX_EPOCH)
            .map(|d| d.as_secs() as i64)
            .unwrap_or(0),
        fingerprint: format!("{fingerprint:016x}"),
    }
}

/// The wire feature list of a schema.
pub fn feature_infos(schema: &Schema) -> Vec<pb::FeatureInfo> {
    schema
        .features()
        .iter()
        .enumerate()
        .map(|(i, f)| {
            let (kind, categories) = match &f.kind {
                FeatureKind::Numeric => (pb::FeatureType::Numeric, Vec::new()),
                FeatureKind::Categorical { categories } => {
                    (pb::FeatureType::Categorical, categories.clone())
                }
            };
            pb::FeatureInfo {
                index: i as u32,
                name: f.name.clone(),
                r#type: kind.into(),
                categories,
            }
        })
        .collect()
}

/// The wire route description; `serving` is the loaded model when the route is ready.
pub fn route_info(route: &Route, serving: Option<&LoadedModel>) -> pb::RouteInfo {
    let Route {
        name,
        model,
        output,
        missing_features,
        unknown_categories,
        unknown_features,
        challengers,
        reasons: _,
        record,
    } = route;
    let decision = match &output.decision {
        None => String::new(),
        Some(probity_models::DecisionRule::Threshold { threshold }) => {
            format!("threshold {threshold}")
        }
        Some(probity_models::DecisionRule::Costs {
            false_positive,
            false_negative,
        }) => {
            format!("costs false_positive={false_positive} false_negative={false_negative}")
        }
        Some(probity_models::DecisionRule::Bands { edges, labels }) => {
            format!("bands edges={edges:?} labels={labels:?}")
        }
    };
    pb::RouteInfo {
        name: name.clone(),
        model: model.name.clone(),
        model_version: serving
            .map(|m| m.model.version().to_string())
            .unwrap_or_default(),
        ready: serving.is_some(),
        target_base_rate: output.target_base_rate,
        decision,
        missing_features: missing_features.as_str().to_string(),
        unknown_categories: unknown_categories.as_str().to_string(),
        unknown_features: unknown_features.as_str().to_string(),
        challengers: challengers.list.iter().map(|c| c.describe()).collect(),
        record: record.as_str().into(),
    }
}

impl From<&FileProblem> for pb::FileProblem {
    fn from(p: &FileProblem) -> pb::FileProblem {
        let FileProblem { file, error } = p;
        pb::FileProblem {
            file: file.clone(),
            error: error.clone(),
        }
    }
}

impl From<FileReport> for pb::FileReload {
    fn from(r: FileReport) -> pb::FileReload {
        let FileReport {
            file,
            outcome,
            model,
            error,
        } = r;
        let outcome = match outcome {
            Outcome::Loaded => pb::ReloadOutcome::Loaded,
            Outcome::Unchanged => pb::ReloadOutcome::Unchanged,
            Outcome::Failed => pb::ReloadOutcome::Failed,
            Outcome::Removed => pb::ReloadOutcome::Removed,
        };
        let (model, model_version) = model.unwrap_or_default();
        pb::FileReload {
            file,
            outcome: outcome.into(),
            model,
            model_version,
            error: error.unwrap_or_default(),
        }
    }
}

/// What `ModelFacts` asks for.
pub enum ModelTarget {
    /// A model by name.
    Model(String),
    /// The model a route serves.
    Route(String),
}

impl TryFrom<pb::ModelFactsRequest> for ModelTarget {
    type Error = ServeError;

    fn try_from(req: pb::ModelFactsRequest) -> Result<ModelTarget, ServeError> {
        let pb::ModelFactsRequest { target } = req;
        match target {
            Some(pb::model_facts_request::Target::Model(m)) if !m.is_empty() => {
                Ok(ModelTarget::Model(m))
            }
            Some(pb::model_facts_request::Target::Route(r)) if !r.is_empty() => {
                Ok(ModelTarget::Route(r))
            }
            Some(pb::model_facts_request::Target::Model(_)) => {
                Err(ServeError::invalid("model", "is empty"))
            }
            Some(pb::model_facts_request::Target::Route(_)) => {
                Err(ServeError::invalid("route", "is empty"))
            }
            None => Err(ServeError::invalid(
                "target",
                "is required: set `model` or `route`",
            )),
        }
    }
}

/// The in-stream error for a request that failed: the same code and message the unary call would give.
pub fn row_error(status: &tonic::Status) -> pb::RowError {
    pb::RowError {
        code: status.code() as i32,
        message: status.message().to_string(),
    }
}
