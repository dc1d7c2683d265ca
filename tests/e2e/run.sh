#!/usr/bin/env bash
# End-to-end test of `probity serve` from Python's grpcio: builds the binary, installs the pinned packages into
# the project venv, generates the stubs from proto/ into a temporary directory and runs pytest, which starts and
# stops the server itself.
set -euo pipefail
root=$(cd "$(dirname "$0")/../.." && pwd)
venv=${PROBITY_VENV:-$root/.venv}
if [ ! -x "$venv/bin/python" ]; then
  python3 -m venv "$venv"
fi
"$venv/bin/pip" install -q -r "$root/tests/e2e/requirements.txt"
cargo build -q -p probity --bin probity --manifest-path "$root/Cargo.toml"
target_dir=$(cargo metadata --format-version 1 --no-deps --manifest-path "$root/Cargo.toml" \
  | "$venv/bin/python" -c 'import json, sys; print(json.load(sys.stdin)["target_directory"])')
export PROBITY_BIN="$target_dir/debug/probity"
exec "$venv/bin/python" -m pytest -q -p no:cacheprovider "$root/tests/e2e" "$@"
