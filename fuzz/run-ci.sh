#!/usr/bin/env bash
# Bounded fuzz pass for CI: each target runs for FUZZ_SECONDS (default 60) from the committed seed corpus, and the
# script exits non-zero when a target crashes (the crashing input is kept under fuzz/artifacts/<target>/).
#
# cargo-fuzz is installed if missing. It drives libFuzzer through rustc's -Z flags; RUSTC_BOOTSTRAP=1 lets the
# stable toolchain accept them. No sanitizer (`-s none`): the crates forbid unsafe code, and the point here is
# panics, overflow checks and debug assertions, which stay on. The instrumented build is kept in FUZZ_TARGET_DIR
# (default ~/.cache/probity-fuzz-target) so that a later run on the same machine only rebuilds what changed.
#
#   fuzz/run-ci.sh                      # 5 targets x 60 s
#   FUZZ_SECONDS=600 fuzz/run-ci.sh     # the long form
set -euo pipefail
cd "$(dirname "$0")"

seconds=${FUZZ_SECONDS:-60}
targets=(${FUZZ_TARGETS:-model_load request_decode csv_cell config_load outcome_path})
target_dir=${FUZZ_TARGET_DIR:-$HOME/.cache/probity-fuzz-target}
export RUSTC_BOOTSTRAP=1

if ! cargo fuzz --version >/dev/null 2>&1; then
    echo "== installing cargo-fuzz"
    cargo install cargo-fuzz --locked --version 0.13.2
fi

flags=(-s none --target-dir "$target_dir")
echo "== building the fuzz targets"
cargo fuzz build "${flags[@]}"

status=0
for t in "${targets[@]}"; do
    echo "== fuzzing $t for ${seconds}s"
    work=$(mktemp -d)
    mkdir -p "artifacts/$t"
    if [ ! -d "corpus/$t" ]; then
        echo "!! $t has no committed corpus (fuzz/corpus/$t)" >&2
        status=1
        continue
    fi
    # New inputs go to a scratch directory, so the committed corpus is only read. Model files up to 100 kB keep
    # the reference fixtures whole.
    if ! cargo fuzz run "${flags[@]}" "$t" "$work" "corpus/$t" -- \
        -max_total_time="$seconds" -max_len=100000 -timeout=10 -rss_limit_mb=2048 \
        -artifact_prefix="artifacts/$t/" -print_final_stats=1 2>"$work.log"; then
        status=1
        echo "!! $t crashed; input kept in fuzz/artifacts/$t/" >&2
        grep -E "panicked|ERROR|SUMMARY|Test unit written" "$work.log" >&2 || tail -40 "$work.log" >&2
    fi
    grep -E "stat::number_of_executed_units|stat::peak_rss_mb|Done [0-9]+ runs" "$work.log" || true
    rm -rf "$work" "$work.log"
done
exit $status
