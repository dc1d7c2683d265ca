#!/usr/bin/env bash
# Instruction counts of the engine under valgrind's callgrind (repeatable, unlike timings on a shared machine).
#
#   tools/bench/profile.sh [MODEL] [batch|single] [PASSES]     # default: lightgbm_500_d6 batch 1
#
# Prints the total instructions and per row; the callgrind file (for callgrind_annotate) goes to target/bench-results.
set -euo pipefail
cd "$(dirname "$0")/../.."
MODEL=${1:-lightgbm_500_d6}; MODE=${2:-batch}; PASSES=${3:-1}
OUT=target/bench-results; mkdir -p "$OUT"
BIN=$(cargo bench -p probity-models --bench engine --no-run --message-format=json 2>/dev/null \
  | grep -o '"executable":"[^"]*"' | tail -1 | cut -d'"' -f4)
run() { PROBITY_BENCH_PROFILE="$MODEL:$MODE:$1" valgrind --tool=callgrind --callgrind-out-file="$OUT/callgrind.$MODEL.$MODE.$1" \
  "$BIN" 2>&1 | grep -E "Collected" | awk '{print $4}' | tr -d ,; }
# The difference between PASSES+1 passes and 1 pass removes loading and checking the model from the count.
base=$(run 1); more=$(run $((PASSES + 1)))
ROWS=$(python3 -c "import json;print(json.load(open('target/bench-models/manifest.json'))['rows'])")
echo "$MODEL $MODE: $(( (more - base) / PASSES )) instructions per pass of $ROWS rows, $(( (more - base) / PASSES / ROWS )) per row"
