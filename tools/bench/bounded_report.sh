#!/usr/bin/env bash
# A report and a comparison over a large prediction store, on both backends: resident memory before, the peak rise
# during each, and the time (service/examples/bounded_report.rs). Generated stores are removed afterwards (the
# SQLite directory and the PostgreSQL database this script made).
#
#   tools/bench/bounded_report.sh [N] [loaded]
#
# N predictions (N/2 ids scored by a champion and a challenger; every fifth id has an outcome, so N/10 outcomes
# labelling N/5 predictions); default 2000000. "loaded" also runs the old computation from the loaded range.
# PostgreSQL at PROBITY_TEST_POSTGRES's server (default postgresql://postgres@127.0.0.1:5432/postgres).
set -euo pipefail
cd "$(dirname "$0")/../.."
n=${1:-2000000}
loaded=${2:-}
admin=${PROBITY_TEST_POSTGRES:-postgresql://postgres@127.0.0.1:5432/postgres}
db=probity_bench_bounded_$$
dir=$(mktemp -d "${TMPDIR:-/tmp}/probity-bounded.XXXXXX")
cleanup() {
  rm -rf "$dir"
  psql "$admin" -qc "DROP DATABASE IF EXISTS $db WITH (FORCE)" >/dev/null 2>&1 || true
}
trap cleanup EXIT
CARGO_BUILD_JOBS=${CARGO_BUILD_JOBS:-2} cargo build --release -q -p probity --example bounded_report
bin=target/release/examples/bounded_report
echo "== $n predictions; machine load: $(cut -d' ' -f1-3 /proc/loadavg)"
echo "-- SQLite"
"$bin" fill sqlite "$dir" "$n"
echo "store file: $(du -h "$dir/predictions.db" | cut -f1)"
"$bin" measure sqlite "$dir"
[ "$loaded" = loaded ] && "$bin" measure sqlite "$dir" loaded
rm -rf "$dir"/*
echo "-- PostgreSQL"
psql "$admin" -qc "CREATE DATABASE $db"
url="${admin%/*}/$db"
"$bin" fill postgres "$url" "$n"
echo "database size: $(psql "$url" -Atc "SELECT pg_size_pretty(pg_database_size(current_database()))")"
"$bin" measure postgres "$url"
[ "$loaded" = loaded ] && "$bin" measure postgres "$url" loaded
echo "machine load after: $(cut -d' ' -f1-3 /proc/loadavg)"
