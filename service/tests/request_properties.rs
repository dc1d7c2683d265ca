//! Property tests (proptest) of the request conversion layer: random `Row` messages (arbitrary feature names,
//! values, sizes, identity fields) through `prepare_row` under every route policy never panic; a refusal is
//! INVALID_ARGUMENT, names a field under the row's path and stays short; an accepted row is a dense row of the
//! model's width whose values the engine can score.

use std::collections::HashMap;

use probity::serve::config::{MissingPolicy, Route, UnknownCategoryPolicy, UnknownFeaturePolicy};
use probity::serve::conversions::prepare_row;
use probity::serve::error::ServeError;
use probity::serve::proto as pb;
use probity::serve::status::code_of;
use probity_models::{Model, OutputSpec, UNKNOWN_CATEGORY};
use proptest::prelude::*;

/// The longest error message a caller gets back: gRPC carries it in a trailer, and a message that echoes a
/// multi-megabyte field would be refused by the transport (common practice, no single source, for the figure).
const MAX_MESSAGE_CHARS: usize = 4096;

fn model() -> Model {
    Model::from_json_str(include_str!("../../fuzz/models/fuzz-trees.json")).unwrap()
}

fn route(policy: u8) -> Route {
    Route {
        reasons: Default::default(),
        record: Default::default(),
        name: "prop".into(),
        model: "fuzz-trees".into(),
        output: OutputSpec::default(),
        missing_features: if policy & 1 == 0 {
            MissingPolicy::RouteAsMissing
        } else {
            MissingPolicy::Reject
        },
        unknown_categories: if policy & 2 == 0 {
            UnknownCategoryPolicy::RouteAsUnknown
        } else {
            UnknownCategoryPolicy::Reject
        },
        challengers: Default::default(),
        unknown_features: if policy & 4 == 0 {
            UnknownFeaturePolicy::Ignore
        } else {
            UnknownFeaturePolicy::Reject
        },
    }
}

fn number() -> impl Strategy<Value = f64> {
    prop_oneof![
        3 => -1000.0..1000.0f64,
        1 => any::<f64>(),
        1 => prop::sample::select(vec![f64::NAN, f64::INFINITY, f64::NEG_INFINITY, -0.0, 2.0, 3.0, 4.0, -1.0]),
    ]
}

/// Feature names: the model's own, near misses, and arbitrary (including empty and very long) text.
fn name() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => prop::sample::select(vec!["amount", "channel", "hour"]).prop_map(String::from),
        1 => prop::sample::select(vec!["Amount", "amount ", "", "channel\0"]).prop_map(String::from),
        1 => any::<String>(),
        1 => (1usize..20_000).prop_map(|n| "x".repeat(n)),
    ]
}

fn category() -> impl Strategy<Value = String> {
    prop_oneof![
        3 => prop::sample::select(vec!["chip", "contactless", "online", "phone", "", " chip", "NA"])
            .prop_map(String::from),
        1 => any::<String>(),
        1 => (1usize..20_000).prop_map(|n| "\u{7}".repeat(n)),
    ]
}

fn feature_value() -> impl Strategy<Value = pb::FeatureValue> {
    prop_oneof![
        number().prop_map(|x| Some(pb::feature_value::Kind::Number(x))),
        category().prop_map(|c| Some(pb::feature_value::Kind::Category(c))),
        Just(None),
    ]
    .prop_map(|kind| pb::FeatureValue { kind })
}

fn text(max: usize) -> impl Strategy<Value = String> {
    prop_oneof![
        Just(String::new()),
        "[a-z0-9-]{1,12}",
        any::<String>(),
        (max.saturating_sub(2)..max + 3).prop_map(|n| "k".repeat(n)),
        (1usize..10_000).prop_map(|n| " ".repeat(n)),
    ]
}

