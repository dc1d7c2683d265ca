//! Engine benchmarks on the models of `tools/bench/make_bench_models.py`: single-row latency and one-thread batch
//! throughput, both to the final probability. `tools/bench/engine.sh` runs them next to the reference libraries.
//!
//! The models live in `target/bench-models` (or `PROBITY_BENCH_MODELS`). Without them this prints how to make
//! them and exits successfully, so a build check never needs Python. Before timing a model, every row's
//! probability is compared with the library's own (`<name>.expected.f64`): a fast wrong answer is not measured.
//!
//! `PROBITY_BENCH_PROFILE=<model>:<batch|single>:<passes>` skips criterion and runs a fixed amount of work once,
//! for `valgrind --tool=callgrind` instruction counts (`tools/bench/profile.sh`).

use std::hint::black_box;
use std::path::{Path, PathBuf};
use std::time::Duration;

use criterion::{BenchmarkId, Criterion, Throughput};
use probity_models::{Model, OutputSpec};

struct Case {
    name: String,
    model: Model,
    rows: Vec<f64>,
    width: usize,
}

impl Case {
    fn n_rows(&self) -> usize {
        self.rows.len() / self.width
    }
    fn row(&self, r: usize) -> &[f64] {
        &self.rows[r * self.width..(r + 1) * self.width]
    }
}

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

/// Batch probabilities: margins of the whole batch, then the margin-to-probability path of each row.
fn batch_probabilities(model: &Model, rows: &[f64], margins: &mut [f64], spec: &OutputSpec) {
    model.margins(rows, margins).unwrap();
    for m in margins.iter_mut() {
        *m = model.finish(*m, spec).probability;
    }
}

fn load_cases(dir: &Path) -> Option<Vec<Case>> {
    let manifest = std::fs::read_to_string(dir.join("manifest.json")).ok()?;
    let manifest: serde_json::Value = serde_json::from_str(&manifest).unwrap();
    let only = std::env::var("PROBITY_BENCH_ONLY").ok();
    let mut cases = Vec::new();
    for m in manifest["models"].as_array().unwrap() {
        let name = m["name"].as_str().unwrap().to_string();
        if only
            .as_deref()
            .is_some_and(|o| !o.split(',').any(|x| x == name))
        {
            continue;
        }
        let text = std::fs::read_to_string(dir.join(format!("{name}.json"))).unwrap();
        let model = Model::from_json_str(&text).unwrap();
        let rows = read_f64(&dir.join(m["rows_file"].as_str().unwrap()));
        let width = model.schema().len();
        cases.push(Case {
            name,
            model,
            rows,
            width,
        });
    }
    Some(cases)
}

/// Every row's probability against the library's own, before anything is timed.
fn check_against_library(dir: &Path, case: &Case) {
    let want = read_f64(&dir.join(format!("{}.expected.f64", case.name)));
    let mut got = vec![0.0; case.n_rows()];
    batch_probabilities(&case.model, &case.rows, &mut got, &OutputSpec::default());
    // XGBoost sums its trees in float32 (XGBoost 3.2 `predict`), probity in float64; the others agree to 1e-9.
    let tol = if case.name.starts_with("xgboost") {
        1e-4
    } else {
        1e-9
    };
    let worst = got
        .iter()
        .zip(&want)
        .map(|(g, w)| (g - w).abs())
        .fold(0.0, f64::max);
    assert!(
        worst <= tol,
        "{}: probability differs from the library's by {worst:e}",
        case.name
    );
    for r in (0..case.n_rows()).step_by(97) {
        let single = case
            .model
            .score(case.row(r), &OutputSpec::default())
            .unwrap();
        assert_eq!(
            single.probability.to_bits(),
            got[r].to_bits(),
            "{}: row {r}",
            case.name
        );
    }
    eprintln!(
        "{}: {} rows agree with the library within {worst:.1e}",
        case.name,
        case.n_rows()
    );
}

fn profile(cases: &[Case], what: &str) {
    let mut parts = what.split(':');
    let (name, mode) = (parts.next().unwrap(), parts.next().unwrap_or("batch"));
    let passes: usize = parts.next().map_or(1, |p| p.parse().unwrap());
    let case = cases
        .iter()
        .find(|c| c.name == name)
        .expect("no such model");
    let spec = OutputSpec::default();
    let mut out = vec![0.0; case.n_rows()];
    let mut sum = 0.0;
    for _ in 0..passes {
        if mode == "batch" {
            batch_probabilities(&case.model, &case.rows, &mut out, &spec);
            sum += out.iter().sum::<f64>();
        } else {
            for r in 0..case.n_rows() {
                sum += case.model.score(case.row(r), &spec).unwrap().probability;
            }
        }
    }
    println!("{name} {mode} x{passes}: sum of probabilities {sum}");
}

fn main() {
    // `cargo test --all-targets` runs bench targets without `--bench`: benchmarks never run inside the tests.
    if !std::env::args().any(|a| a == "--bench")
        && std::env::var_os("PROBITY_BENCH_PROFILE").is_none()
    {
        eprintln!("engine benchmarks run only under `cargo bench` (see BENCHMARKS.md)");
        return;
    }
    let dir = models_dir();
    let Some(cases) = load_cases(&dir) else {
        eprintln!(
            "no benchmark models in {} - make them with: .venv/bin/python tools/bench/make_bench_models.py",
            dir.display()
        );
        return;
    };
    if let Ok(what) = std::env::var("PROBITY_BENCH_PROFILE") {
        profile(&cases, &what);
        return;
    }
    for case in &cases {
        check_against_library(&dir, case);
    }
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
    let spec = OutputSpec::default();
    {
        let mut g = c.benchmark_group("batch");
        for case in &cases {
            let mut out = vec![0.0; case.n_rows()];
            g.throughput(Throughput::Elements(case.n_rows() as u64));
            g.bench_function(BenchmarkId::from_parameter(&case.name), |b| {
                b.iter(|| batch_probabilities(&case.model, black_box(&case.rows), &mut out, &spec))
            });
        }
        g.finish();
    }
    {
        let mut g = c.benchmark_group("single");
        for case in &cases {
            let mut r = 0;
            g.throughput(Throughput::Elements(1));
            g.bench_function(BenchmarkId::from_parameter(&case.name), |b| {
                b.iter(|| {
                    r = (r + 1) % case.n_rows();
                    case.model
                        .score(black_box(case.row(r)), &spec)
                        .unwrap()
                        .probability
                })
            });
        }
        g.finish();
    }
    c.final_summary();
}
