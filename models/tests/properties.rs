//! Property tests (proptest): random tree ensembles against an independent recursive evaluator, batch against
//! single rows bit for bit, mutated model files never panic, and the link functions' idsubjects and bounds.
//!
//! The reference evaluator below is written from `docs/model-format.md` (Tree ensemble, Dense row encoding) and
//! shares no code with the engine: it recurses over the generated tree, where the engine walks a compiled flat
//! array with a loop.

use probity_models::link::{log_sigmoid, logit, sigmoid, softplus};
use probity_models::{Model, UNKNOWN_CATEGORY};
use proptest::prelude::*;
use serde_json::{json, Value};

/// The generated schema: two numeric features, a categorical one with 3 categories, one with 700 (so that a left
/// set with a few large indices is stored as a list and a dense one as a multi-word bitset), a third numeric.
const CATEGORIES: [usize; 5] = [0, 0, 3, 700, 0];

#[derive(Debug, Clone)]
enum Tree {
    Leaf(f64),
    Numeric {
        feature: usize,
        le: bool,
        threshold: f64,
        missing_left: bool,
        left: Box<Tree>,
        right: Box<Tree>,
    },
    Categorical {
        feature: usize,
        left_set: Vec<u32>,
        missing_left: bool,
        unknown_left: bool,
        left: Box<Tree>,
        right: Box<Tree>,
    },
}

/// Thresholds and row values share a grid so that equality (`<` against `<=`) and values that `f32` rounds
/// (0.1, 1e8 + 1) are hit often.
const GRID: [f64; 9] = [-2.5, -1.0, 0.0, 0.1, 0.5, 1.0, 3.0, 100_000_001.0, 1e30];

fn leaf_value() -> impl Strategy<Value = f64> {
    prop_oneof![
        4 => -10.0..10.0f64,
        1 => prop::sample::select(vec![0.0, -0.0, 1e-300, 1e300, -1e300]),
    ]
}

/// A random tree; with `numeric_only`, without categorical splits (the engine lays such trees out differently:
/// padded complete trees, walked without pointers).
fn tree(numeric_only: bool) -> impl Strategy<Value = Tree> {
    let leaf = leaf_value().prop_map(Tree::Leaf);
    leaf.prop_recursive(7, 96, 2, move |inner| {
        let numeric = (
            prop::sample::select(vec![0usize, 1, 4]),
            any::<bool>(),
            prop_oneof![prop::sample::select(GRID.to_vec()), -5.0..5.0f64],
            any::<bool>(),
            inner.clone(),
            inner.clone(),
        )
            .prop_map(
                |(feature, le, threshold, missing_left, l, r)| Tree::Numeric {
                    feature,
                    le,
                    threshold,
                    missing_left,
                    left: Box::new(l),
                    right: Box::new(r),
                },
            );
        let categorical = (
            prop::sample::select(vec![2usize, 3]),
            prop::collection::btree_set(0u32..700, 0..40),
            any::<bool>(),
            any::<bool>(),
            inner.clone(),
            inner,
        )
            .prop_map(|(feature, set, missing_left, unknown_left, l, r)| {
                Tree::Categorical {
                    feature,
                    left_set: set
                        .into_iter()
                        .filter(|&c| (c as usize) < CATEGORIES[feature])
                        .collect(),
                    missing_left,
                    unknown_left,
                    left: Box::new(l),
                    right: Box::new(r),
                }
            });
        if numeric_only {
            numeric.boxed()
        } else {
            prop_oneof![numeric, categorical].boxed()
        }
    })
}

/// The value a tree gives a row, by recursion, from the format's rules.
fn reference_leaf(tree: &Tree, row: &[f64], float32: bool) -> f64 {
    match tree {
        Tree::Leaf(v) => *v,
        Tree::Numeric {
            feature,
            le,
            threshold,
            missing_left,
            left,
            right,
        } => {
            let x = row[*feature];
            let go_left = if x.is_nan() {
                *missing_left
            } else {
                let x = if float32 { x as f32 as f64 } else { x };
                if *le {
                    x <= *threshold
                } else {
                    x < *threshold
                }
            };
            reference_leaf(if go_left { left } else { right }, row, float32)
        }
        Tree::Categorical {
            feature,
            left_set,
            missing_left,
            unknown_left,
            left,
            right,
        } => {
            let x = row[*feature];
            let n = CATEGORIES[*feature] as f64;
            let go_left = if x.is_nan() {
                *missing_left
            } else if x >= 0.0 && x < n && x.fract() == 0.0 {
                left_set.contains(&(x as u32))
            } else {
                *unknown_left
            };
            reference_leaf(if go_left { left } else { right }, row, float32)
        }
    }
}

