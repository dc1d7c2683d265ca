//! The model file: the annotated examples load, every rule of `docs/model-format.md` has a broken file that names
//! the right JSON path, limits hold, and loading never panics on damaged input.

use probity_models::model::load::MAX_DOCUMENT_BYTES;
use probity_models::{BodyKind, Model, ModelError};

const EXAMPLES: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/../examples");
const BROKEN: &str = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/broken");

/// Removes `//` comments (outside strings) from a JSON-with-comments text.
fn strip_comments(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for line in text.lines() {
        let (mut in_string, mut escaped) = (false, false);
        let mut cut = line.len();
        let bytes = line.as_bytes();
        for (i, &b) in bytes.iter().enumerate() {
            if in_string {
                match b {
                    _ if escaped => escaped = false,
                    b'\\' => escaped = true,
                    b'"' => in_string = false,
                    _ => {}
                }
            } else if b == b'"' {
                in_string = true;
            } else if b == b'/' && bytes.get(i + 1) == Some(&b'/') {
                cut = i;
                break;
            }
        }
        out.push_str(&line[..cut]);
        out.push('\n');
    }
    out
}

fn example(name: &str) -> String {
    let text = std::fs::read_to_string(format!("{EXAMPLES}/{name}")).unwrap();
    strip_comments(&text)
}

/// Every key of the annotated examples carries a comment: each line holding a `"key":` is a comment line's
/// neighbour or carries its own comment. Keeps the examples annotated as they grow.
fn assert_every_key_commented(name: &str) {
    let text = std::fs::read_to_string(format!("{EXAMPLES}/{name}")).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    for (i, line) in lines.iter().enumerate() {
        let code = line.split("//").next().unwrap_or("");
        if !code.contains("\":") {
            continue;
        }
        let commented_above = i > 0 && lines[i - 1].trim_start().starts_with("//");
        assert!(
            commented_above || line.contains("//"),
            "{name}:{}: key without a comment: {line}",
            i + 1
        );
    }
}

#[test]
fn annotated_ensemble_example_loads() {
    assert_every_key_commented("model-annotated.jsonc");
    let model = Model::from_json_str(&example("model-annotated.jsonc")).unwrap();
    assert_eq!(model.name(), "harbourline-card-fraud");
    let s = model.summary();
    assert_eq!(s.kind, BodyKind::Ensemble);
    assert_eq!(
        (s.trees, s.nodes, s.leaves, s.max_depth, s.terms),
        (2, 8, 5, 2, 0)
    );
    assert_eq!(model.schema().index_of("hour"), Some(2));
    assert!(model.calibration().is_some());
    assert!(model.reference_distribution().is_some());
    assert!(model.explainable().is_ok(), "the example carries cover");
    assert_eq!(model.reason_families().families().len(), 2);
    assert!(model.score_scale().is_some());
    // Training distributions on features 0 and 1, none on feature 2.
    let with: Vec<usize> = model.training_distributions().map(|(i, _)| i).collect();
    assert_eq!(with, vec![0, 1]);
    let amount = model.training_distribution(0).unwrap();
    assert_eq!(amount.slots(), 6);
    assert_eq!(amount.slot_of(41.0), 2);
    assert_eq!(amount.slot_of(f64::NAN), 5);
    let channel = model.training_distribution(1).unwrap();
    assert_eq!(channel.expected(), vec![0.6, 0.3, 0.09, 0.01, 0.0]);
    assert!(model.training_distribution(2).is_none());
    // Hand-computed from the example's trees: amount 300 > 250 goes right, channel 1 (online) is in {1, 2}
    // so leaf 1.1; hour 3 < 6 so leaf 0.5. Margin = -3.5 + 1.1 + 0.5.
    assert_eq!(model.margin(&[300.0, 1.0, 3.0]).unwrap(), -3.5 + 1.1 + 0.5);
    // Missing amount goes right; unknown channel goes right (0.3); missing hour goes left (0.5).
    assert_eq!(
        model.margin(&[f64::NAN, -1.0, f64::NAN]).unwrap(),
        -3.5 + 0.3 + 0.5
    );
}

