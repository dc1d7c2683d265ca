//! The scoring engine on small models whose margins are computed by hand from `docs/model-format.md`, and batch
//! evaluation against single rows.

use probity_models::{EvalError, Model, UNKNOWN_CATEGORY};

/// A model file around `features` (JSON array text) and `body` (`"ensemble": {...}` or `"linear": {...}`).
fn model(features: &str, body: &str) -> Model {
    let text = format!(
        r#"{{"format":"probity.model","format_version":1,"name":"t","version":"1",
        "features":{features},"margin_scale":"log_odds","base_rate":0.1,{body}}}"#
    );
    Model::from_json_str(&text).unwrap()
}

const NUM2: &str = r#"[{"name":"x","type":"numeric"},{"name":"z","type":"numeric"}]"#;

#[test]
fn numeric_splits_both_ops_and_both_missing_sides() {
    // Tree 0: x < 5 (missing left) -> 1.0; else x <= 10 (missing right) -> 2.0 / 3.0.
    // Tree 1: z <= 0 (missing right) -> 0.25 / 0.5.
    let m = model(
        NUM2,
        r#""ensemble":{"base_margin":-1.0,"split_precision":"float64","trees":[
        {"nodes":[
          {"numeric":{"feature":0,"op":"<","threshold":5.0,"missing":"left"},"left":1,"right":2},
          {"leaf":1.0},
          {"numeric":{"feature":0,"op":"<=","threshold":10.0,"missing":"right"},"left":3,"right":4},
          {"leaf":2.0},
          {"leaf":3.0}]},
        {"nodes":[
          {"numeric":{"feature":1,"op":"<=","threshold":0.0,"missing":"right"},"left":2,"right":1},
          {"leaf":0.5},
          {"leaf":0.25}]}]}"#,
    );
    // Hand-computed: (x, z) -> base + tree 0 leaf + tree 1 leaf.
    let cases = [
        ([4.9, 0.0], -1.0 + 1.0 + 0.25),      // 4.9 < 5; 0 <= 0
        ([5.0, -3.0], -1.0 + 2.0 + 0.25),     // 5 is not < 5, 5 <= 10
        ([10.0, 0.1], -1.0 + 2.0 + 0.5),      // 10 <= 10; 0.1 > 0
        ([10.5, f64::NAN], -1.0 + 3.0 + 0.5), // 10.5 > 10; missing z goes right
        ([f64::NAN, 0.0], -1.0 + 1.0 + 0.25), // missing x goes left at the root
        ([f64::INFINITY, f64::NEG_INFINITY], -1.0 + 3.0 + 0.25),
    ];
    for (row, want) in cases {
        assert_eq!(m.margin(&row).unwrap(), want, "row {row:?}");
    }
    let s = m.summary();
    assert_eq!((s.trees, s.nodes, s.leaves, s.max_depth), (2, 8, 5, 2));
}

#[test]
fn categorical_split_known_unknown_missing() {
    let m = model(
        r#"[{"name":"c","type":"categorical","categories":["a","b","c","d"]}]"#,
        r#""ensemble":{"base_margin":0.0,"split_precision":"float64","trees":[{"nodes":[
          {"categorical":{"feature":0,"left_categories":[2,0],"missing":"left","unknown":"right"},"left":1,"right":2},
          {"leaf":-1.0},
          {"leaf":1.0}]}]}"#,
    );
    // Hand-computed from the rule: left set {a, c}; missing left; unknown (anything not an index 0..=3) right.
    let cases = [
        (0.0, -1.0),
        (1.0, 1.0),
        (2.0, -1.0),
        (3.0, 1.0),
        (f64::NAN, -1.0),
        (UNKNOWN_CATEGORY, 1.0),
        (4.0, 1.0),
        (1.5, 1.0),
        (-0.5, 1.0),
        (f64::INFINITY, 1.0),
    ];
    for (x, want) in cases {
        assert_eq!(m.margin(&[x]).unwrap(), want, "x={x}");
    }
    // The schema's text encoding feeds the same walk.
    let s = m.schema();
    assert_eq!(m.margin(&[s.encode_text(0, "c").unwrap()]).unwrap(), -1.0);
    assert_eq!(m.margin(&[s.encode_text(0, "zz").unwrap()]).unwrap(), 1.0);
    assert_eq!(m.margin(&[s.encode_text(0, "").unwrap()]).unwrap(), -1.0);
}