/// The tree's nodes in breadth-first order (root 0), so that the loader has to re-lay them out in preorder.
fn nodes_json(tree: &Tree) -> Vec<Value> {
    let mut order: Vec<&Tree> = vec![tree];
    let mut i = 0;
    while i < order.len() {
        if let Tree::Numeric { left, right, .. } | Tree::Categorical { left, right, .. } = order[i]
        {
            order.push(left);
            order.push(right);
        }
        i += 1;
    }
    // In breadth-first order the children of the k-th split are at 2k+1 and 2k+2 counting splits only up to
    // there; recompute them by walking the same order.
    let mut next_child = 1;
    order
        .iter()
        .map(|t| {
            let side = |b: bool| if b { "left" } else { "right" };
            match t {
                Tree::Leaf(v) => json!({ "leaf": v }),
                Tree::Numeric {
                    feature,
                    le,
                    threshold,
                    missing_left,
                    ..
                } => {
                    let (l, r) = (next_child, next_child + 1);
                    next_child += 2;
                    json!({
                        "numeric": {"feature": feature, "op": if *le { "<=" } else { "<" },
                                    "threshold": threshold, "missing": side(*missing_left)},
                        "left": l, "right": r
                    })
                }
                Tree::Categorical {
                    feature,
                    left_set,
                    missing_left,
                    unknown_left,
                    ..
                } => {
                    let (l, r) = (next_child, next_child + 1);
                    next_child += 2;
                    json!({
                        "categorical": {"feature": feature, "left_categories": left_set,
                                        "missing": side(*missing_left), "unknown": side(*unknown_left)},
                        "left": l, "right": r
                    })
                }
            }
        })
        .collect()
}

fn model_json(base_margin: f64, float32: bool, trees: &[Tree]) -> String {
    let features: Vec<Value> = CATEGORIES
        .iter()
        .enumerate()
        .map(|(i, &n)| {
            if n == 0 {
                json!({"name": format!("x{i}"), "type": "numeric"})
            } else {
                let cats: Vec<String> = (0..n).map(|c| format!("c{c}")).collect();
                json!({"name": format!("x{i}"), "type": "categorical", "categories": cats})
            }
        })
        .collect();
    let trees: Vec<Value> = trees
        .iter()
        .map(|t| json!({"nodes": nodes_json(t)}))
        .collect();
    json!({
        "format": "probity.model", "format_version": 1, "name": "prop", "version": "1",
        "features": features, "margin_scale": "log_odds", "base_rate": 0.1,
        "ensemble": {"base_margin": base_margin,
                     "split_precision": if float32 { "float32" } else { "float64" },
                     "trees": trees}
    })
    .to_string()
}

fn row_value(n: usize) -> BoxedStrategy<f64> {
    if n == 0 {
        prop_oneof![
            3 => prop::sample::select(GRID.to_vec()),
            2 => -5.0..5.0f64,
            1 => Just(f64::NAN),
            1 => prop::sample::select(vec![f64::MAX, -f64::MAX, f64::MIN_POSITIVE, -0.0]),
        ]
        .boxed()
    } else {
        prop_oneof![
            4 => (0..n).prop_map(|c| c as f64),
            1 => Just(f64::NAN),
            1 => prop::sample::select(vec![UNKNOWN_CATEGORY, n as f64, 1.5, -0.0, 1e9]),
        ]
        .boxed()
    }
}

