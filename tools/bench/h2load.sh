#!/usr/bin/env bash
# Service throughput and latency measured with h2load (Debian's nghttp2-client), a C load generator light enough
# that the server, not the generator, sets the figures: `probity serve` (500-tree model, linear model; prediction
# store on) and the bare tonic server of probity-load, each pinned to core 0, h2load on core 1, same run.
#
#   tools/bench/h2load.sh              # about 2 minutes after the build
#   QUICK=1 tools/bench/h2load.sh      # short runs, for a smoke test
#
# Each server gets the same request body: one Score call with the model's 50 (trees) or 200 (linear) features by
# name, framed as a gRPC message by `probity-load frame`. Closed loop: 4 connections x 16 streams = 64 calls in
# flight. A run is valid only when the bare server used at least 95% of its core (else the generator, not the server,
# was the limit). Server CPU per call is the server's utime + stime (/proc/PID/stat) over the calls answered. Every
# probity call is checked answered by the server's own prediction counter (gRPC errors would still be HTTP 200).
# Then each server at half its closed-loop rate (open loop, h2load --rps): median and p99 latency from h2load's
# per-request log.
#
# Output: target/bench-results/h2load.md.
set -euo pipefail
cd "$(dirname "$0")/../.."
PY=${PY:-.venv/bin/python}
OUT=target/bench-results; mkdir -p "$OUT"
M=target/bench-models
if ! command -v h2load >/dev/null; then
  apt-get install -y -qq nghttp2-client >/dev/null 2>&1 || sudo apt-get install -y -qq nghttp2-client >/dev/null
fi
[ -f $M/manifest.json ] || "$PY" tools/bench/make_bench_models.py
cargo build --release -q -p probity --bin probity -p probity-load --bin probity-load
BIN=target/release
CALLS=${CALLS:-300000}; HALF_SECONDS=${HALF_SECONDS:-10}
if [ -n "${QUICK:-}" ]; then CALLS=3000; HALF_SECONDS=1; fi
WORK=$(mktemp -d); PIDS=()
cleanup() { for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; rm -rf "$WORK"; }
trap cleanup EXIT

