#!/usr/bin/env bash
# Engine benchmark in one command: the reference libraries' own predict and probity's engine on the same models and
# rows, one thread each, pinned to the same core, in the same run; then the table with ratios.
#
#   tools/bench/engine.sh            # full run (makes the models first if they are missing, about 10 minutes)
#   QUICK=1 tools/bench/engine.sh    # short timings, for a smoke run
#
# Output: target/bench-results/engine.md (table), ref.json (libraries), target/criterion/ (probity).
set -euo pipefail
cd "$(dirname "$0")/../.."
PY=${PY:-.venv/bin/python}
CORE=${CORE:-1}
OUT=target/bench-results
mkdir -p "$OUT"
[ -f target/bench-models/manifest.json ] || "$PY" tools/bench/make_bench_models.py
SECONDS_PER=3; MEASURE_MS=3000; WARMUP_MS=1000
if [ -n "${QUICK:-}" ]; then SECONDS_PER=0.3; MEASURE_MS=300; WARMUP_MS=100; fi
cargo bench -p probity-models --bench engine --no-run
taskset -c "$CORE" "$PY" tools/bench/ref_predict.py --seconds "$SECONDS_PER" --out "$OUT/ref.json"
PROBITY_BENCH_MEASURE_MS=$MEASURE_MS PROBITY_BENCH_WARMUP_MS=$WARMUP_MS \
  taskset -c "$CORE" cargo bench -p probity-models --bench engine
"$PY" tools/bench/report.py engine --ref "$OUT/ref.json" | tee "$OUT/engine.md"