fn row() -> impl Strategy<Value = pb::Row> {
    let features = prop_oneof![
        prop::collection::hash_map(name(), feature_value(), 0..8)
            .prop_map(|values| Some(pb::row::Features::Named(pb::NamedFeatures { values }))),
        prop::collection::vec(number(), 0..6)
            .prop_map(|values| Some(pb::row::Features::Dense(pb::DenseFeatures { values }))),
        Just(None),
    ];
    (
        text(128),
        text(256),
        prop::collection::hash_map(text(64), text(256), 0..4),
        features,
    )
        .prop_map(|(prediction_id, subject_key, tags, features)| pb::Row {
            prediction_id,
            subject_key,
            tags: tags.into_iter().collect::<HashMap<_, _>>(),
            features,
        })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 1024, ..ProptestConfig::default() })]

    /// One rule for a cell: a number or a category sent over gRPC encodes to what the same text in a CSV cell reads
    /// as offline (`Schema::read_text`), missing and unknown alike (NaN compared as NaN).
    #[test]
    fn a_grpc_value_encodes_as_its_text_does_offline(x in number(), c in category()) {
        let model = model();
        let schema = model.schema();
        let amount = schema.index_of("amount").unwrap();
        let channel = schema.index_of("channel").unwrap();
        let row = named(vec![
            ("amount".into(), pb::feature_value::Kind::Number(x)),
            ("channel".into(), pb::feature_value::Kind::Category(c.clone())),
        ]);
        if let Ok(prepared) = prepare_row(row, "row", schema, &route(0)) {
            let same = |a: f64, b: f64| a.to_bits() == b.to_bits() || (a.is_nan() && b.is_nan());
            let offline = schema.read_text(amount, &x.to_string()).unwrap().value;
            prop_assert!(same(prepared.values[amount], offline), "{} vs {}", prepared.values[amount], offline);
            let offline = schema.read_text(channel, &c).unwrap().value;
            prop_assert!(same(prepared.values[channel], offline), "{:?}: {} vs {}", c, prepared.values[channel], offline);
        }
    }

    #[test]
    fn random_rows_are_converted_or_refused_naming_a_field(policy in 0u8..8, row in row(), field in prop::sample::select(vec!["row", "rows[7]"])) {
        let model = model();
        let schema = model.schema();
        match prepare_row(row, field, schema, &route(policy)) {
            Ok(prepared) => {
                prop_assert_eq!(prepared.values.len(), schema.len());
                for (value, feature) in prepared.values.iter().zip(schema.features()) {
                    // Numeric: finite or missing (NaN). Categorical: a category index, missing, or unknown.
                    let n = feature.categories().len();
                    let ok = value.is_nan()
                        || if n == 0 {
                            value.is_finite()
                        } else {
                            *value == UNKNOWN_CATEGORY
                                || (*value >= 0.0 && value.fract() == 0.0 && *value < n as f64)
                        };
                    prop_assert!(ok, "value {} for feature {}", value, feature.name);
                }
                prop_assert!(!prepared.prediction_id.is_empty());
                let scored = model.score(&prepared.values, &OutputSpec::default()).unwrap();
                prop_assert!((0.0..=1.0).contains(&scored.probability));
            }
            Err(error) => {
                prop_assert_eq!(code_of(&error), tonic::Code::InvalidArgument, "{}", error);
                let ServeError::InvalidField { field: at, message } = &error else {
                    return Err(TestCaseError::fail(format!("not a field error: {error}")));
                };
                prop_assert!(at.starts_with(field), "field {:?} is not under {:?}", at, field);
                prop_assert!(!message.is_empty());
                let n = error.to_string().chars().count();
                prop_assert!(n <= MAX_MESSAGE_CHARS, "error message of {} characters", n);
            }
        }
    }
}

fn named(values: Vec<(String, pb::feature_value::Kind)>) -> pb::Row {
    pb::Row {
        features: Some(pb::row::Features::Named(pb::NamedFeatures {
            values: values
                .into_iter()
                .map(|(k, v)| (k, pb::FeatureValue { kind: Some(v) }))
                .collect(),
        })),
        ..Default::default()
    }
}

fn refusal(row: pb::Row, policy: u8) -> (String, String) {
    let model = model();
    match prepare_row(row, "row", model.schema(), &route(policy)) {
        Err(ServeError::InvalidField { field, message }) => (field, message),
        other => panic!("expected a field error, got {other:?}"),
    }
}

