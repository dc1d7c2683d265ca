//! Hostile model files: nesting deeper than the JSON reader's recursion limit is a clear error, never a stack
//! overflow, and every crash the fuzzers found (`fuzz/regressions/`) stays fixed.

use probity_models::{Model, ModelError};

/// A minimal valid model whose `metadata` holds `inner`.
fn with_metadata(inner: &str) -> String {
    format!(
        r#"{{"format":"probity.model","format_version":1,"name":"m","version":"1","metadata":{{"x":{inner}}},
        "features":[{{"name":"x","type":"numeric"}}],"margin_scale":"log_odds","base_rate":0.5,
        "linear":{{"intercept":0.0,"terms":[]}}}}"#
    )
}

/// Loads on a thread with a 2 MiB stack: Rust's default for spawned threads and tokio's for its blocking pool,
/// where the server loads model files. serde_json's recursion limit bounds the depth (and so the stack) the
/// loader can reach; without it, the 100,000-deep documents below would overflow this stack.
fn load_on_small_stack(text: String) -> Result<Model, ModelError> {
    std::thread::Builder::new()
        .stack_size(2 * 1024 * 1024)
        .spawn(move || Model::from_json_str(&text))
        .unwrap()
        .join()
        .unwrap()
}

#[test]
fn nesting_past_the_recursion_limit_is_a_clear_error() {
    // serde_json 1.x stops at 128 nested arrays/objects by default (`Deserializer::disable_recursion_limit`
    // documents the limit); the model file needs depth 4 at most outside `metadata`.
    let shallow = format!("{}1{}", "[".repeat(100), "]".repeat(100));
    let model = load_on_small_stack(with_metadata(&shallow)).unwrap();
    let mut v = &model.metadata()["x"];
    for _ in 0..100 {
        v = &v[0];
    }
    assert_eq!(v, &serde_json::json!(1), "100 levels are kept as written");
    for depth in [200, 100_000] {
        let deep = format!("{}1{}", "[".repeat(depth), "]".repeat(depth));
        let err = load_on_small_stack(with_metadata(&deep)).unwrap_err();
        let ModelError::Syntax {
            line,
            column,
            message,
        } = &err
        else {
            panic!("depth {depth}: not a syntax error: {err}");
        };
        assert!(message.contains("recursion limit exceeded"), "{err}");
        assert!(message.contains("metadata"), "the error says where: {err}");
        assert_eq!(*line, 1);
        assert!(*column > 128, "{err}");
        // Objects nest the same way.
        let deep = format!("{}1{}", r#"{"a":"#.repeat(depth), "}".repeat(depth));
        let err = load_on_small_stack(with_metadata(&deep)).unwrap_err();
        assert!(
            err.to_string().contains("recursion limit exceeded"),
            "{err}"
        );
    }
    // Deep nesting where the format expects a flat value is refused at the first wrong level, naming its path
    // (a struct may be written as an array in serde, so `features[0][0]` is the `name` that is not a string).
    let err = load_on_small_stack(
        r#"{"format":"probity.model","format_version":1,"name":"m","version":"1","features":[[[[[[[[]]]]]]]]}"#
            .to_string(),
    )
    .unwrap_err();
    assert_eq!(err.path(), Some("features[0][0]"), "{err}");
}

/// A linear model of two numeric terms with a small scale, and optionally a zero coefficient.
fn two_terms(second_coefficient: f64) -> Model {
    Model::from_json_str(&format!(
        r#"{{"format":"probity.model","format_version":1,"name":"m","version":"1",
        "features":[{{"name":"a","type":"numeric"}},{{"name":"b","type":"numeric"}}],
        "margin_scale":"log_odds","base_rate":0.5,
        "linear":{{"intercept":0.5,"terms":[
          {{"numeric":{{"feature":0,"coefficient":1.0,"center":0.0,"scale":0.01}}}},
          {{"numeric":{{"feature":1,"coefficient":{second_coefficient},"center":0.0,"scale":0.01}}}}]}}}}"#
    ))
    .unwrap()
}

/// fuzz/regressions/model_load/linear-overflow-nan-margin.json (found by the model_load target in its first
/// seconds): the scikit-learn logistic regression fixture gave a NaN margin, hence a NaN probability, for a row
/// of extreme but finite values, because standardised terms overflowed to +inf and -inf. Minimised by hand to two
/// terms; the engine now refuses such a row, naming the first overflowing feature.
#[test]
fn regression_linear_overflow_is_an_error_not_a_nan_margin() {
    let model = two_terms(1.0);
    let row = [f64::MAX, -f64::MAX];
    let err = model.margin(&row).unwrap_err();
    assert_eq!(
        err,
        probity_models::EvalError::Overflow {
            feature: "a".into(),
            contribution: f64::INFINITY
        }
    );
    assert!(
        err.to_string().contains("feature `a` contributes inf"),
        "{err}"
    );
    // The batch path names the row.
    let mut out = [0.0; 3];
    let err = model
        .margins(&[1.0, 2.0, 1.0, 2.0, f64::MAX, -f64::MAX], &mut out)
        .unwrap_err();
    assert!(
        err.to_string()
            .starts_with("row 2: the margin is not a number"),
        "{err}"
    );
    // One infinite contribution alone is a margin of +inf, probability 1: defined, so answered.
    let m = model.margin(&[f64::MAX, 1.0]).unwrap();
    assert_eq!(m, f64::INFINITY);
    assert_eq!(model.finish(m, &Default::default()).probability, 1.0);
    // A zero coefficient times an overflowing value is 0 * inf = NaN in IEEE 754: refused as well.
    let err = two_terms(0.0).margin(&[1.0, f64::MAX]).unwrap_err();
    assert!(
        matches!(err, probity_models::EvalError::Overflow { ref feature, .. } if feature == "b"),
        "{err}"
    );

    // The fuzzer's own input still loads, and extreme rows now give a margin that is a number or this error.
    let found = include_bytes!("../../fuzz/regressions/model_load/linear-overflow-nan-margin.json");
    let model = Model::from_json_slice(found).unwrap();
    let n = model.schema().len();
    for pattern in 0..4u32 {
        let row: Vec<f64> = (0..n)
            .map(|i| {
                if (i as u32 + pattern).is_multiple_of(2) {
                    f64::MAX
                } else {
                    -f64::MAX
                }
            })
            .collect();
        match model.margin(&row) {
            Ok(m) => assert!(!m.is_nan()),
            Err(e) => assert!(
                matches!(e, probity_models::EvalError::Overflow { .. }),
                "{e}"
            ),
        }
    }
}
