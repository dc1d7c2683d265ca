//! Checks of the explanations against their definitions.
//!
//! Algorithm 2 of Lundberg, Erion and Lee 2018 is checked against a brute-force evaluation of the same game:
//! the coalition values by the paper's Algorithm 1 (the path-dependent expectation, written here as a direct
//! recursive walk), and the Shapley values by their definition (Shapley 1953), summing over every coalition.

use super::*;
use crate::engine::tree::Step;
use proptest::prelude::*;
use serde_json::{json, Value};

/// A small deterministic generator (xorshift64*), so a failing seed reproduces.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// Features 0..3 numeric, 3 and 4 categorical (4 categories each).
const FEATURES: usize = 5;

fn features() -> Value {
    json!([
        {"name": "a", "type": "numeric"},
        {"name": "b", "type": "numeric"},
        {"name": "c", "type": "numeric"},
        {"name": "d", "type": "categorical", "categories": ["p", "q", "r", "s"]},
        {"name": "e", "type": "categorical", "categories": ["p", "q", "r", "s"]},
    ])
}

/// A random tree of at most `depth` levels, preorder, with covers that add up (or, with `zeros`, some zero).
fn random_tree(rng: &mut Rng, depth: usize, zeros: bool) -> Value {
    let mut nodes: Vec<Value> = Vec::new();
    // (level, cover, parent slot to fill)
    let mut stack = vec![(0usize, 100.0f64, None::<(usize, &str)>)];
    while let Some((level, cover, parent)) = stack.pop() {
        let here = nodes.len();
        if let Some((p, key)) = parent {
            nodes[p][key] = json!(here);
        }
        let leaf = level >= depth || (level > 0 && rng.below(4) == 0);
        if leaf {
            nodes.push(json!({"leaf": rng.unit() * 2.0 - 1.0, "cover": cover}));
            continue;
        }
        let f = rng.below(FEATURES as u64) as usize;
        let side = |r: &mut Rng| if r.below(2) == 0 { "left" } else { "right" };
        let mut node = if f < 3 {
            let op = if rng.below(2) == 0 { "<" } else { "<=" };
            json!({"numeric": {"feature": f, "op": op, "threshold": (rng.below(5) as f64) - 2.0, "missing": side(rng)}})
        } else {
            let left: Vec<u32> = (0..4).filter(|_| rng.below(2) == 0).collect();
            json!({"categorical": {"feature": f, "left_categories": left, "missing": side(rng), "unknown": side(rng)}})
        };
        node["cover"] = json!(cover);
        node["left"] = json!(0);
        node["right"] = json!(0);
        nodes.push(node);
        let share = if zeros && rng.below(3) == 0 {
            if rng.below(2) == 0 {
                0.0
            } else {
                1.0
            }
        } else {
            0.1 + 0.8 * rng.unit()
        };
        let (lc, rc) = (cover * share, cover * (1.0 - share));
        stack.push((level + 1, rc, Some((here, "right"))));
        stack.push((level + 1, lc, Some((here, "left"))));
    }
    json!({ "nodes": nodes })
}

fn model(trees: Vec<Value>, scale: &str) -> Model {
    let doc = json!({
        "format": "probity.model", "format_version": 2, "name": "t", "version": "1",
        "features": features(), "margin_scale": scale, "base_rate": 0.1,
        "ensemble": {"base_margin": -0.75, "split_precision": "float64", "trees": trees},
    });
    Model::from_json_str(&doc.to_string()).expect("the generated model loads")
}

fn random_row(rng: &mut Rng) -> Vec<f64> {
    (0..FEATURES)
        .map(|f| match rng.below(6) {
            0 => f64::NAN,
            // An unknown category for a categorical feature, an extreme value for a numeric one.
            1 if f >= 3 => 7.0,
            1 => f64::INFINITY,
            _ if f >= 3 => rng.below(4) as f64,
            _ => (rng.below(9) as f64) / 2.0 - 2.0,
        })
        .collect()
}

