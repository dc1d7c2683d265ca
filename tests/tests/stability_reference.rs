//! Per-feature stability (`probity_models::stability`) against `tests/fixtures/gen_stability.py`.
//!
//! Data: scikit-learn's bundled `load_breast_cancer` (Street, Wolberg and Mangasarian 1993), six columns, a model
//! exported by probity_export with each feature's training distribution (10 quantile bins). Reference: slot counts
//! by NumPy 2.4.6 (`np.digitize(right=True)`) and the PSI from its formula, sum (a - e) ln(a / e) (Siddiqi 2006,
//! "Credit Risk Scorecards"), both shares floored at 1e-4. Tolerance: counts exactly, PSI and rates within 1e-12
//! relative.

use probity_models::metrics::EmptyBinRule;
use probity_models::stability::stability;
use probity_models::Model;
use serde_json::Value;

fn fixture(name: &str) -> String {
    let path = format!("{}/fixtures/stability/{name}", env!("CARGO_MANIFEST_DIR"));
    std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("reading {path}: {e}"))
}

/// Dense rows of a fixture CSV (no quoted cells), read with the offline cell rule (`Schema::read_text`).
fn rows(model: &Model, name: &str) -> Vec<Vec<f64>> {
    let text = fixture(name);
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let schema = model.schema();
    lines
        .map(|line| {
            let cells: Vec<&str> = line.split(',').collect();
            (0..schema.len())
                .map(|i| {
                    let name = &schema.feature(i).unwrap().name;
                    let col = header.iter().position(|h| h == name).unwrap();
                    schema.read_text(i, cells[col]).unwrap().value
                })
                .collect()
        })
        .collect()
}

fn close(a: f64, e: f64, what: &str) {
    assert!(
        (a - e).abs() <= 1e-12 * e.abs().max(1.0),
        "{what}\n  expected {e:?}\n  actual   {a:?}"
    );
}

#[test]
fn psi_missing_and_unknown_rates_equal_numpy() {
    let model = Model::from_json_str(&fixture("model.json")).unwrap();
    let reference: Value = serde_json::from_str(&fixture("reference.json")).unwrap();
    assert_eq!(model.training_distributions().count(), 6);
    for window in ["steady", "shifted"] {
        let rows = rows(&model, &format!("{window}.csv"));
        for (i, dist) in model.training_distributions() {
            let name = &model.schema().feature(i).unwrap().name;
            let want = &reference[window][name];
            let counts = dist.count(rows.iter().map(|r| r[i]));
            let want_counts: Vec<u64> = want["counts"]
                .as_array()
                .unwrap()
                .iter()
                .map(|c| c.as_u64().unwrap())
                .collect();
            assert_eq!(counts, want_counts, "{window} {name}: slot counts");
            let s = stability(dist, &counts, EmptyBinRule::Floor(1e-4)).unwrap();
            close(
                s.psi,
                want["psi"].as_f64().unwrap(),
                &format!("{window} {name}: PSI"),
            );
            close(
                s.missing_rate,
                want["missing_rate"].as_f64().unwrap(),
                &format!("{window} {name}: missing rate"),
            );
            assert_eq!(
                s.unknown_rate,
                want["unknown_rate"].as_f64(),
                "{window} {name}: unknown rate"
            );
        }
    }
    // The shift moves the three changed features past the usual 0.25 (common practice, no single source) and
    // leaves the others where they were.
    let shifted = &reference["shifted"];
    for name in ["mean_radius", "mean_texture", "mean_perimeter"] {
        assert!(shifted[name]["psi"].as_f64().unwrap() > 0.25, "{name}");
    }
}