fn rows(max: usize) -> impl Strategy<Value = Vec<Vec<f64>>> {
    let row: Vec<BoxedStrategy<f64>> = CATEGORIES.iter().map(|&n| row_value(n)).collect();
    prop::collection::vec(row, 1..max)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    /// Margins of random ensembles equal the recursive reference bit for bit (same summation order: base margin,
    /// then trees in file order), one row at a time and as a batch. Up to 19 trees, so that groups of 8 trees
    /// walked together for one row are full, partial, numeric-only or not.
    #[test]
    fn ensembles_match_the_recursive_reference(
        base in -3.0..3.0f64,
        float32 in any::<bool>(),
        trees in any::<bool>().prop_flat_map(|numeric_only| prop::collection::vec(tree(numeric_only), 1..20)),
        rows in rows(30),
    ) {
        let model = Model::from_json_str(&model_json(base, float32, &trees)).unwrap();
        let mut flat = Vec::new();
        for row in &rows {
            flat.extend_from_slice(row);
        }
        let mut batch = vec![f64::NAN; rows.len()];
        model.margins(&flat, &mut batch).unwrap();
        for (r, row) in rows.iter().enumerate() {
            let mut want = base;
            for t in &trees {
                want += reference_leaf(t, row, float32);
            }
            let single = model.margin(row).unwrap();
            prop_assert_eq!(single.to_bits(), want.to_bits(), "row {} {:?}", r, row);
            prop_assert_eq!(batch[r].to_bits(), single.to_bits(), "batch row {}", r);
        }
    }

    /// sigmoid is in [0, 1], never NaN for a non-NaN input, and non-decreasing.
    #[test]
    fn sigmoid_is_bounded_and_monotone(a in any::<f64>(), b in any::<f64>()) {
        prop_assume!(!a.is_nan() && !b.is_nan());
        let (lo, hi) = if a <= b { (a, b) } else { (b, a) };
        let (sl, sh) = (sigmoid(lo), sigmoid(hi));
        prop_assert!((0.0..=1.0).contains(&sl) && (0.0..=1.0).contains(&sh));
        prop_assert!(sl <= sh, "sigmoid({lo}) = {sl} > sigmoid({hi}) = {sh}");
    }

    /// softplus is finite for finite input, at least max(0, x), non-decreasing, and
    /// softplus(x) - softplus(-x) = x (since ln(1 + e^x) - ln(1 + e^-x) = ln(e^x) = x; an algebraic identity).
    #[test]
    fn softplus_bounds_monotone_and_identity(a in -1e6..1e6f64, b in -1e6..1e6f64) {
        let (lo, hi) = if a <= b { (a, b) } else { (b, a) };
        prop_assert!(softplus(lo).is_finite());
        prop_assert!(softplus(lo) >= lo.max(0.0));
        prop_assert!(softplus(lo) <= softplus(hi));
        let d = softplus(a) - softplus(-a);
        prop_assert!((d - a).abs() <= 4.0 * f64::EPSILON * a.abs().max(1.0), "a={a} d={d}");
        prop_assert!(log_sigmoid(a) <= 0.0 && !log_sigmoid(a).is_nan());
    }

    /// logit inverts sigmoid where the probability is not rounded to 0 or 1 (|h| < 30), to a relative error that
    /// grows with |h| as 1 - p loses digits; logit is non-decreasing on [0, 1] and never NaN there.
    #[test]
    fn logit_inverts_sigmoid_and_is_monotone(h in -30.0..30.0f64, p in 0.0..=1.0f64, q in 0.0..=1.0f64) {
        let back = logit(sigmoid(h));
        prop_assert!((back - h).abs() <= 1e-15 * h.abs().exp() * 8.0 + 1e-12, "h={h} back={back}");
        let (lo, hi) = if p <= q { (p, q) } else { (q, p) };
        prop_assert!(!logit(lo).is_nan());
        prop_assert!(logit(lo) <= logit(hi));
    }
}

/// Seed files for the mutation property: small valid models of every body kind.
const SEEDS: [&str; 4] = [
    include_str!("../../fuzz/models/fuzz-trees.json"),
    include_str!("../../fuzz/models/fuzz-linear.json"),
    include_str!("../../service/demo/harbourline-fraud-scorecard.json"),
    include_str!("../../tests/fixtures/models/sklearn_logreg_spector.json"),
];

/// One change to a JSON value at a position chosen by `pick`.
#[derive(Debug, Clone)]
enum Edit {
    /// Replace a value with another (number, string, null, array, object).
    Replace(Value),
    /// Remove an object key or array element.
    Remove,
    /// Duplicate an array element.
    Duplicate,
}

fn edit() -> impl Strategy<Value = Edit> {
    let value = prop_oneof![
        prop::sample::select(vec![
            json!(0),
            json!(-1),
            json!(1),
            json!(2),
            json!(3),
            json!(4294967295u64),
            json!(4294967296u64),
            json!(-0.0),
            json!(0.5),
            json!(1e308),
            json!(-1e308),
            json!(5e-324),
            json!(1.0),
            json!(7),
            json!(null),
            json!(true),
            json!(""),
            json!("left"),
            json!("right"),
            json!("<"),
            json!("<="),
            json!("log_odds"),
            json!("numeric"),
            json!("categorical"),
            json!([]),
            json!({}),
            json!([0, 0]),
            json!({"leaf": 1.0}),
            json!({"numeric": {}}),
        ]),
        any::<f64>()
            .prop_filter("JSON numbers are finite", |x| x.is_finite())
            .prop_map(|x| json!(x)),
        any::<i64>().prop_map(|x| json!(x)),
        "[a-z_<=]{0,12}".prop_map(Value::String),
    ];
    prop_oneof![
        6 => value.prop_map(Edit::Replace),
        2 => Just(Edit::Remove),
        1 => Just(Edit::Duplicate),
    ]
}