fn float32_model(precision: &str, op: &str) -> Model {
    model(
        r#"[{"name":"x","type":"numeric"}]"#,
        &format!(
            r#""ensemble":{{"base_margin":0.0,"split_precision":"{precision}","trees":[{{"nodes":[
          {{"numeric":{{"feature":0,"op":"{op}","threshold":0.10000000149011612,"missing":"left"}},"left":1,"right":2}},
          {{"leaf":-1.0}},
          {{"leaf":1.0}}]}}]}}"#
        ),
    )
}

#[test]
fn float32_precision_rounds_the_value_not_the_threshold() {
    // IEEE 754 binary32: the f32 nearest to 0.1 is 13421773 * 2^-27 = 0.100000001490116119384765625, written
    // here as the threshold (hand-computed; printed by `0.1f32 as f64` too, checked below).
    assert_eq!(0.1f32 as f64, 0.10000000149011612);
    // float64: 0.1 < 0.10000000149... -> left. float32: round(0.1) equals the threshold -> not `<` -> right.
    assert_eq!(float32_model("float64", "<").margin(&[0.1]).unwrap(), -1.0);
    assert_eq!(float32_model("float32", "<").margin(&[0.1]).unwrap(), 1.0);
    // With `<=` both go left.
    assert_eq!(float32_model("float64", "<=").margin(&[0.1]).unwrap(), -1.0);
    assert_eq!(float32_model("float32", "<=").margin(&[0.1]).unwrap(), -1.0);
    // A value just above the threshold in f64 but rounding down to it in f32 (hand-computed: the threshold plus
    // a quarter of its f32 spacing 2^-27 still rounds to the threshold).
    let x = 0.10000000149011612 + 2f64.powi(-29);
    assert_eq!(float32_model("float64", "<=").margin(&[x]).unwrap(), 1.0);
    assert_eq!(float32_model("float32", "<=").margin(&[x]).unwrap(), -1.0);
    // Values beyond the f32 range round to infinity and still compare.
    assert_eq!(float32_model("float32", "<").margin(&[1e300]).unwrap(), 1.0);
}

#[test]
fn base_margin_first_then_trees_in_order() {
    // With base 1e16 and two leaves of 1.0: ((1e16 + 1) + 1) rounds to 1e16 at each step (ties to even, spacing
    // 2 at 1e16), while 1e16 + (1 + 1) would be 1e16 + 2. The spec's order gives exactly 1e16 (hand-computed).
    let m = model(
        NUM2,
        r#""ensemble":{"base_margin":1e16,"split_precision":"float64","trees":[
          {"nodes":[{"leaf":1.0}]},{"nodes":[{"leaf":1.0}]}]}"#,
    );
    assert_eq!(m.margin(&[0.0, 0.0]).unwrap(), 1e16);
    let mut out = [0.0; 3];
    m.margins(&[0.0; 6], &mut out).unwrap();
    assert_eq!(out, [1e16; 3]);
}

const LINEAR_FEATURES: &str = r#"[{"name":"amount","type":"numeric"},
  {"name":"channel","type":"categorical","categories":["pos","online","atm"]},
  {"name":"hour","type":"numeric"}]"#;

fn linear_model() -> Model {
    model(
        LINEAR_FEATURES,
        r#""linear":{"intercept":-3.0,"terms":[
          {"numeric":{"feature":0,"coefficient":0.8,"center":100.0,"scale":50.0,"missing":0.1}},
          {"categorical":{"feature":1,"coefficients":[0.0,0.7,0.2],"unknown":-0.3,"missing":0.05}},
          {"binned":{"feature":2,"edges":[6.0,12.0,18.0],"contributions":[0.9,0.3,-0.1,-0.5],"missing":0.2}},
          {"binned":{"feature":2,"edges":[6.0,12.0,18.0],"closed":"right","contributions":[1.0,2.0,3.0,4.0]}},
          {"numeric":{"feature":2,"coefficient":0.01}}]}"#,
    )
}