/// Algorithm 1 of the paper: the tree's expected output when only the features in `set` follow the row.
fn coalition_value(paths: &TreePaths, node: usize, row: &[f64], set: u32) -> f64 {
    match paths.trees.step(node, row) {
        Step::Leaf(v) => v,
        Step::Split {
            feature,
            left,
            right,
            goes_left,
        } => {
            if set & (1 << feature) != 0 {
                coalition_value(paths, if goes_left { left } else { right }, row, set)
            } else {
                let (zl, zr) =
                    trees::shares(paths.covers[node], paths.covers[left], paths.covers[right]);
                let mut v = 0.0;
                if zl != 0.0 {
                    v += zl * coalition_value(paths, left, row, set);
                }
                if zr != 0.0 {
                    v += zr * coalition_value(paths, right, row, set);
                }
                v
            }
        }
    }
}

/// Shapley values by definition over all `2^FEATURES` coalitions, summed over the trees (margin space).
fn brute_force(m: &Model, row: &[f64]) -> Vec<f64> {
    let Attribution::Trees(paths) = &m.attribution else {
        panic!("trees with cover expected")
    };
    let n = FEATURES;
    let fact = |k: usize| (1..=k).map(|x| x as f64).product::<f64>();
    let mut phi = vec![0.0; n];
    for &root in paths.trees.preorder_roots() {
        let v: Vec<f64> = (0..1u32 << n)
            .map(|s| coalition_value(paths, root as usize, row, s))
            .collect();
        for (i, p) in phi.iter_mut().enumerate() {
            for s in 0..1u32 << n {
                if s & (1 << i) != 0 {
                    continue;
                }
                let k = s.count_ones() as usize;
                let w = fact(k) * fact(n - k - 1) / fact(n);
                *p += w * (v[(s | 1 << i) as usize] - v[s as usize]);
            }
        }
    }
    phi
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    /// Algorithm 2 equals the Shapley values of the path-dependent game computed by definition, and the
    /// contributions plus the bias give the log-odds scoring computes.
    #[test]
    fn matches_definition_and_sums_to_log_odds(seed in 1u64.., trees in 1usize..4, depth in 0usize..6, zeros: bool) {
        let mut rng = Rng(seed);
        let m = model((0..trees).map(|_| random_tree(&mut rng, depth, zeros)).collect(), "log_odds");
        for _ in 0..4 {
            let row = random_row(&mut rng);
            let c = m.contributions(&row).expect("explainable");
            let margin = m.margin(&row).expect("a tree ensemble always scores");
            prop_assert!((c.total() - margin).abs() <= 1e-9, "sum {} margin {}", c.total(), margin);
            prop_assert_eq!(c.log_odds, margin);
            let want = brute_force(&m, &row);
            for (got, want) in c.features.iter().zip(&want) {
                prop_assert!((got - want).abs() <= 1e-9, "{:?} vs {:?}", c.features, want);
            }
        }
    }
}

#[test]
fn half_log_odds_contributions_are_doubled() {
    let mut rng = Rng(99);
    let trees: Vec<Value> = (0..3).map(|_| random_tree(&mut rng, 4, false)).collect();
    let half = model(trees.clone(), "half_log_odds");
    let full = model(trees, "log_odds");
    let row = random_row(&mut rng);
    let (h, f) = (
        half.contributions(&row).expect("explainable"),
        full.contributions(&row).expect("explainable"),
    );
    assert_eq!(h.bias, 2.0 * f.bias);
    for (a, b) in h.features.iter().zip(&f.features) {
        assert_eq!(*a, 2.0 * b);
    }
    assert_eq!(h.log_odds, 2.0 * half.margin(&row).expect("scores"));
    assert!((h.total() - h.log_odds).abs() <= 1e-9);
}

#[test]
fn single_leaf_tree_gives_its_value_as_bias() {
    let m = model(
        vec![json!({"nodes": [{"leaf": 0.4, "cover": 10.0}]})],
        "log_odds",
    );
    let row = [f64::NAN; FEATURES];
    let c = m.contributions(&row).expect("explainable");
    assert_eq!(c.features, vec![0.0; FEATURES]);
    assert_eq!(c.bias, -0.75 + 0.4);
    assert_eq!(c.total(), c.log_odds);
}

