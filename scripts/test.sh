#!/usr/bin/env bash
# The project's test command (README.md). Installs and starts what the tests
# need on a fresh machine, runs every test, stops what it started.
#   scripts/test.sh            everything (Kafka, PostgreSQL, promtool included)
#   SKIP_SERVERS=1 scripts/test.sh   unit and binary tests only (no broker, no database)
set -euo pipefail
cd "$(dirname "$0")/.."
root=$PWD

if ! command -v cargo >/dev/null; then
  echo "cargo not found: install Rust with rustup first" >&2
  exit 1
fi

started=()
cleanup() {
  for s in "${started[@]}"; do
    bash "deploy/dev/$s.sh" stop >/dev/null 2>&1 || true
  done
}
trap cleanup EXIT

if [[ -z "${SKIP_SERVERS:-}" ]]; then
  echo "== promtool"
  bash deploy/dev/promtool.sh
  echo "== Chromium (Debian), the browser that renders the HTML report"
  command -v chromium >/dev/null || (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium)
  echo "== DuckDB (PyPI), the outside reader of the Parquet output"
  python3 -c "import duckdb" 2>/dev/null || python3 -m pip install --quiet duckdb
  echo "== Kafka broker"
  t0=$(date +%s)
  bash deploy/dev/kafka.sh start
  started+=(kafka)
  eval "$(bash deploy/dev/kafka.sh env)"
  echo "broker ready after $(( $(date +%s) - t0 ))s at $APPORTION_TEST_KAFKA"
  echo "== PostgreSQL"
  bash deploy/dev/postgres.sh start
  started+=(postgres)
  eval "$(bash deploy/dev/postgres.sh env)"
  export APPORTION_TEST_KAFKA APPORTION_TEST_POSTGRES
  export APPORTION_REQUIRE_SERVERS=1
fi

echo "== format and lints"
if ! cargo fmt --version >/dev/null 2>&1 || ! cargo clippy --version >/dev/null 2>&1; then
  rustup component add rustfmt clippy
fi
cargo fmt --all -- --check
cargo clippy --workspace --all-targets --locked -- -D warnings 2>&1

echo "== cargo test"
cargo test --workspace --release --locked --no-fail-fast 2>&1

echo "== fuzz: every target 60 s under AFL++ (scripts/fuzz.sh; fails on any crash)"
bash scripts/fuzz.sh 60

echo "== benchmark harness smoke test (load/bench.sh --quick; no speed assertions)"
cargo build --release --locked -p apportion -p apportion-load 2>&1
bench_tmp="$(mktemp -d)"
APPORTION_BIN="$root/target/release/apportion" APPORTION_LOAD_BIN="$root/target/release/apportion-load" \
  bash load/bench.sh --quick --latency --open-journeys 20000 --floors "$bench_tmp" || { rm -rf "$bench_tmp"; exit 1; }
rm -rf "$bench_tmp"

if [[ -z "${SKIP_SERVERS:-}" ]]; then
  echo "== deploy checks"
  bash deploy/check.sh
fi
echo "== all tests passed"