/// Each limit a request controls inside a row gives INVALID_ARGUMENT naming the field and the limit.
#[test]
fn row_limits_have_clear_errors() {
    use pb::feature_value::Kind;
    use probity::serve::conversions::{MAX_CATEGORY_BYTES, MAX_EXTRA_FEATURES};

    // Names the model does not have: at most MAX_EXTRA_FEATURES beyond its own, under either policy.
    let mut many: Vec<(String, Kind)> = (0..MAX_EXTRA_FEATURES + 4)
        .map(|i| (format!("extra{i}"), Kind::Number(1.0)))
        .collect();
    let (field, message) = refusal(named(many.clone()), 0);
    assert_eq!(field, "row.named.values");
    assert!(
        message.contains("a row may name at most 1024 others"),
        "{message}"
    );
    many.truncate(MAX_EXTRA_FEATURES);
    let model = model();
    let ok = prepare_row(named(many), "row", model.schema(), &route(0)).unwrap();
    assert_eq!(
        ok.warnings.len(),
        MAX_EXTRA_FEATURES + 3,
        "1024 ignored + 3 missing"
    );

    // A category text longer than the limit that is not a category of the model, under the routing policy.
    let long = "z".repeat(MAX_CATEGORY_BYTES + 1);
    let (field, message) = refusal(named(vec![("channel".into(), Kind::Category(long))]), 0);
    assert_eq!(field, "row.named.values[\"channel\"]");
    assert!(message.contains("longer than 1024 bytes"), "{message}");
    assert!(
        message.contains("(1025 bytes)"),
        "the length is given, the text cut: {message}"
    );
    assert!(message.len() < 300, "{message}");
    let at_limit = "z".repeat(MAX_CATEGORY_BYTES);
    let ok = prepare_row(
        named(vec![("channel".into(), Kind::Category(at_limit))]),
        "row",
        model.schema(),
        &route(0),
    )
    .unwrap();
    assert_eq!(ok.values[1], UNKNOWN_CATEGORY);

    // Echoed caller text is cut: a 1 MB unknown feature name or tag key does not come back whole.
    let huge = "n".repeat(1 << 20);
    let (field, message) = refusal(named(vec![(huge.clone(), Kind::Number(1.0))]), 4);
    assert!(
        field.len() < 200 && message.len() < 300,
        "{field}: {message}"
    );
    assert!(message.contains("(1048576 bytes)"), "{message}");
    let mut row = named(vec![]);
    row.tags.insert(huge, "v".into());
    let (field, message) = refusal(row, 0);
    assert!(
        field.starts_with("row.tags[") && field.len() < 200,
        "{field}"
    );
    assert!(message.contains("tag keys are 1 to 64 bytes"), "{message}");
}

/// A linear model whose terms overflow on extreme values answers INVALID_ARGUMENT naming the row and feature
/// (regression for fuzz/regressions/model_load/linear-overflow-nan-margin.json, which gave a NaN probability).
#[test]
fn overflowing_linear_row_is_invalid_argument() {
    // Two terms of scale 0.01 overflow to +inf and -inf.
    let model = Model::from_json_str(
        r#"{"format":"probity.model","format_version":1,"name":"m","version":"1",
        "features":[{"name":"a","type":"numeric"},{"name":"b","type":"numeric"}],
        "margin_scale":"log_odds","base_rate":0.5,"linear":{"intercept":0.0,"terms":[
          {"numeric":{"feature":0,"coefficient":1.0,"scale":0.01}},
          {"numeric":{"feature":1,"coefficient":1.0,"scale":0.01}}]}}"#,
    )
    .unwrap();
    let engine = model.margin(&[f64::MAX, -f64::MAX]).unwrap_err();
    let error = ServeError::Eval {
        field: "rows[3]".into(),
        error: engine,
    };
    assert_eq!(code_of(&error), tonic::Code::InvalidArgument);
    let status = tonic::Status::from(error);
    assert!(
        status
            .message()
            .starts_with("rows[3]: the margin is not a number: feature `a`"),
        "{}",
        status.message()
    );
}