wait_port() { for _ in $(seq 1 300); do (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null && return 0; sleep 0.1; done; echo "port $1 never opened" >&2; exit 1; }
start_serve() { # $1 model name, $2 port, $3 metrics port; the pid is left in STARTED
  mkdir -p "$WORK/models-$2"; cp "$M/$1.json" "$WORK/models-$2/"
  cat > "$WORK/probity-$2.toml" <<TOML
[server]
plaintext = "loopback"
grpc_listen = "127.0.0.1:$2"
metrics_listen = "127.0.0.1:$3"
reflection = false
[models]
directory = "$WORK/models-$2"
watch = false
[limits]
max_concurrent_requests = 4096
[logging]
level = "warn"
[store]
directory = "$WORK/store-$2"
[routes.bench]
model = "$1"
missing_features = "route_as_missing"
TOML
  taskset -c 0 $BIN/probity serve --config "$WORK/probity-$2.toml" >"$WORK/serve-$2.log" 2>&1 &
  STARTED=$!; PIDS+=($STARTED)
  wait_port "$2"
}
cpu_ticks() { awk '{print $14 + $15}' "/proc/$1/stat"; }
predictions() { # $1 metrics port: the server's prediction count
  curl -s "http://127.0.0.1:$1/metrics" | awk '/^probity_predictions_total[{ ]/ {s += $NF} END {printf "%d\n", s}'
}
h2() { # $1 port, $2 frame, rest: h2load options
  local port=$1 frame=$2; shift 2
  taskset -c 1 h2load -t 1 -c 4 -m 16 -H 'content-type: application/grpc' -H 'te: trailers' -d "$frame" "$@" \
    "http://127.0.0.1:$port/probity.v1.Scoring/Score"
}

$BIN/probity-load frame --model $M/lightgbm_500_d6.json --rows $M/trees_rows.f64 --out "$WORK/trees.frame"
$BIN/probity-load frame --model $M/linear_200.json --rows $M/linear_rows.f64 --out "$WORK/linear.frame"
start_serve lightgbm_500_d6 50370 9770; TREES=$STARTED
start_serve linear_200 50371 9771; LINEAR=$STARTED
taskset -c 0 $BIN/probity-load bare --listen 127.0.0.1:50379 2>/dev/null & BARE=$!; PIDS+=($BARE); wait_port 50379
TCK=$(getconf CLK_TCK)
RESULTS="$WORK/results.tsv"; : > "$RESULTS"

closed() { # $1 label, $2 port, $3 pid, $4 frame, $5 metrics port or -
  local label=$1 port=$2 pid=$3 frame=$4 mport=$5
  h2 "$port" "$frame" -n 2000 >/dev/null # warm-up
  local before_p=0; [ "$mport" = - ] || before_p=$(predictions "$mport")
  local t0 c0 t1 c1 text
  t0=$(date +%s.%N); c0=$(cpu_ticks "$pid")
  text=$(h2 "$port" "$frame" -n "$CALLS")
  t1=$(date +%s.%N); c1=$(cpu_ticks "$pid")
  local ok; ok=$(echo "$text" | awk '/^requests:/ {print $8}')
  local answered=$ok
  if [ "$mport" != - ]; then
    answered=$(( $(predictions "$mport") - before_p ))
    [ "$answered" -ge "$ok" ] || { echo "$label: $ok calls succeeded at HTTP level, $answered scored" >&2; exit 1; }
  fi
  printf '%s\t%s\t%s\t%s\t%s\n' "$label" "$ok" "$t0" "$t1" "$(( c1 - c0 ))" >> "$RESULTS"
}
half() { # $1 port, $2 frame, $3 calls/s in total
  local per_client; per_client=$("$PY" -c "print(max(1, round($3 / 4)))")
  h2 "$1" "$2" -D "$HALF_SECONDS" --warm-up-time 1 --rps "$per_client" --log-file "$WORK/half-$1.log" >/dev/null
}

LOAD_BEFORE=$(cut -d' ' -f1-3 /proc/loadavg)
closed bare 50379 $BARE "$WORK/trees.frame" -
closed "probity 500 trees" 50370 $TREES "$WORK/trees.frame" 9770
closed "bare (linear rows)" 50379 $BARE "$WORK/linear.frame" -
closed "probity linear 200" 50371 $LINEAR "$WORK/linear.frame" 9771
rate() { awk -F'\t' -v l="$1" '$1 == l {printf "%d\n", $2 / ($4 - $3)}' "$RESULTS"; }
for spec in "50379 trees bare" "50370 trees probity 500 trees" "50379 linear bare (linear rows)" "50371 linear probity linear 200"; do
  set -- $spec; port=$1; frame=$2; shift 2; label="$*"
  half "$port" "$WORK/$frame.frame" "$(( $(rate "$label") / 2 ))"
  mv "$WORK/half-$port.log" "$WORK/half-$(echo "$label" | tr ' ()' '___').log"
done
LOAD_AFTER=$(cut -d' ' -f1-3 /proc/loadavg)

"$PY" - "$RESULTS" "$WORK" "$TCK" "$LOAD_BEFORE" "$LOAD_AFTER" "$CALLS" <<'PYEOF' | tee "$OUT/h2load.md"
import statistics, sys
results, work, tck, before, after, calls = sys.argv[1:]
rows = [l.rstrip("\n").split("\t") for l in open(results)]
print(f"h2load closed loop, 64 calls in flight (4 connections x 16 streams), {int(calls):,} calls per run; server on core 0, h2load on core 1; load average {before} before, {after} after.\n")
print("| server | calls/s | server CPU per call (us) | server core used | half-load median / p99 latency (us) |")
print("|---|---:|---:|---:|---:|")
share = {}
for label, ok, t0, t1, ticks in rows:
    wall = float(t1) - float(t0)
    cpu = int(ticks) / float(tck)
    share[label] = cpu / wall
    lat = []
    name = label.replace(" ", "_").replace("(", "_").replace(")", "_")
    for line in open(f"{work}/half-{name}.log"):
        parts = line.split()
        if len(parts) >= 3 and parts[1] == "200":
            lat.append(int(parts[2]))
    lat.sort()
    med = statistics.median(lat) if lat else float("nan")
    p99 = lat[min(len(lat) - 1, int(0.99 * len(lat)))] if lat else float("nan")
    print(f"| {label} | {int(ok) / wall:,.0f} | {cpu * 1e6 / int(ok):.1f} | {share[label]:.0%} | {med:.0f} / {p99:.0f} |")
bare = min(v for k, v in share.items() if k.startswith("bare"))
print()
if bare >= 0.95:
    print(f"Valid: the bare server used {bare:.0%} of its core or more in every closed-loop run (h2load was not the limit).")
else:
    print(f"**INVALID**: the bare server used only {bare:.0%} of its core in a closed-loop run; the generator or the machine, not the server, set these figures.")
PYEOF