#[test]
fn annotated_scorecard_example_loads() {
    assert_every_key_commented("scorecard-annotated.jsonc");
    let model = Model::from_json_str(&example("scorecard-annotated.jsonc")).unwrap();
    let s = model.summary();
    assert_eq!(s.kind, BodyKind::Linear);
    assert_eq!((s.trees, s.nodes, s.terms), (0, 0, 3));
    // Hand-computed from the spec's formulas: -1.4 + 0.35 * ((1000 - 800) / 400) + 0.6 (partner) + bin [24, 60)
    // of months_on_book -> -0.2.
    assert_eq!(
        model.margin(&[1000.0, 2.0, 24.0]).unwrap(),
        -1.4 + 0.35 * ((1000.0 - 800.0) / 400.0) + 0.6 + -0.2
    );
}

/// One broken file per rule: file name, expected JSON path ("" for a syntax error, which has a line and column
/// instead), and a phrase of the expected message. The files are the valid models of the examples with one
/// thing broken each.
const BROKEN_FILES: &[(&str, &str, &str)] = &[
    (
        "base_rate_one",
        "base_rate",
        "must be strictly between 0 and 1, got 1",
    ),
    (
        "base_rate_overflow",
        "",
        "number out of range (inside base_rate)",
    ),
    (
        "beta_b_negative",
        "calibration.beta.b",
        "must be >= 0, got -0.5",
    ),
    (
        "binned_closed_unknown",
        "linear.terms[2].binned.closed",
        "unknown variant `both`, expected `left` or `right`",
    ),
    (
        "binned_contributions_length",
        "linear.terms[2].binned.contributions",
        "3 contributions for 3 edges; there must be one more contribution than edges",
    ),
    (
        "binned_edges_not_increasing",
        "linear.terms[2].binned.edges[2]",
        "edges must be strictly increasing: 24 follows 24",
    ),
    (
        "binned_on_categorical",
        "linear.terms[2].binned.feature",
        "feature 1 (`channel`) is categorical; this term needs a numeric feature",
    ),
    (
        "both_bodies",
        "linear",
        "the model has both `ensemble` and `linear`; exactly one is allowed",
    ),
    (
        "calibration_two_maps",
        "calibration",
        "needs exactly one of `platt`, `isotonic`, `beta` and `temperature`",
    ),
    (
        "categorical_coefficients_length",
        "linear.terms[1].categorical.coefficients",
        "2 coefficients for feature `channel`, which has 3 categories",
    ),
    (
        "categorical_no_categories",
        "features[1].categories",
        "a categorical feature needs at least one category",
    ),
    (
        "categorical_split_on_numeric",
        "ensemble.trees[0].nodes[2].categorical.feature",
        "feature 2 (`hour`) is numeric; a categorical split needs a categorical feature",
    ),
    (
        "categorical_term_on_numeric",
        "linear.terms[1].categorical.feature",
        "feature 0 (`amount`) is numeric; this term needs a categorical feature",
    ),
    (
        "categorical_without_categories_key",
        "features[1]",
        "a categorical feature needs `categories`",
    ),
    (
        "child_is_self",
        "ensemble.trees[0].nodes[2].right",
        "node 2 points to itself",
    ),
    (
        "child_out_of_range",
        "ensemble.trees[0].nodes[2].left",
        "child index 40 is out of range (tree has 5 nodes)",
    ),
    (
        "cycle",
        "ensemble.trees[0].nodes[2].right",
        "node 0 is an ancestor of node 2: the tree has a cycle",
    ),
    (
        "duplicate_category",
        "features[1].categories[2]",
        "duplicate category `pos` (also at index 0)",
    ),
    (
        "duplicate_feature",
        "features[2].name",
        "duplicate feature name `amount` (also features[0])",
    ),
    (
        "empty_feature_name",
        "features[0].name",
        "feature name is empty",
    ),
    (
        "empty_nodes",
        "ensemble.trees[1].nodes",
        "a tree needs at least one node",
    ),
    (
        "empty_trees",
        "ensemble.trees",
        "an ensemble needs at least one tree",
    ),
    (
        "feature_out_of_range",
        "ensemble.trees[1].nodes[0].numeric.feature",
        "feature index 7 is out of range (the model has 3 features)",
    ),
    (
        "format_tag",
        "format",
        "expected \"probity.model\", got \"probity.modle\"",
    ),
    (
        "format_version",
        "format_version",
        "unsupported version 3, this reader knows versions 1 to 2",
    ),
    (
        "isotonic_input_missing",
        "calibration.isotonic",
        "missing field `input`",
    ),
    (
        "isotonic_length_mismatch",
        "calibration.isotonic.y",
        "3 values of y for 4 values of x",
    ),
    (
        "isotonic_one_point",
        "calibration.isotonic.x",
        "an isotonic map needs at least 2 points, got 1",
    ),
    (
        "isotonic_x_not_increasing",
        "calibration.isotonic.x[2]",
        "must be strictly increasing: -3.5 follows -3",
    ),
    (
        "isotonic_y_decreasing",
        "calibration.isotonic.y[2]",
        "must be non-decreasing: 0.01 follows 0.02",
    ),
    (
        "isotonic_y_outside",
        "calibration.isotonic.y[3]",
        "must be in [0, 1], got 1.3",
    ),
    (
        "leaf_overflow",
        "",
        "number out of range (inside ensemble.trees[0].nodes[1].leaf)",
    ),
    (
        "leaf_with_child",
        "ensemble.trees[0].nodes[1].left",
        "a leaf has no children",
    ),
    (
        "left_category_duplicate",
        "ensemble.trees[0].nodes[2].categorical.left_categories[2]",
        "duplicate category index 1",
    ),
    (
        "left_category_out_of_range",
        "ensemble.trees[0].nodes[2].categorical.left_categories[1]",
        "category index 3 is out of range (feature `channel` has 3 categories)",
    ),
    (
        "left_equals_right",
        "ensemble.trees[1].nodes[0].right",
        "left and right are the same node 1",
    ),
    (
        "linear_term_wrong_kind",
        "linear.terms[0].numeric.feature",
        "feature 1 (`channel`) is categorical; this term needs a numeric feature",
    ),
    (
        "margin_scale_unknown",
        "margin_scale",
        "unknown variant `logit`, expected `log_odds` or `half_log_odds`",
    ),
    ("metadata_not_object", "metadata", "must be an object"),
    (
        "missing_key",
        "ensemble.trees[0].nodes[0].numeric",
        "missing field `missing`",
    ),
    (
        "name_charset",
        "name",
        "character ' ' is not allowed (only A-Z a-z 0-9 . _ -)",
    ),
    (
        "negative_child",
        "ensemble.trees[0].nodes[0].left",
        "invalid value: integer `-1`, expected u32",
    ),
    (
        "no_body",
        "$",
        "the model needs one of `ensemble` and `linear`",
    ),
    (
        "node_no_kind",
        "ensemble.trees[1].nodes[2]",
        "a node needs exactly one of `leaf`, `numeric` and `categorical`",
    ),
    (
        "node_two_kinds",
        "ensemble.trees[0].nodes[1]",
        "a node needs exactly one of `leaf`, `numeric` and `categorical`",
    ),
    (
        "numeric_feature_with_categories",
        "features[0].categories",
        "a numeric feature has no categories",
    ),
    (
        "numeric_split_on_categorical",
        "ensemble.trees[1].nodes[0].numeric.feature",
        "feature 1 (`channel`) is categorical; a numeric split needs a numeric feature",
    ),
    (
        "op_unknown",
        "ensemble.trees[1].nodes[0].numeric.op",
        "unknown variant `>`, expected `<` or `<=`",
    ),
    (
        "platt_a_not_positive",
        "calibration.platt.a",
        "must be > 0, got -0.9",
    ),
    (
        "reference_edges_not_increasing",
        "reference_distribution.edges[1]",
        "must be strictly increasing: 0.01 follows 0.01",
    ),
    (
        "reference_fraction_count",
        "reference_distribution.fractions",
        "2 fractions for 3 edges; there must be one more fraction than edges",
    ),
    (
        "reference_fraction_negative",
        "reference_distribution.fractions[0]",
        "must be in [0, 1], got -0.1",
    ),
    (
        "reference_fraction_sum",
        "reference_distribution.fractions",
        "fractions sum to 1.00999",
    ),
    (
        "scale_zero",
        "linear.terms[0].numeric.scale",
        "scale must be > 0, got 0",
    ),
    (
        "score_scale_at_odds_negative",
        "score_scale.at_odds",
        "must be > 0, got -50",
    ),
    (
        "score_scale_pdo_zero",
        "score_scale.pdo",
        "must be > 0, got 0",
    ),
    (
        "shared_node",
        "ensemble.trees[0].nodes[2].left",
        "node 1 is reached a second time (it is already a child of node 0)",
    ),
    (
        "split_without_right",
        "ensemble.trees[0].nodes[0]",
        "a split needs `right`",
    ),
    (
        "temperature_zero",
        "calibration.temperature.t",
        "must be > 0, got 0",
    ),
    (
        "term_two_kinds",
        "linear.terms[0]",
        "a term needs exactly one of `numeric`, `categorical` and `binned`",
    ),
    (
        "term_without_kind",
        "linear.terms[3]",
        "a term needs exactly one of `numeric`, `categorical` and `binned`",
    ),
    (
        "training_edges_not_increasing",
        "features[0].training_distribution.edges[1]",
        "must be strictly increasing: 100 follows 100",
    ),
    (
        "training_edges_on_categorical",
        "features[1].training_distribution.edges",
        "a categorical feature's distribution has one share per category and no edges",
    ),
    (
        "training_missing_negative",
        "features[2].training_distribution.missing",
        "must be in [0, 1], got -0.1",
    ),
    (
        "training_numeric_unknown",
        "features[0].training_distribution.unknown",
        "a numeric feature has no unknown categories",
    ),
    (
        "training_numeric_without_edges",
        "features[0].training_distribution",
        "a numeric feature's distribution needs `edges`",
    ),
    (
        "training_share_count",
        "features[1].training_distribution.shares",
        "2 shares for 3 categories; there must be one share per category",
    ),
    (
        "training_shares_sum",
        "features[0].training_distribution.shares",
        "shares, missing and unknown sum to 1.09999",
    ),
    (
        "training_too_many_bins",
        "features[0].training_distribution.edges",
        "32 edges make 33 bins; at most 32 bins are allowed",
    ),
    (
        "training_unknown_key",
        "features[0].training_distribution.bins",
        "unknown field `bins`",
    ),
    ("trailing_characters", "", "trailing characters"),
    (
        "truncated",
        "",
        "EOF while parsing an object (inside ensemble.trees[0].nodes[3])",
    ),
    (
        "unknown_node_key",
        "ensemble.trees[0].nodes[3].weight",
        "unknown field `weight`",
    ),
    ("unknown_top_key", "comment", "unknown field `comment`"),
    (
        "unreachable_node",
        "ensemble.trees[0].nodes[5]",
        "node 5 is not reachable from the root",
    ),
    (
        "version_too_long",
        "version",
        "must be 1 to 128 characters, got 129",
    ),
    (
        "wrong_type",
        "ensemble.trees[0].nodes[0].numeric.threshold",
        "threshold \"250\": expected a number, \"inf\" or \"-inf\"",
    ),
];