#[test]
fn zero_cover_split_and_zero_cover_child() {
    // The root's right child was never reached in training; the split under it has zero cover on both sides.
    let tree = json!({"nodes": [
        {"numeric": {"feature": 0, "op": "<=", "threshold": 0.0, "missing": "left"}, "left": 1, "right": 2, "cover": 8.0},
        {"leaf": 1.0, "cover": 8.0},
        {"numeric": {"feature": 1, "op": "<=", "threshold": 0.0, "missing": "left"}, "left": 3, "right": 4, "cover": 0.0},
        {"leaf": -2.0, "cover": 0.0},
        {"leaf": 3.0, "cover": 0.0},
    ]});
    let m = model(vec![tree], "log_odds");
    // Row goes right, then right: the zero-cover path.
    let row = [1.0, 1.0, 0.0, 0.0, 0.0];
    let c = m.contributions(&row).expect("explainable");
    assert!(c.features.iter().all(|x| x.is_finite()));
    assert!((c.total() - c.log_odds).abs() <= 1e-12);
    // The mean output is the left leaf (all the cover); feature 0 moves it to the right subtree, whose split
    // has zero cover and shares half and half, feature 1 then picks leaf 3.0. Shapley values by hand:
    // v({}) = 1, v({0}) = 0.5, v({1}) = 1, v({0,1}) = 3: phi0 = (0.5 - 1 + 3 - 1) / 2 = 0.75,
    // phi1 = (0 + 3 - 0.5) / 2 = 1.25.
    assert!((c.features[0] - 0.75).abs() < 1e-15, "{:?}", c.features);
    assert!((c.features[1] - 1.25).abs() < 1e-15, "{:?}", c.features);
    assert_eq!(c.bias, -0.75 + 1.0);
}

#[test]
fn all_missing_row_and_unknown_category_follow_the_model() {
    // Missing goes left on feature 0; an unknown category of feature 3 goes right, a missing one left.
    let tree = json!({"nodes": [
        {"numeric": {"feature": 0, "op": "<", "threshold": 1.0, "missing": "right"}, "left": 1, "right": 2, "cover": 10.0},
        {"leaf": -1.0, "cover": 6.0},
        {"categorical": {"feature": 3, "left_categories": [0, 1], "missing": "left", "unknown": "right"}, "left": 3, "right": 4, "cover": 4.0},
        {"leaf": 0.5, "cover": 3.0},
        {"leaf": 2.0, "cover": 1.0},
    ]});
    let m = model(vec![tree], "log_odds");
    for row in [
        [f64::NAN; FEATURES],
        [f64::NAN, 0.0, 0.0, 9.0, 0.0],
        [f64::NAN, 0.0, 0.0, 2.5, 0.0],
    ] {
        let c = m.contributions(&row).expect("explainable");
        let margin = m.margin(&row).expect("scores");
        assert!((c.total() - margin).abs() <= 1e-12);
        assert!(
            c.features[0] > 0.0,
            "missing feature 0 went right, above the mean"
        );
        // Features the tree never splits on get nothing.
        assert_eq!(
            (c.features[1], c.features[2], c.features[4]),
            (0.0, 0.0, 0.0)
        );
        for (got, want) in c.features.iter().zip(brute_force(&m, &row)) {
            assert!((got - want).abs() <= 1e-12, "{:?}", c.features);
        }
    }
}

#[test]
fn model_without_cover_names_the_missing_key() {
    let doc = json!({
        "format": "probity.model", "format_version": 1, "name": "t", "version": "1",
        "features": features(), "margin_scale": "log_odds", "base_rate": 0.1,
        "ensemble": {"base_margin": 0.0, "split_precision": "float64", "trees": [{"nodes": [{"leaf": 1.0}]}]},
    });
    let m = Model::from_json_str(&doc.to_string()).expect("version 1 still loads");
    let err = m.contributions(&[0.0; FEATURES]).unwrap_err();
    assert_eq!(
        err,
        ExplainError::NoCover {
            path: "ensemble.trees[0].nodes[0].cover".into()
        }
    );
    assert!(err
        .to_string()
        .contains("`ensemble.trees[0].nodes[0].cover` is missing"));
}

