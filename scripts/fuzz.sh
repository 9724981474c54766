#!/usr/bin/env bash
# Coverage-guided fuzzing of the event parsers and the engine
# (DEVELOPERS.md, "Fuzzing").
#   scripts/fuzz.sh            every target for 60 s (the CI run)
#   scripts/fuzz.sh 3600       every target for an hour
#   FUZZ_TARGETS="engine" scripts/fuzz.sh 600   one target
#
# Installs cargo-afl from crates.io when missing (it builds AFL++ from the
# sources the crate ships, on stable Rust), runs the checks' unit tests
# (seeds and regression inputs, no AFL++), builds the targets with AFL++
# instrumentation, runs each under afl-fuzz for the given seconds and fails
# when any run saved a crash. Findings stay in fuzz/out/<target>/.
set -euo pipefail
cd "$(dirname "$0")/../fuzz"

secs="${1:-60}"
targets="${FUZZ_TARGETS:-event_json event_protobuf engine}"
# The afl crate in fuzz/Cargo.lock and cargo-afl must be the same release.
afl_version=0.18.2
t_start=$(date +%s)

if ! command -v cargo >/dev/null; then
  echo "cargo not found: install Rust with rustup first" >&2
  exit 1
fi

echo "== cargo-afl $afl_version"
if [[ "$(cargo afl --version 2>/dev/null || true)" != "cargo-afl $afl_version "* ]]; then
  cargo install --locked --force cargo-afl --version "$afl_version"
fi
# Builds AFL++ for this toolchain once; "already built" is not an error.
if ! out=$(cargo afl config --build 2>&1); then
  grep -q "already built" <<<"$out" || { echo "$out" >&2; exit 1; }
fi

echo "== checks on the seeds and regression inputs (no AFL++)"
cargo test --release --locked --lib 2>&1

echo "== build the targets with AFL++ instrumentation"
cargo afl build --release --locked 2>&1

# Shared, unprepared machines: no CPU frequency governor to read, a core
# pattern that pipes to a handler, other work on the cores.
export AFL_SKIP_CPUFREQ=1 AFL_I_DONT_CARE_ABOUT_MISSING_CRASHES=1 AFL_NO_AFFINITY=1 AFL_NO_UI=1

failed=0
summary=()
for t in $targets; do
  echo "== fuzz $t for ${secs}s"
  rm -rf "out/$t"
  mkdir -p out
  dict=()
  [[ -f "dict/$t.dict" ]] && dict=(-x "dict/$t.dict")
  # -V: stop after that many seconds. -t: per-input time limit (ms); an
  # engine input is at most 64 steps, a few milliseconds.
  cargo afl fuzz -i "seeds/$t" -o "out/$t" "${dict[@]}" -t 2000 -V "$secs" "target/release/$t" >"out/$t.log" 2>&1 || {
    echo "afl-fuzz failed for $t; its log:" >&2
    tail -30 "out/$t.log" >&2
    exit 1
  }
  stats="out/$t/default/fuzzer_stats"
  get() { awk -v k="$1" '$1 == k { print $3 }' "$stats"; }
  crashes=$(find "out/$t/default/crashes" -type f ! -name README.txt | wc -l)
  hangs=$(find "out/$t/default/hangs" -type f | wc -l)
  line="$t: $(get execs_done) execs ($(get execs_per_sec)/s), corpus $(get corpus_count), edges $(get bitmap_cvg), crashes $crashes, hangs $hangs"
  summary+=("$line")
  echo "$line"
  if ((crashes > 0)); then
    failed=1
    for f in "out/$t/default/crashes"/id*; do
      echo "-- crash input $f; reproduce: fuzz/target/release/$t < $f" >&2
      "target/release/$t" <"$f" 2>&1 | grep -m1 -A2 panicked >&2 || true
    done
  fi
done

echo "== fuzz summary (${secs}s per target, $(( $(date +%s) - t_start ))s in all)"
printf '%s\n' "${summary[@]}"
if ((failed)); then
  echo "crash found: keep the input in fuzz/regressions/<target>/ with the fix" >&2
  exit 1
fi