#[test]
fn linear_terms_of_every_kind() {
    let m = linear_model();
    // Hand-computed from the spec's formulas, summed in term order. The last term has centre 0 and scale 1
    // (the defaults). Bins closed left: [6, 12) is bin 1; closed right: (6, 12] is bin 1.
    let t = |amount: f64, cat: f64, bin_l: f64, bin_r: f64, hour: f64| {
        -3.0 + amount + cat + bin_l + bin_r + 0.01 * ((hour - 0.0) / 1.0)
    };
    let cases = [
        // hour 12: closed left -> [12, 18) bin 2 (-0.1); closed right -> (6, 12] bin 1 (2.0).
        (
            [150.0, 1.0, 12.0],
            t(0.8 * ((150.0 - 100.0) / 50.0), 0.7, -0.1, 2.0, 12.0),
        ),
        // hour 6: left -> bin 1 (0.3); right -> (-inf, 6] bin 0 (1.0).
        (
            [100.0, 2.0, 6.0],
            t(0.8 * ((100.0 - 100.0) / 50.0), 0.2, 0.3, 1.0, 6.0),
        ),
        // hour 5.99: bin 0 both; unknown channel.
        (
            [40.0, 7.0, 5.99],
            t(0.8 * ((40.0 - 100.0) / 50.0), -0.3, 0.9, 1.0, 5.99),
        ),
        // hour 18: left -> bin 3 (-0.5); right -> bin 2 (3.0). Missing amount and channel.
        ([f64::NAN, f64::NAN, 18.0], t(0.1, 0.05, -0.5, 3.0, 18.0)),
        // hour 100: last bin both.
        (
            [0.0, 0.0, 100.0],
            t(0.8 * ((0.0 - 100.0) / 50.0), 0.0, -0.5, 4.0, 100.0),
        ),
    ];
    for (row, want) in cases {
        assert_eq!(m.margin(&row).unwrap(), want, "row {row:?}");
    }
    assert_eq!(m.summary().terms, 5);
}

#[test]
fn linear_missing_and_unknown_without_rules_are_errors() {
    let m = linear_model();
    // The closed-right binned term has no `missing`.
    assert_eq!(
        m.margin(&[1.0, 0.0, f64::NAN]),
        Err(EvalError::MissingValue {
            feature: "hour".into()
        })
    );
    let strict = model(
        LINEAR_FEATURES,
        r#""linear":{"intercept":0.0,"terms":[
          {"categorical":{"feature":1,"coefficients":[0.0,0.7,0.2]}},
          {"numeric":{"feature":0,"coefficient":1.0}}]}"#,
    );
    let unknown = Err(EvalError::UnknownCategory {
        feature: "channel".into(),
    });
    assert_eq!(strict.margin(&[1.0, UNKNOWN_CATEGORY, 0.0]), unknown);
    assert_eq!(strict.margin(&[1.0, 3.0, 0.0]), unknown);
    assert_eq!(strict.margin(&[1.0, 0.5, 0.0]), unknown);
    assert_eq!(
        strict.margin(&[1.0, f64::NAN, 0.0]),
        Err(EvalError::MissingValue {
            feature: "channel".into()
        })
    );
    assert_eq!(
        strict.margin(&[f64::NAN, 1.0, 0.0]),
        Err(EvalError::MissingValue {
            feature: "amount".into()
        })
    );
    assert_eq!(strict.margin(&[2.5, 1.0, 0.0]), Ok(0.0 + 0.7 + 2.5));
    // In a batch, the error names the row.
    let mut out = [0.0; 3];
    let rows = [1.0, 0.0, 0.0, 1.0, 1.0, 0.0, f64::NAN, 0.0, 0.0];
    let err = strict.margins(&rows, &mut out).unwrap_err();
    assert_eq!(
        err,
        EvalError::InRow {
            row: 2,
            error: Box::new(EvalError::MissingValue {
                feature: "amount".into()
            })
        }
    );
    assert_eq!(
        err.to_string(),
        "row 2: feature `amount` is missing and the model has no rule for a missing value"
    );
}

#[test]
fn shape_errors() {
    let m = linear_model();
    assert_eq!(
        m.margin(&[1.0, 2.0]),
        Err(EvalError::RowLength {
            expected: 3,
            got: 2
        })
    );
    let mut out = [0.0; 2];
    assert_eq!(
        m.margins(&[0.0; 5], &mut out),
        Err(EvalError::BatchShape {
            values: 5,
            out: 2,
            features: 3
        })
    );
    assert_eq!(m.margins(&[], &mut []), Ok(()));
}

