#!/usr/bin/env bash
# The cost of `record = "before-answer"` (an answer waits for its prediction's commit) against the default
# `record = "after-answer"`, in one run: one `probity serve` per (store, mode) with the same small linear model,
# server pinned to core 0 and probity-load on core 1, unary Score calls closed loop at several concurrencies.
#
#   tools/bench/record.sh              # about 2 minutes
#   QUICK=1 tools/bench/record.sh      # 1-second runs, for a smoke test
#
# Stores: SQLite with durability "normal" (a commit survives a killed process, not a power loss) and "full" (one
# disk flush per commit), and PostgreSQL at 127.0.0.1:5432 (PROBITY_BENCH_POSTGRES: an administrative URL; a
# database of the script's own is created and dropped; skipped when psql cannot reach it).
# Output: target/bench-results/record.jsonl (one JSON line per run) and record.md (table).
set -euo pipefail
cd "$(dirname "$0")/../.."
OUT=target/bench-results; mkdir -p "$OUT"
cargo build --release -p probity --bin probity -p probity-load --bin probity-load
BIN=target/release
DUR=${DUR:-6}; WARM=1
if [ -n "${QUICK:-}" ]; then DUR=1; WARM=0.3; fi
ADMIN=${PROBITY_BENCH_POSTGRES:-postgresql://postgres@127.0.0.1:5432/postgres}
WORK=$(mktemp -d); PIDS=(); DB=""
cleanup() {
  for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true
  [ -n "$DB" ] && psql -q "$ADMIN" -c "DROP DATABASE IF EXISTS $DB WITH (FORCE)" >/dev/null 2>&1 || true
  rm -rf "$WORK"
}
trap cleanup EXIT

# A linear model of 20 numeric features and 10,000 rows for it (invented; little-endian float64, row-major).
python3 - "$WORK" <<'PY'
import json, random, struct, sys
work = sys.argv[1]
rng = random.Random(20)
n = 20
model = {"format": "probity.model", "format_version": 1, "name": "credit", "version": "1",
         "features": [{"name": f"x{i}", "type": "numeric"} for i in range(n)],
         "margin_scale": "log_odds", "base_rate": 0.05,
         "linear": {"intercept": -3.0,
                    "terms": [{"numeric": {"feature": i, "coefficient": rng.uniform(-0.5, 0.5)}} for i in range(n)]}}
import os
os.makedirs(f"{work}/models", exist_ok=True)
json.dump(model, open(f"{work}/models/credit.json", "w"))
with open(f"{work}/rows.f64", "wb") as f:
    for _ in range(10_000):
        f.write(struct.pack(f"<{n}d", *(rng.gauss(0, 1) for _ in range(n))))
PY

PG_OK=""
if psql -q "$ADMIN" -c "SELECT 1" >/dev/null 2>&1; then
  DB=probity_bench_record_$$
  psql -q "$ADMIN" -c "CREATE DATABASE $DB" >/dev/null
  echo "${ADMIN%/*}/$DB" > "$WORK/db-url"
  PG_OK=1
else
  echo "PostgreSQL does not answer at $ADMIN: its runs are skipped" >&2
fi

# config: $1 offset, $2 store section body, $3 record mode
config() {
  cat > "$WORK/probity-$1.toml" <<TOML
[server]
plaintext = "loopback"
grpc_listen = "127.0.0.1:$((50270 + $1))"
metrics_listen = "127.0.0.1:$((9670 + $1))"
reflection = false
[models]
directory = "$WORK/models"
watch = false
[limits]
max_concurrent_requests = 4096
[logging]
level = "warn"
[store]
$2
[routes.credit]
model = "credit"
record = "$3"
TOML
  echo "$WORK/probity-$1.toml"
}
wait_port() { for _ in $(seq 1 300); do (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null && return 0; sleep 0.1; done; echo "port $1 never opened" >&2; exit 1; }

: > "$OUT/record.jsonl"
# Each server runs alone (started, measured, stopped), so that their writers do not compete.
run_server() { # $1 offset, $2 label, $3 store section, $4 record mode
  taskset -c 0 $BIN/probity serve --config "$(config "$1" "$3" "$4")" >"$WORK/serve-$1.log" 2>&1 &
  local pid=$!; PIDS+=($pid)
  wait_port $((50270 + $1))
  for c in 1 16 64; do
    taskset -c 1 $BIN/probity-load run --target 127.0.0.1:$((50270 + $1)) --route credit \
      --model "$WORK/models/credit.json" --rows "$WORK/rows.f64" --server-pid "$pid" \
      --concurrency $c --duration "$DUR" --warmup "$WARM" --label "$2" | tee -a "$OUT/record.jsonl"
  done
  kill "$pid"; wait "$pid" 2>/dev/null || true
}
run_server 0 "sqlite normal, after-answer" "directory = \"$WORK/s0\"
durability = \"normal\"" after-answer
run_server 1 "sqlite normal, before-answer" "directory = \"$WORK/s1\"
durability = \"normal\"" before-answer
run_server 2 "sqlite full, after-answer" "directory = \"$WORK/s2\"
durability = \"full\"" after-answer
run_server 3 "sqlite full, before-answer" "directory = \"$WORK/s3\"
durability = \"full\"" before-answer
if [ -n "$PG_OK" ]; then
  run_server 4 "postgres, after-answer" "backend = \"postgres\"
postgres_url_file = \"$WORK/db-url\"
directory = \"$WORK/p4\"" after-answer
  run_server 5 "postgres, before-answer" "backend = \"postgres\"
postgres_url_file = \"$WORK/db-url\"
directory = \"$WORK/p5\"" before-answer
fi

python3 - "$OUT/record.jsonl" <<'PY' | tee "$OUT/record.md"
import json, sys
runs = [json.loads(l) for l in open(sys.argv[1]) if l.strip()]
base = {(r["label"].split(",")[0], r["concurrency"]): r for r in runs if r["label"].endswith("after-answer")}
print("| store, mode | concurrency | calls/s | p50 us | p99 us | server CPU us/call | calls/s vs after-answer | p50 added us |")
print("|---|---:|---:|---:|---:|---:|---:|---:|")
for r in runs:
    b = base.get((r["label"].split(",")[0], r["concurrency"]))
    ratio = f"{r['calls_per_s'] / b['calls_per_s']:.2f}x" if b and b is not r else ""
    added = f"{r['p50_us'] - b['p50_us']:+,.0f}" if b and b is not r else ""
    cpu = r.get("server_cpu_us_per_call")
    cpu = f"{cpu:.1f}" if cpu is not None else ""
    print(f"| {r['label']} | {r['concurrency']} | {r['calls_per_s']:,.0f} | {r['p50_us']:,.0f} | {r['p99_us']:,.0f} | "
          f"{cpu} | {ratio} | {added} |")
PY
