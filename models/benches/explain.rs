//! Explanation benchmark on the tree models of `tools/bench/make_bench_models.py` (which now carry per-node
//! cover): the time to explain one row (`Model::contributions_with`, every feature's contribution and the bias),
//! rows taken in turn, one thread. `tools/bench/explain.sh` runs it next to LightGBM's and XGBoost's own
//! contribution paths (`tools/bench/ref_contrib.py`) and prints the table.
//!
//! Before timing a model, the first rows are explained and their contributions must add up to the log-odds.

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::Duration;

use criterion::{BenchmarkId, Criterion, Throughput};
use probity_models::explain::Workspace;
use probity_models::{BodyKind, Model};

fn models_dir() -> PathBuf {
    match std::env::var_os("PROBITY_BENCH_MODELS") {
        Some(d) => PathBuf::from(d),
        None => Path::new(env!("CARGO_MANIFEST_DIR")).join("../target/bench-models"),
    }
}

fn read_f64(path: &Path) -> Vec<f64> {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    bytes
        .chunks_exact(8)
        .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
        .collect()
}

fn main() {
    if !std::env::args().any(|a| a == "--bench") {
        eprintln!("explanation benchmarks run only under `cargo bench` (see BENCHMARKS.md)");
        return;
    }
    let dir = models_dir();
    let Ok(manifest) = std::fs::read_to_string(dir.join("manifest.json")) else {
        eprintln!(
            "no benchmark models in {} - make them with: .venv/bin/python tools/bench/make_bench_models.py",
            dir.display()
        );
        return;
    };
    let manifest: serde_json::Value = serde_json::from_str(&manifest).unwrap();
    let only = std::env::var("PROBITY_BENCH_ONLY").ok();
    let secs = |var: &str, default: u64| {
        Duration::from_millis(
            std::env::var(var)
                .ok()
                .and_then(|v| v.parse().ok())
                .unwrap_or(default),
        )
    };
    let mut c = Criterion::default()
        .warm_up_time(secs("PROBITY_BENCH_WARMUP_MS", 1000))
        .measurement_time(secs("PROBITY_BENCH_MEASURE_MS", 3000))
        .sample_size(20)
        .configure_from_args();
    let mut g = c.benchmark_group("explain");
    for m in manifest["models"].as_array().unwrap() {
        let name = m["name"].as_str().unwrap();
        if only
            .as_deref()
            .is_some_and(|o| !o.split(',').any(|x| x == name))
        {
            continue;
        }
        let text = std::fs::read_to_string(dir.join(format!("{name}.json"))).unwrap();
        let model = Model::from_json_str(&text).unwrap();
        if model.summary().kind != BodyKind::Ensemble {
            continue;
        }
        if let Err(e) = model.explainable() {
            eprintln!("{name}: skipped ({e}); make the models again with the current exporter");
            continue;
        }
        let rows = read_f64(&dir.join(m["rows_file"].as_str().unwrap()));
        let width = model.schema().len();
        let n = rows.len() / width;
        let mut ws = Workspace::default();
        for r in 0..n.min(200) {
            let c = model
                .contributions_with(&rows[r * width..(r + 1) * width], &mut ws)
                .unwrap();
            let gap = (c.total() - c.log_odds).abs();
            assert!(
                gap <= 1e-9,
                "{name} row {r}: sum misses the log-odds by {gap:e}"
            );
        }
        let mut r = 0;
        g.throughput(Throughput::Elements(1));
        g.bench_function(BenchmarkId::from_parameter(name), |b| {
            b.iter(|| {
                let row = &rows[r * width..(r + 1) * width];
                r = (r + 1) % n;
                black_box(model.contributions_with(black_box(row), &mut ws).unwrap())
            })
        });
    }
    g.finish();
}
