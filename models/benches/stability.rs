//! What per-feature stability counting adds to a scored row: the slot lookup of every monitored feature and one
//! relaxed atomic add per feature (what the server's counter handles do, `service/src/serve/feature_metrics.rs`),
//! next to scoring the same row. Rows: `tests/fixtures/stability/steady.csv` with its model (6 features, a
//! 20-tree ensemble); and the worst case the format allows, 32 numeric features of 32 bins each.

use std::hint::black_box;
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use criterion::Criterion;
use probity_models::stability::{DistributionBins, TrainingDistribution};
use probity_models::{Model, OutputSpec};

fn fixture(name: &str) -> String {
    let path = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/fixtures/stability")
        .join(name);
    std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn count(dists: &[(usize, TrainingDistribution)], counters: &[Vec<AtomicU64>], row: &[f64]) {
    for ((column, d), c) in dists.iter().zip(counters) {
        c[d.slot_of(row[*column])].fetch_add(1, Ordering::Relaxed);
    }
}

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        eprintln!("stability benchmarks run only under `cargo bench`");
        return;
    }
    let model = Model::from_json_str(&fixture("model.json")).unwrap();
    let text = fixture("steady.csv");
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    let schema = model.schema();
    let rows: Vec<Vec<f64>> = lines
        .map(|l| {
            let cells: Vec<&str> = l.split(',').collect();
            (0..schema.len())
                .map(|i| {
                    let col = header
                        .iter()
                        .position(|h| *h == schema.feature(i).unwrap().name)
                        .unwrap();
                    schema.read_text(i, cells[col]).unwrap().value
                })
                .collect()
        })
        .collect();
    let dists: Vec<(usize, TrainingDistribution)> = model
        .training_distributions()
        .map(|(i, d)| (i, d.clone()))
        .collect();
    let counters: Vec<Vec<AtomicU64>> = dists
        .iter()
        .map(|(_, d)| (0..d.slots()).map(|_| AtomicU64::new(0)).collect())
        .collect();
    // Worst case: 32 numeric features, 31 edges each.
    let wide: Vec<(usize, TrainingDistribution)> = (0..32)
        .map(|i| {
            (
                i,
                TrainingDistribution {
                    bins: DistributionBins::Numeric {
                        edges: (1..32).map(f64::from).collect(),
                    },
                    shares: vec![1.0 / 32.0; 32],
                    missing: 0.0,
                    unknown: 0.0,
                },
            )
        })
        .collect();
    let wide_counters: Vec<Vec<AtomicU64>> = wide
        .iter()
        .map(|_| (0..33).map(|_| AtomicU64::new(0)).collect())
        .collect();
    let wide_rows: Vec<Vec<f64>> = (0..143)
        .map(|r| {
            (0..32)
                .map(|j| ((r * 7 + j * 13) % 37) as f64 - 2.5)
                .collect()
        })
        .collect();

    let mut c = Criterion::default()
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2))
        .configure_from_args();
    let spec = OutputSpec::default();
    let mut i = 0;
    c.bench_function("stability/score_row_6_features", |b| {
        b.iter(|| {
            i = (i + 1) % rows.len();
            black_box(model.score(black_box(&rows[i]), &spec).unwrap())
        })
    });
    c.bench_function("stability/count_row_6_features", |b| {
        b.iter(|| {
            i = (i + 1) % rows.len();
            count(&dists, &counters, black_box(&rows[i]))
        })
    });
    c.bench_function("stability/count_row_32_features_32_bins", |b| {
        b.iter(|| {
            i = (i + 1) % wide_rows.len();
            count(&wide, &wide_counters, black_box(&wide_rows[i]))
        })
    });
    c.final_summary();
}
