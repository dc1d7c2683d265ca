#!/usr/bin/env bash
# Service benchmark in one command: `probity serve` (500-tree model and the linear model, prediction store on) and
# the bare tonic server of probity-load, each pinned to core 0, loaded from core 1, in the same run; then a
# fixed-rate soak with resident memory samples, and the resident size with the 1,000-tree model loaded.
#
#   tools/bench/service.sh                 # about 4 minutes
#   QUICK=1 tools/bench/service.sh         # 1-second runs, for a smoke test
#   SOAK=300 tools/bench/service.sh        # the soak's length in seconds (default 60)
#
# Output: target/bench-results/service.jsonl (one JSON line per run), service.md (table), memory.md.
set -euo pipefail
cd "$(dirname "$0")/../.."
PY=${PY:-.venv/bin/python}
OUT=target/bench-results; mkdir -p "$OUT"
M=target/bench-models
[ -f $M/manifest.json ] || "$PY" tools/bench/make_bench_models.py
cargo build --release -p probity --bin probity -p probity-load --bin probity-load
BIN=target/release
DUR=${DUR:-8}; SOAK=${SOAK:-60}; WARM=1
if [ -n "${QUICK:-}" ]; then DUR=1; SOAK=3; WARM=0.3; SETTLE=${SETTLE:-1}; fi
WORK=$(mktemp -d); PIDS=()
cleanup() { for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; rm -rf "$WORK"; }
trap cleanup EXIT

# config: $1 = folder of model files, $2 = port offset
config() {
  cat > "$WORK/probity-$2.toml" <<TOML
[server]
plaintext = "loopback"
grpc_listen = "127.0.0.1:$((50170 + $2))"
metrics_listen = "127.0.0.1:$((9570 + $2))"
reflection = false
[models]
directory = "$1"
watch = false
[limits]
max_concurrent_requests = 4096
[logging]
level = "warn"
[store]
directory = "$WORK/store-$2"
[routes.bench]
model = "$3"
missing_features = "route_as_missing"
TOML
  echo "$WORK/probity-$2.toml"
}
wait_port() { for _ in $(seq 1 300); do (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null && return 0; sleep 0.1; done; echo "port $1 never opened" >&2; exit 1; }
# Not in a $(...) subshell, so that PIDS reaches the cleanup: the server's pid is left in STARTED.
start_serve() { # $1 model name, $2 offset
  mkdir -p "$WORK/models-$2"; cp "$M/$1.json" "$WORK/models-$2/"
  taskset -c 0 $BIN/probity serve --config "$(config "$WORK/models-$2" "$2" "$1")" >"$WORK/serve-$2.log" 2>&1 &
  STARTED=$!; PIDS+=($STARTED)
  wait_port $((50170 + $2))
  kill -0 "$STARTED" 2>/dev/null || { echo "probity serve ($1) exited:" >&2; cat "$WORK/serve-$2.log" >&2; exit 1; }
}
load() { # $1 label, $2 port, $3 model, $4 rows, $5 pid, rest: extra args
  local label=$1 port=$2 model=$3 rows=$4 pid=$5; shift 5
  taskset -c 1 $BIN/probity-load run --target 127.0.0.1:$port --model "$M/$model.json" --rows "$M/$rows" \
    --server-pid "$pid" --duration "${LOAD_SECONDS:-$DUR}" --warmup "$WARM" --label "$label" "$@" | tee -a "$OUT/service.jsonl"
}

: > "$OUT/service.jsonl"
start_serve lightgbm_500_d6 0; TREES=$STARTED
start_serve linear_200 1; LINEAR=$STARTED
taskset -c 0 $BIN/probity-load bare --listen 127.0.0.1:50179 2>/dev/null & BARE=$!; PIDS+=($BARE); wait_port 50179

# The bare server gets the same messages as each model's server: 50 named features for the trees, 200 for the
# linear model (decoding a request's named features is most of the bare server's work).
for c in 1 4 16 64; do
  load bare 50179 lightgbm_500_d6 trees_rows.f64 $BARE --concurrency $c
  load "probity 500 trees" 50170 lightgbm_500_d6 trees_rows.f64 $TREES --concurrency $c
  load "bare linear rows" 50179 linear_200 linear_rows.f64 $BARE --concurrency $c
  load "probity linear 200" 50171 linear_200 linear_rows.f64 $LINEAR --concurrency $c
done
# Half the saturating load, open loop: p99 latency.
for spec in "bare 50179 lightgbm_500_d6 trees_rows.f64 $BARE" \
            "bare-linear-rows 50179 linear_200 linear_rows.f64 $BARE" \
            "probity-500-trees 50170 lightgbm_500_d6 trees_rows.f64 $TREES" \
            "probity-linear-200 50171 linear_200 linear_rows.f64 $LINEAR"; do
  set -- $spec
  label=${1//-/ }; [ "$1" = bare ] && label=bare
  sat=$(grep "\"label\":\"$label\"" "$OUT/service.jsonl" | "$PY" -c "import sys,json;print(max(json.loads(l)['calls_per_s'] for l in sys.stdin))")
  half=$("$PY" -c "print(round($sat/2))")
  load "$label (half load)" "$2" "$3" "$4" "$5" --concurrency 64 --rate "$half"
done
"$PY" tools/bench/report.py service | tee "$OUT/service.md"

# Memory: resident size with the 1,000-tree model loaded, against its compiled arrays (`probity check`'s
# engine_bytes: splits, leaves, preorder nodes, category sets), and the base: a fresh server with the small linear
# model started at the same time. Both are read after SETTLE seconds (default 20), once the allocator has handed
# back what loading the 33 MB file used. Then a soak at a fixed rate with resident size sampled every 5 s.
start_serve lightgbm_1000_d8 2; BIG=$STARTED
start_serve linear_200 3; BASE=$STARTED
sleep "${SETTLE:-20}"
ENGINE=$($BIN/probity check --json "$M/lightgbm_1000_d8.json" | "$PY" -c "import sys,json;d=json.load(sys.stdin);print(d['body']['engine_bytes'])")
rss() { awk '/VmRSS/{print $2}' "/proc/$1/status"; }
{
  echo "| process | resident KiB |"; echo "|---|---:|"
  echo "| probity serve, linear_200 (base), ${SETTLE:-20} s after start | $(rss "$BASE") |"
  echo "| probity serve, lightgbm_1000_d8, ${SETTLE:-20} s after start | $(rss "$BIG") |"
  echo "| compiled arrays of lightgbm_1000_d8 (engine_bytes) | $((ENGINE / 1024)) |"
} > "$OUT/memory.md"
LOAD_SECONDS=$SOAK load "soak 1000 trees" 50172 lightgbm_1000_d8 trees_rows.f64 "$BIG" --concurrency 16 --rate 2000 \
  --sample-every 5 > "$OUT/soak.json"
"$PY" - "$OUT/soak.json" >> "$OUT/memory.md" <<'PYEOF'
import json, sys
r = json.loads(open(sys.argv[1]).read())
s = r["server_rss_kib"]
print(f"| same, during a {r['seconds']:.0f} s soak at {r['rate']:.0f} calls/s: first / max / last sample | {s[0]} / {max(s)} / {s[-1]} |")
print()
print(f"Soak samples (KiB, every 5 s): {s}; calls answered {r['calls']}, errors {r['errors']}, p99 {r['p99_us']:.0f} us")
PYEOF
cat "$OUT/memory.md"
