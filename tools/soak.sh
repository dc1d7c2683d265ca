#!/usr/bin/env bash
# The long form of the mixed-load soak: a release build of `probity serve` under scoring from 16 connections at
# 400 calls a second, two outcome streams, a model reload and a report every 5 seconds, for 10 minutes (or the
# minutes given). Prints a summary and a JSON line; exits 1 on any failed request, a p99 above 2 s (stall) or
# resident memory growing by more than 32 MiB after the 2-minute warm-up. Extra arguments go to `probity-load soak`.
#
#   tools/soak.sh            # 10 minutes
#   tools/soak.sh 30         # 30 minutes
#   tools/soak.sh 10 --rate 1000 --connections 32
set -euo pipefail
cd "$(dirname "$0")/.."
MINUTES=${1:-10}
shift || true
cargo build --release -p probity --bin probity -p probity-load --bin probity-load
TARGET=${CARGO_TARGET_DIR:-target}
exec "$TARGET/release/probity-load" soak --minutes "$MINUTES" --warmup 120 --probity "$TARGET/release/probity" "$@"