#[test]
fn every_broken_file_is_refused_with_its_path_and_rule() {
    let mut on_disk: Vec<String> = std::fs::read_dir(BROKEN)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    on_disk.sort();
    let mut listed: Vec<String> = BROKEN_FILES
        .iter()
        .map(|(f, _, _)| format!("{f}.json"))
        .collect();
    listed.sort();
    assert_eq!(
        on_disk, listed,
        "every file in tests/broken has a row in the table and back"
    );
    assert!(BROKEN_FILES.len() >= 24);
    for (file, path, fragment) in BROKEN_FILES {
        let bytes = std::fs::read(format!("{BROKEN}/{file}.json")).unwrap();
        let err = match Model::from_json_slice(&bytes) {
            Ok(_) => panic!("{file}: loaded, but it breaks a rule"),
            Err(e) => e,
        };
        let shown = err.to_string();
        assert_eq!(err.path().unwrap_or(""), *path, "{file}: {shown}");
        assert!(
            shown.contains(fragment),
            "{file}: `{shown}` lacks `{fragment}`"
        );
        if path.is_empty() {
            assert!(matches!(err, ModelError::Syntax { .. }), "{file}: {err:?}");
        } else {
            assert!(shown.starts_with(&format!("{path}: ")), "{file}: {shown}");
        }
    }
}