#[test]
fn cover_rules() {
    let doc = |version: u64, nodes: Value| {
        json!({
            "format": "probity.model", "format_version": version, "name": "t", "version": "1",
            "features": features(), "margin_scale": "log_odds", "base_rate": 0.1,
            "ensemble": {"base_margin": 0.0, "split_precision": "float64", "trees": [{"nodes": nodes}]},
        })
        .to_string()
    };
    let split = json!([
        {"numeric": {"feature": 0, "op": "<=", "threshold": 0.0, "missing": "left"}, "left": 1, "right": 2, "cover": 2.0},
        {"leaf": 1.0, "cover": 1.0},
        {"leaf": 2.0},
    ]);
    let err = Model::from_json_str(&doc(2, split.clone())).unwrap_err();
    assert_eq!(err.path(), Some("ensemble.trees[0].nodes[2].cover"));
    let err = Model::from_json_str(&doc(1, split)).unwrap_err();
    assert_eq!(err.path(), Some("ensemble.trees[0].nodes[0].cover"));
    assert!(err.to_string().contains("format_version 2"));
    let negative = json!([{"leaf": 1.0, "cover": -1.0}]);
    let err = Model::from_json_str(&doc(2, negative)).unwrap_err();
    assert_eq!(err.path(), Some("ensemble.trees[0].nodes[0].cover"));
    let err = Model::from_json_str(&doc(3, json!([{"leaf": 1.0}]))).unwrap_err();
    assert_eq!(err.path(), Some("format_version"));
}

fn scorecard(families: Value) -> Model {
    let doc = json!({
        "format": "probity.model", "format_version": 2, "name": "card", "version": "1",
        "features": [
            {"name": "age", "type": "numeric"},
            {"name": "utilisation", "type": "numeric"},
            {"name": "channel", "type": "categorical", "categories": ["branch", "online"]},
            {"name": "income", "type": "numeric"},
        ],
        "margin_scale": "log_odds", "base_rate": 0.1,
        "linear": {"intercept": -2.0, "terms": [
            {"binned": {"feature": 0, "edges": [25.0, 40.0], "contributions": [0.6, 0.1, -0.3], "missing": 0.2}},
            {"binned": {"feature": 1, "edges": [0.3, 0.7], "contributions": [-0.4, 0.2, 0.9]}},
            {"categorical": {"feature": 2, "coefficients": [0.0, 0.35]}},
            {"numeric": {"feature": 3, "coefficient": -0.5, "center": 30.0, "scale": 10.0}},
        ]},
        "reason_families": families,
    });
    Model::from_json_str(&doc.to_string()).expect("the scorecard loads")
}

#[test]
fn scorecard_points_and_shortfall_reasons() {
    let m = scorecard(json!([
        {"code": "R10", "text": "Short credit history", "features": [0]},
        {"code": "R20", "text": "High use of available credit", "features": [1]},
    ]));
    // age 30 (bin 1: 0.1), utilisation 0.8 (bin 2: 0.9), online (0.35), income 20 (-0.5 * -1 = 0.5).
    let row = [30.0, 0.8, 1.0, 20.0];
    let c = m.contributions(&row).expect("linear models explain");
    assert_eq!(c.features, vec![0.1, 0.9, 0.35, 0.5]);
    assert_eq!(c.bias, -2.0);
    assert!((c.total() - c.log_odds).abs() <= 1e-12);
    // Shortfall against the best bin: age 0.1 - (-0.3) = 0.4, utilisation 0.9 - (-0.4) = 1.3.
    let w = m.adverse_weights(&c, Adverse::Higher);
    assert!(
        (w[0] - 0.4).abs() < 1e-15 && (w[1] - 1.3).abs() < 1e-15,
        "{w:?}"
    );
    let r = m.reasons(&c, &ReasonRequest::default());
    let codes: Vec<&str> = r.iter().map(|r| r.code.as_str()).collect();
    assert_eq!(codes, ["R20", "income", "R10", "channel"]);
    let r = m.reasons(
        &c,
        &ReasonRequest {
            limit: 2,
            adverse: Adverse::Higher,
        },
    );
    assert_eq!(r.len(), 2);
    assert_eq!(r[0].text, "High use of available credit");
}