/// Number of values in the document (every node of the JSON tree).
fn count(v: &Value) -> usize {
    1 + match v {
        Value::Array(a) => a.iter().map(count).sum(),
        Value::Object(o) => o.values().map(count).sum(),
        _ => 0,
    }
}

/// Applies `edit` to the `target`-th value in preorder; `seen` counts values passed so far.
fn apply(v: &mut Value, target: usize, seen: &mut usize, edit: &Edit) -> bool {
    let len = match v {
        Value::Array(a) => a.len(),
        Value::Object(o) => o.len(),
        _ => 0,
    };
    *seen += 1;
    for k in 0..len {
        if *seen == target {
            match (v, edit) {
                (Value::Array(a), Edit::Replace(new)) => a[k] = new.clone(),
                (Value::Array(a), Edit::Remove) => {
                    a.remove(k);
                }
                (Value::Array(a), Edit::Duplicate) => {
                    let copy = a[k].clone();
                    a.insert(k, copy);
                }
                (Value::Object(o), Edit::Replace(new)) => {
                    *o.values_mut().nth(k).unwrap() = new.clone();
                }
                (Value::Object(o), Edit::Remove) => {
                    let key = o.keys().nth(k).unwrap().clone();
                    o.remove(&key);
                }
                (Value::Object(o), Edit::Duplicate) => {
                    let child = o.values_mut().nth(k).unwrap();
                    *child = Value::Array(vec![child.clone(), child.clone()]);
                }
                _ => unreachable!(),
            }
            return true;
        }
        let child = match v {
            Value::Array(a) => &mut a[k],
            Value::Object(o) => o.values_mut().nth(k).unwrap(),
            _ => unreachable!(),
        };
        if apply(child, target, seen, edit) {
            return true;
        }
    }
    false
}

fn check_refusal_or_model(bytes: &[u8]) -> Result<(), TestCaseError> {
    match Model::from_json_slice(bytes) {
        Ok(model) => {
            // Anything that loads evaluates a missing row and a row of zeros without panicking.
            let n = model.schema().len();
            let _ = model.margin(&vec![f64::NAN; n]);
            let _ = model.margin(&vec![0.0; n]);
        }
        Err(e) => {
            let text = e.to_string();
            prop_assert!(!text.is_empty());
            if let Some(path) = e.path() {
                prop_assert!(!path.is_empty(), "empty path in {text}");
            }
        }
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 512, ..ProptestConfig::default() })]

    /// Structured damage: up to four edits anywhere in a valid model's JSON tree. Loading refuses with a message
    /// (and a non-empty path where it gives one) or gives a model that evaluates; it never panics.
    #[test]
    fn mutated_models_never_panic(
        seed in 0..SEEDS.len(),
        edits in prop::collection::vec((any::<prop::sample::Index>(), edit()), 1..5),
    ) {
        let mut doc: Value = serde_json::from_str(SEEDS[seed]).unwrap();
        for (at, e) in &edits {
            let n = count(&doc);
            if n > 1 {
                let target = 1 + at.index(n - 1);
                apply(&mut doc, target, &mut 0, e);
            }
        }
        check_refusal_or_model(doc.to_string().as_bytes())?;
    }

    /// Byte damage: flips, cuts and insertions of JSON punctuation in a valid model's text.
    #[test]
    fn byte_damaged_models_never_panic(
        seed in 0..SEEDS.len(),
        edits in prop::collection::vec(
            (any::<prop::sample::Index>(), 0u8..4, prop::sample::select(b"{}[],:\"-0.9e\\ \x00\xff".to_vec())),
            1..8,
        ),
    ) {
        let mut bytes = SEEDS[seed].as_bytes().to_vec();
        for (at, op, b) in edits {
            if bytes.is_empty() {
                break;
            }
            let i = at.index(bytes.len());
            match op {
                0 => bytes[i] = b,
                1 => bytes.insert(i, b),
                2 => {
                    bytes.remove(i);
                }
                _ => bytes.truncate(i),
            }
        }
        check_refusal_or_model(&bytes)?;
    }
}