/// A model of `n_features` numeric features and one tree per entry of `trees`, each a single leaf.
fn leaf_model(n_features: usize, n_trees: usize) -> String {
    let features: Vec<String> = (0..n_features)
        .map(|i| format!(r#"{{"name":"f{i}","type":"numeric"}}"#))
        .collect();
    let trees = vec![r#"{"nodes":[{"leaf":0.5}]}"#; n_trees].join(",");
    format!(
        r#"{{"format":"probity.model","format_version":1,"name":"m","version":"1","features":[{}],
        "margin_scale":"log_odds","base_rate":0.5,
        "ensemble":{{"base_margin":0.0,"split_precision":"float64","trees":[{trees}]}}}}"#,
        features.join(",")
    )
}

#[test]
fn limits_of_the_format() {
    // docs/model-format.md, Limits: at most 100,000 trees and 100,000 features.
    assert_eq!(
        Model::from_json_str(&leaf_model(1, 100_000))
            .unwrap()
            .summary()
            .trees,
        100_000
    );
    let err = Model::from_json_str(&leaf_model(1, 100_001)).unwrap_err();
    assert_eq!(err.path(), Some("ensemble.trees"));
    assert!(
        err.to_string()
            .contains("100001 trees, the limit is 100000"),
        "{err}"
    );
    let err = Model::from_json_str(&leaf_model(100_001, 1)).unwrap_err();
    assert_eq!(err.path(), Some("features"));
    assert!(err.to_string().contains("100001 features"), "{err}");

    let terms = vec![r#"{"numeric":{"feature":0,"coefficient":1.0}}"#; 100_001].join(",");
    let linear = format!(
        r#"{{"format":"probity.model","format_version":1,"name":"m","version":"1",
        "features":[{{"name":"x","type":"numeric"}}],"margin_scale":"log_odds","base_rate":0.5,
        "linear":{{"intercept":0.0,"terms":[{terms}]}}}}"#
    );
    let err = Model::from_json_str(&linear).unwrap_err();
    assert_eq!(err.path(), Some("linear.terms"));
    assert!(err.to_string().contains("100001 terms"), "{err}");

    // A document over 256 MiB is refused before it is read (zeroed memory is allocated lazily).
    let big = vec![0u8; MAX_DOCUMENT_BYTES + 1];
    let err = Model::from_json_slice(&big).unwrap_err();
    assert_eq!(
        err,
        ModelError::TooLarge {
            path: "$".into(),
            what: "bytes",
            got: MAX_DOCUMENT_BYTES + 1,
            limit: MAX_DOCUMENT_BYTES
        }
    );
}

