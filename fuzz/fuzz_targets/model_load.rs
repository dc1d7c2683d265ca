//! Model file bytes -> `Model::from_json_slice`; when the file loads, a few rows built from the input are scored one
//! by one and as a batch.
//!
//! Checked beyond "no panic": a batch gives bit-identical margins to the same rows scored singly, and a row with
//! no infinite value (NaN is a missing value, a legal input) never gives a NaN margin or probability. When the
//! model can be explained (a linear model, or trees with `cover`), each row's contributions plus the bias give its
//! log-odds within 1e-9 of their magnitude, unless the arithmetic overflowed, and the reasons are well formed.
#![no_main]

use std::hash::{Hash, Hasher};

use libfuzzer_sys::fuzz_target;
use probity_models::{DecisionRule, Model, OutputSpec, UNKNOWN_CATEGORY};

/// A small deterministic generator (SplitMix64, Steele, Lea and Flood 2014), seeded from the input.
struct SplitMix(u64);

impl SplitMix {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
}

/// One value for a feature with `n` categories (0 for numeric): missing, unknown, a category, or a number from
/// the ordinary to the extreme. Never infinite.
fn value(rng: &mut SplitMix, n: usize) -> f64 {
    let r = rng.next();
    match r % 16 {
        0 => f64::NAN,
        1 => UNKNOWN_CATEGORY,
        2 | 3 | 4 if n > 0 => ((r >> 8) % n as u64) as f64,
        5 => n as f64,
        6 => 0.5,
        7 => f64::MAX,
        8 => -f64::MAX,
        9 => f64::MIN_POSITIVE,
        10 => -0.0,
        11 => 1e300,
        _ => {
            let x = f64::from_bits(rng.next());
            if x.is_finite() {
                x
            } else {
                ((r >> 16) % 2_000) as f64 / 8.0 - 100.0
            }
        }
    }
}

fuzz_target!(|data: &[u8]| {
    let Ok(model) = Model::from_json_slice(data) else {
        return;
    };
    let _ = model.summary();
    let mut hasher = std::collections::hash_map::DefaultHasher::new();
    data.hash(&mut hasher);
    let mut rng = SplitMix(hasher.finish());
    let schema = model.schema();
    let width = schema.len();
    // 1 to 19 rows: full lanes of eight and a remainder.
    let rows = 1 + (rng.next() % 19) as usize;
    if width.saturating_mul(rows) > 1 << 20 {
        return;
    }
    let counts: Vec<usize> = schema
        .features()
        .iter()
        .map(|f| f.categories().len())
        .collect();
    let mut flat = Vec::with_capacity(width * rows);
    for _ in 0..rows {
        for &n in &counts {
            flat.push(value(&mut rng, n));
        }
    }
    let mut batch = vec![0.0; rows];
    let batch_result = model.margins(&flat, &mut batch);
    let spec = OutputSpec {
        target_base_rate: Some(0.01),
        decision: Some(DecisionRule::Threshold { threshold: 0.5 }),
    };
    for (r, row) in flat.chunks(width.max(1)).take(rows).enumerate() {
        let row = if width == 0 { &[][..] } else { row };
        let single = model.margin(row);
        match (&single, &batch_result) {
            (Ok(m), Ok(())) => {
                assert_eq!(m.to_bits(), batch[r].to_bits(), "row {r}: batch differs")
            }
            (Ok(m), Err(probity_models::EvalError::InRow { row: bad, .. })) if r < *bad => {
                assert_eq!(m.to_bits(), batch[r].to_bits(), "row {r}: batch differs");
            }
            _ => {}
        }
        if let (Ok(m), Ok(())) = (&single, model.explainable()) {
            explained(&model, row, *m);
        }
        if let Ok(m) = single {
            assert!(!m.is_nan(), "NaN margin from row {row:?}");
            for s in [OutputSpec::default(), spec.clone()] {
                let scored = model.finish(m, &s);
                assert!(
                    (0.0..=1.0).contains(&scored.probability),
                    "probability {} from margin {m} (row {row:?})",
                    scored.probability
                );
                if let Some(d) = model.reference_distribution() {
                    let _ = d.bin_of(scored.probability);
                }
            }
        }
    }
});

/// The explanation of a row the model scored to margin `m`.
fn explained(model: &Model, row: &[f64], m: f64) {
    let c = match model.contributions(row) {
        Ok(c) => c,
        Err(e) => panic!("a row that scores must explain: {e} (row {row:?})"),
    };
    assert_eq!(
        c.log_odds.to_bits(),
        model.margin_scale().to_log_odds(m).to_bits()
    );
    let magnitude = c
        .features
        .iter()
        .fold(c.bias.abs() + c.log_odds.abs(), |a, x| a + x.abs());
    if magnitude.is_finite() {
        let gap = (c.total() - c.log_odds).abs();
        assert!(
            gap <= 1e-9 * magnitude.max(1.0),
            "contributions sum to {} but the log-odds is {} (row {row:?})",
            c.total(),
            c.log_odds
        );
    }
    for adverse in [
        probity_models::Adverse::Higher,
        probity_models::Adverse::Lower,
    ] {
        let reasons = model.reasons(&c, &probity_models::ReasonRequest { limit: 4, adverse });
        assert!(reasons.len() <= 4);
        assert!(reasons
            .iter()
            .all(|r| r.weight > 0.0 && !r.features.is_empty()));
        assert!(reasons.windows(2).all(|w| w[0].weight >= w[1].weight));
    }
}
