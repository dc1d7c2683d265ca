#!/usr/bin/env bash
# What TLS and the access check cost per call: two `probity serve` with the same model (linear_200, the cheapest, so
# the transport's share is largest), one plain text on loopback without callers, one with TLS and a bearer-token
# caller, both pinned to core 0; `probity-load run` on core 1 against each in turn, PAIRS alternating pairs.
# Prints one JSON line per run (probity-load's) and the median ratios TLS / plain of CPU per call and p50 latency.
#
#   tools/bench/tls.sh                  # 5 pairs of 5 s runs at concurrency 16
#   PAIRS=11 SECONDS_EACH=8 tools/bench/tls.sh
set -euo pipefail
cd "$(dirname "$0")/../.."
PY=.venv/bin/python
M=target/bench-models
[ -f $M/manifest.json ] || "$PY" tools/bench/make_bench_models.py
cargo build --release -p probity --bin probity -p probity-load --bin probity-load
BIN=target/release
PAIRS=${PAIRS:-5}; SECS=${SECONDS_EACH:-5}; CONC=${CONCURRENCY:-16}
WORK=$(mktemp -d); PIDS=()
cleanup() { for p in "${PIDS[@]}"; do kill "$p" 2>/dev/null || true; done; wait 2>/dev/null || true; rm -rf "$WORK"; }
trap cleanup EXIT

# A throwaway CA and a server certificate for 127.0.0.1.
ossl() { openssl "$@" >/dev/null 2>&1; }
ossl req -x509 -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes -keyout "$WORK/ca.key" -out "$WORK/ca.crt" \
  -days 1 -subj "/CN=bench CA" -addext basicConstraints=critical,CA:TRUE -addext keyUsage=critical,keyCertSign
ossl req -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes -keyout "$WORK/server.key" -out "$WORK/server.csr" \
  -subj "/CN=bench server"
printf 'basicConstraints=CA:FALSE\nsubjectAltName=IP:127.0.0.1\nextendedKeyUsage=serverAuth\n' >"$WORK/ext"
ossl x509 -req -in "$WORK/server.csr" -CA "$WORK/ca.crt" -CAkey "$WORK/ca.key" -CAcreateserial -days 1 \
  -extfile "$WORK/ext" -out "$WORK/server.crt"
head -c 32 /dev/urandom | base64 | tr -d '/+=' >"$WORK/token"; chmod 600 "$WORK/token" "$WORK/server.key"
mkdir "$WORK/models"; cp $M/linear_200.json "$WORK/models/"

serve() { # $1 port, $2 extra [server] lines and tables
  cat >"$WORK/p$1.toml" <<TOML
[server]
grpc_listen = "127.0.0.1:$1"
metrics_listen = "127.0.0.1:$(($1 + 100))"
reflection = false
$2
[models]
directory = "$WORK/models"
watch = false
[logging]
level = "warn"
[routes.bench]
model = "linear_200"
missing_features = "route_as_missing"
TOML
  taskset -c 0 $BIN/probity serve --config "$WORK/p$1.toml" 2>>"$WORK/serve.log" &
  PIDS+=($!)
  for _ in $(seq 1 300); do (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null && return 0; sleep 0.1; done
  cat "$WORK/serve.log" >&2; exit 1
}
serve 50290 'plaintext = "loopback"'; PLAIN=${PIDS[-1]}
serve 50291 "[server.tls]
certificate_file = \"$WORK/server.crt\"
key_file = \"$WORK/server.key\"
[[access.callers]]
name = \"bench\"
token_file = \"$WORK/token\"
roles = [\"score\"]"; TLS=${PIDS[-1]}

run() { # $1 label, $2 port, $3 pid, rest: extra args
  local label=$1 port=$2 pid=$3; shift 3
  taskset -c 1 $BIN/probity-load run --target 127.0.0.1:$port --model $M/linear_200.json --rows $M/linear_rows.f64 \
    --server-pid "$pid" --duration "$SECS" --warmup 1 --concurrency "$CONC" --label "$label" "$@" | tee -a "$WORK/runs.jsonl"
}
for i in $(seq 1 "$PAIRS"); do
  # Both orders, so a drift of the machine's load does not favour one side.
  if [ $((i % 2)) = 1 ]; then run plain 50290 $PLAIN; fi
  run tls 50291 $TLS --ca-file "$WORK/ca.crt" --token-file "$WORK/token"
  if [ $((i % 2)) = 0 ]; then run plain 50290 $PLAIN; fi
done
"$PY" - "$WORK/runs.jsonl" <<'PY'
import json, statistics, sys
runs = [json.loads(l) for l in open(sys.argv[1])]
def field(label, *names):
    rows = [r for r in runs if r.get("label") == label]
    for n in names:
        if rows and n in rows[0]:
            return [r[n] for r in rows]
    raise SystemExit(f"none of {names} in probity-load output: {sorted(runs[0])}")
cpu = [t / p for t, p in zip(field("tls", "server_cpu_us_per_call"), field("plain", "server_cpu_us_per_call"))]
p50 = [t / p for t, p in zip(field("tls", "p50_us"), field("plain", "p50_us"))]
print(json.dumps({"pairs": len(cpu), "cpu_per_call_ratio_median": round(statistics.median(cpu), 3),
                  "cpu_ratio_range": [round(min(cpu), 3), round(max(cpu), 3)],
                  "p50_ratio_median": round(statistics.median(p50), 3),
                  "errors": sum(field("tls", "errors")) + sum(field("plain", "errors"))}))
PY