#[test]
fn deep_trees_load_and_evaluate_without_recursion() {
    // A chain of 200,000 splits: each goes right to the next split, left to a leaf. A recursive walk would
    // overflow the stack long before this depth.
    let depth = 200_000;
    let mut nodes = Vec::with_capacity(2 * depth + 1);
    for i in 0..depth {
        let (left, right) = (2 * i + 1, 2 * i + 2);
        nodes.push(format!(
            r#"{{"numeric":{{"feature":0,"op":"<","threshold":{i}.5,"missing":"left"}},"left":{left},"right":{right}}}"#
        ));
        nodes.push(format!(r#"{{"leaf":{i}.0}}"#));
    }
    nodes.push(r#"{"leaf":-1.0}"#.to_string());
    let text = format!(
        r#"{{"format":"probity.model","format_version":1,"name":"deep","version":"1",
        "features":[{{"name":"x","type":"numeric"}}],"margin_scale":"log_odds","base_rate":0.5,
        "ensemble":{{"base_margin":0.0,"split_precision":"float64","trees":[{{"nodes":[{}]}}]}}}}"#,
        nodes.join(",")
    );
    let model = Model::from_json_str(&text).unwrap();
    assert_eq!(model.summary().max_depth, depth);
    // x = 1234: first split with 1234 < i + 0.5 is i = 1234, whose left leaf is 1234.
    assert_eq!(model.margin(&[1234.0]).unwrap(), 1234.0);
    assert_eq!(model.margin(&[1e9]).unwrap(), -1.0);
}

/// A small deterministic generator (xorshift64*, Vigna 2016) for the mutation loop.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

/// Loads `bytes`; when it loads, evaluates a few rows, which must not panic either.
fn load_and_poke(bytes: &[u8]) -> bool {
    let Ok(model) = Model::from_json_slice(bytes) else {
        return false;
    };
    let n = model.schema().len();
    for v in [0.0, -1.0, 1.5, 2.0, 1e300, -1e300, f64::NAN, f64::INFINITY] {
        let row = vec![v; n];
        let _ = model.margin(&row);
        let mut out = [0.0; 2];
        let rows = vec![v; 2 * n];
        let _ = model.margins(&rows, &mut out);
    }
    let _ = model.summary();
    true
}

#[test]
fn damaged_files_never_panic() {
    const TOKENS: &[&[u8]] = &[
        b"0",
        b"1",
        b"9",
        b"-1",
        b"40",
        b"4294967296",
        b"1e999",
        b"-",
        b".",
        b"\"",
        b"{",
        b"}",
        b"[",
        b"]",
        b",",
        b":",
        b"null",
        b"true",
        b"\"left\"",
        b"\"<\"",
        b"",
        b" ",
    ];
    let mut loaded = 0;
    let mut total = 0;
    for name in ["model-annotated.jsonc", "scorecard-annotated.jsonc"] {
        let valid = example(name).into_bytes();
        // Every truncation.
        for cut in 0..valid.len() {
            total += 1;
            if load_and_poke(&valid[..cut]) {
                loaded += 1;
            }
        }
        // Random token replacements, one to three per copy.
        let mut rng = Rng(0x9E37_79B9_7F4A_7C15);
        for _ in 0..4000 {
            let mut text = valid.clone();
            for _ in 0..1 + rng.below(3) {
                let at = rng.below(text.len());
                let len = rng.below(4).min(text.len() - at);
                let token = TOKENS[rng.below(TOKENS.len())];
                text.splice(at..at + len, token.iter().copied());
            }
            total += 1;
            if load_and_poke(&text) {
                loaded += 1;
            }
        }
    }
    // Most damage is caught; some (a changed digit in a leaf value) is a valid model. Both paths were exercised.
    assert!(loaded > 0 && loaded < total, "loaded {loaded} of {total}");
}
