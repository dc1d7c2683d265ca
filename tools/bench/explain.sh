#!/usr/bin/env bash
# Explanation benchmark in one command: LightGBM's and XGBoost's own contribution paths and probity's on the same
# tree models and rows, one thread each, pinned to the same core, in the same run; then the table.
#
#   tools/bench/explain.sh            # full run (makes the models first if they are missing)
#   QUICK=1 tools/bench/explain.sh    # short timings, for a smoke run
#
# Output: target/bench-results/explain.md (table), ref_contrib.json (libraries), target/criterion/explain/ (probity).
set -euo pipefail
cd "$(dirname "$0")/../.."
PY=${PY:-.venv/bin/python}
CORE=${CORE:-1}
OUT=target/bench-results
mkdir -p "$OUT"
[ -f target/bench-models/manifest.json ] || "$PY" tools/bench/make_bench_models.py
SECONDS_PER=3; MEASURE_MS=3000; WARMUP_MS=1000; BATCH=1000
if [ -n "${QUICK:-}" ]; then SECONDS_PER=0.3; MEASURE_MS=300; WARMUP_MS=100; BATCH=50; fi
cargo bench -p probity-models --bench explain --no-run
taskset -c "$CORE" "$PY" tools/bench/ref_contrib.py --seconds "$SECONDS_PER" --batch "$BATCH" --out "$OUT/ref_contrib.json"
PROBITY_BENCH_MEASURE_MS=$MEASURE_MS PROBITY_BENCH_WARMUP_MS=$WARMUP_MS \
  taskset -c "$CORE" cargo bench -p probity-models --bench explain
"$PY" - "$OUT/ref_contrib.json" <<'PY' | tee "$OUT/explain.md"
import json, sys
from pathlib import Path
ref = json.loads(Path(sys.argv[1]).read_text())
print("| model | probity us/row | library | library batch us/row | library one-row us | speed-up vs the faster |")
print("|---|---|---|---|---|---|")
for name, r in ref["models"].items():
    est = Path("target/criterion/explain") / name / "new" / "estimates.json"
    if not est.exists():
        continue
    ours = json.loads(est.read_text())["median"]["point_estimate"] / 1000.0
    best = min(r["batch_us_per_row"], r["single_us_per_row"])
    print(f"| {name} | {ours:.1f} | {r['library']} | {r['batch_us_per_row']:.1f} | {r['single_us_per_row']:.1f} | {best / ours:.2f}x |")
PY