#[test]
fn reasons_group_families_and_break_ties_by_code() {
    let m = scorecard(json!([
        {"code": "B", "text": "Two features", "features": [2, 3]},
        {"code": "A", "text": "Utilisation", "features": [1]},
    ]));
    // utilisation 0.5 (bin 1: 0.2, shortfall 0.6); channel online 0.35; income 28: -0.5 * -0.2 = 0.1 -> 0.45.
    let row = [50.0, 0.5, 1.0, 28.0];
    let c = m.contributions(&row).expect("explains");
    let r = m.reasons(&c, &ReasonRequest::default());
    assert_eq!(r.len(), 2, "{r:?}");
    assert_eq!(r[0].code, "A");
    assert_eq!(r[0].features, vec![1]);
    assert_eq!(r[1].code, "B");
    assert_eq!(r[1].features, vec![2, 3]);
    assert!((r[1].weight - 0.45).abs() < 1e-12);
    // Equal weights: the code decides.
    let tie = m.reasons(
        &Contributions {
            bias: 0.0,
            features: vec![-0.3, -0.4 + 0.5, 0.25, 0.25],
            log_odds: 0.0,
        },
        &ReasonRequest::default(),
    );
    // A: 0.1 + 0.4 = 0.5 shortfall; B: 0.5.
    assert_eq!(
        tie.iter().map(|r| r.code.as_str()).collect::<Vec<_>>(),
        ["A", "B"]
    );
    // The other direction: only the features that lowered the log-odds count.
    let low = m.reasons(
        &c,
        &ReasonRequest {
            limit: 4,
            adverse: Adverse::Lower,
        },
    );
    assert!(low.iter().all(|r| r.weight > 0.0));
}

#[test]
fn reason_family_rules() {
    for (families, path) in [
        (
            json!([{"code": "", "text": "x", "features": [0]}]),
            "reason_families[0].code",
        ),
        (
            json!([{"code": "A", "text": "x", "features": [0]}, {"code": "A", "text": "y", "features": [1]}]),
            "reason_families[1].code",
        ),
        (
            json!([{"code": "A", "text": "x", "features": [9]}]),
            "reason_families[0].features[0]",
        ),
        (
            json!([{"code": "A", "text": "x", "features": [0]}, {"code": "B", "text": "y", "features": [1, 0]}]),
            "reason_families[1].features[1]",
        ),
        (
            json!([{"code": "A", "text": "", "features": [0]}]),
            "reason_families[0].text",
        ),
        (
            json!([{"code": "A", "text": "x", "features": []}]),
            "reason_families[0].features",
        ),
    ] {
        let doc = json!({
            "format": "probity.model", "format_version": 2, "name": "card", "version": "1",
            "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}],
            "margin_scale": "log_odds", "base_rate": 0.1,
            "linear": {"intercept": 0.0, "terms": [{"numeric": {"feature": 0, "coefficient": 1.0}}]},
            "reason_families": families,
        });
        let err = Model::from_json_str(&doc.to_string()).unwrap_err();
        assert_eq!(err.path(), Some(path), "{err}");
    }
}

/// Replaces every cover of the trees with an arbitrary one (zero, tiny, huge, children above their parent), as a
/// damaged file may.
fn scramble_covers(trees: &mut [Value], rng: &mut Rng) {
    for t in trees {
        let Some(nodes) = t["nodes"].as_array_mut() else {
            continue;
        };
        for n in nodes {
            let c = match rng.below(6) {
                0 => 0.0,
                1 => 1e-300 * rng.unit(),
                2 => 1e300 * rng.unit(),
                3 => f64::MIN_POSITIVE,
                _ => 100.0 * rng.unit(),
            };
            n["cover"] = json!(c);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(200))]

    /// Whatever the covers, the contributions are finite and add up to the log-odds (the fuzz target's check).
    #[test]
    fn any_covers_still_sum_to_log_odds(seed in 1u64.., trees in 1usize..4, depth in 0usize..7) {
        let mut rng = Rng(seed);
        let mut t: Vec<Value> = (0..trees).map(|_| random_tree(&mut rng, depth, true)).collect();
        scramble_covers(&mut t, &mut rng);
        let m = model(t, "half_log_odds");
        for _ in 0..4 {
            let row = random_row(&mut rng);
            let c = m.contributions(&row).expect("explainable");
            prop_assert!(c.features.iter().all(|x| x.is_finite()) && c.bias.is_finite(), "{:?}", c);
            let magnitude = c.features.iter().fold(c.bias.abs() + c.log_odds.abs(), |a, x| a + x.abs());
            prop_assert!((c.total() - c.log_odds).abs() <= 1e-9 * magnitude.max(1.0), "{:?}", c);
        }
    }
}
