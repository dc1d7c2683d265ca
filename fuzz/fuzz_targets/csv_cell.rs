//! Arbitrary text -> `Schema::encode_text` for a numeric feature, a categorical feature, and a categorical feature
//! whose categories include the text itself.
//!
//! Checked beyond "no panic": a categorical cell always encodes (to missing, unknown or a valid index), a category
//! given verbatim encodes to its own index, and a numeric cell that encodes agrees with Rust's own float parse.
#![no_main]

use libfuzzer_sys::fuzz_target;
use probity_models::{Feature, FeatureKind, Schema, UNKNOWN_CATEGORY};

fuzz_target!(|data: &[u8]| {
    let text = String::from_utf8_lossy(data);
    let text = text.as_ref();
    let fixed = Schema::new(vec![
        Feature {
            name: "amount".into(),
            kind: FeatureKind::Numeric,
        },
        Feature {
            name: "channel".into(),
            kind: FeatureKind::Categorical {
                categories: vec![
                    "chip".into(),
                    "online".into(),
                    "NA".into(),
                    " spaced ".into(),
                ],
            },
        },
    ]);
    let Ok(fixed) = fixed else {
        return;
    };
    match fixed.encode_text(0, text) {
        Ok(v) if v.is_nan() => {}
        Ok(v) => assert_eq!(
            Ok(v.to_bits()),
            text.trim().parse::<f64>().map(f64::to_bits)
        ),
        Err(e) => assert!(!e.to_string().is_empty()),
    }
    let c = fixed
        .encode_text(1, text)
        .expect("categorical cells always encode");
    assert!(c.is_nan() || c == UNKNOWN_CATEGORY || (c >= 0.0 && c < 4.0 && c.fract() == 0.0));
    assert!(fixed.encode_text(2, text).is_err());

    if !text.is_empty() {
        let own = Schema::new(vec![Feature {
            name: "f".into(),
            kind: FeatureKind::Categorical {
                categories: vec!["other".into(), text.to_string()],
            },
        }]);
        if let Ok(own) = own {
            let want = if text == "other" { 0.0 } else { 1.0 };
            assert_eq!(own.encode_text(0, text), Ok(want));
        }
    }
});