/// xorshift64* (Vigna 2016), for reproducible random models and rows.
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
    fn unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A random ensemble over 3 numeric features and 1 categorical feature (70 categories, so some left sets need
/// more than one bitset word), with trees of random shape written in breadth-first order.
fn random_ensemble(rng: &mut Rng, precision: &str) -> Model {
    let mut trees = Vec::new();
    for _ in 0..40 {
        let mut nodes: Vec<String> = Vec::new();
        let mut next = 1;
        let mut i = 0;
        let target = 1 + 2 * rng.below(12);
        while i < next {
            if next + 2 <= target && rng.below(4) != 0 {
                let (l, r) = (next, next + 1);
                next += 2;
                let side = |rng: &mut Rng| if rng.below(2) == 0 { "left" } else { "right" };
                if rng.below(3) == 0 {
                    let left: Vec<String> = (0..70)
                        .filter(|_| rng.below(2) == 0)
                        .map(|c: usize| c.to_string())
                        .collect();
                    nodes.push(format!(
                        r#"{{"categorical":{{"feature":3,"left_categories":[{}],"missing":"{}","unknown":"{}"}},"left":{l},"right":{r}}}"#,
                        left.join(","), side(rng), side(rng)
                    ));
                } else {
                    let op = if rng.below(2) == 0 { "<" } else { "<=" };
                    let t = (rng.unit() * 4.0 - 2.0) as f32 as f64;
                    nodes.push(format!(
                        r#"{{"numeric":{{"feature":{},"op":"{op}","threshold":{t:?},"missing":"{}"}},"left":{l},"right":{r}}}"#,
                        rng.below(3), side(rng)
                    ));
                }
            } else {
                nodes.push(format!(r#"{{"leaf":{:?}}}"#, rng.unit() - 0.5));
            }
            i += 1;
        }
        trees.push(format!(r#"{{"nodes":[{}]}}"#, nodes.join(",")));
    }
    let cats: Vec<String> = (0..70).map(|c| format!("\"k{c}\"")).collect();
    model(
        &format!(
            r#"[{{"name":"a","type":"numeric"}},{{"name":"b","type":"numeric"}},{{"name":"c","type":"numeric"}},
            {{"name":"k","type":"categorical","categories":[{}]}}]"#,
            cats.join(",")
        ),
        &format!(
            r#""ensemble":{{"base_margin":0.125,"split_precision":"{precision}","trees":[{}]}}"#,
            trees.join(",")
        ),
    )
}

fn random_rows(rng: &mut Rng, n: usize) -> Vec<f64> {
    let mut rows = Vec::with_capacity(4 * n);
    for _ in 0..n {
        for _ in 0..3 {
            rows.push(match rng.below(10) {
                0 => f64::NAN,
                1 => (rng.unit() * 4.0 - 2.0) as f32 as f64, // lands on thresholds sometimes
                _ => rng.unit() * 4.0 - 2.0,
            });
        }
        rows.push(match rng.below(10) {
            0 => f64::NAN,
            1 => UNKNOWN_CATEGORY,
            2 => 70.0,
            _ => rng.below(70) as f64,
        });
    }
    rows
}

#[test]
fn batch_equals_single_rows_bit_for_bit() {
    let mut rng = Rng(0x0DDB_1A5E_5BAD_5EED);
    for precision in ["float64", "float32"] {
        let m = random_ensemble(&mut rng, precision);
        // 1003 rows: several blocks, a partial last block, and a partial group of lockstep rows at its end.
        let rows = random_rows(&mut rng, 1003);
        let mut out = vec![f64::NAN; 1003];
        m.margins(&rows, &mut out).unwrap();
        for (r, got) in out.iter().enumerate() {
            let single = m.margin(&rows[4 * r..4 * r + 4]).unwrap();
            assert_eq!(got.to_bits(), single.to_bits(), "{precision} row {r}");
        }
        // Different rows reach different leaves (the comparison above is not between constants).
        assert!(out.iter().any(|&v| v != out[0]));
    }
    let m = linear_model();
    let mut rows = Vec::new();
    for _ in 0..300 {
        rows.extend([rng.unit() * 300.0, rng.below(4) as f64, rng.unit() * 24.0]);
    }
    let mut out = vec![0.0; 300];
    m.margins(&rows, &mut out).unwrap();
    for (r, got) in out.iter().enumerate() {
        assert_eq!(
            got.to_bits(),
            m.margin(&rows[3 * r..3 * r + 3]).unwrap().to_bits()
        );
    }
}
