#!/usr/bin/env bash
# Replay at scale: generate inputs with `apportion-load gen` and time
# `apportion replay` on them with /usr/bin/time -v (wall time, peak RSS).
#
# usage: load/bench/replay_scale.sh WORKDIR EVENTS ORDER MODELS [ORDER MODELS ...]
#        load/bench/replay_scale.sh WORKDIR EVENTS --record ORDER MODELS LOG LOADAVG
#   ORDER:  sorted | unsorted
#   MODELS: rules (the five rule models) | datadriven (shapley,markov) | a model list
# example: load/bench/replay_scale.sh "$BENCH" 10000000 sorted rules unsorted rules
#   (BENCH: any scratch directory outside the repository)
#
# Inputs are kept in WORKDIR (gen-<order>-<events>.ndjson, reused when
# present); credit output goes to WORKDIR/credit.ndjson and is deleted after
# each run. APPORTION_BIN pins the binary (default target/release/apportion;
# copy it aside first if others rebuild the workspace while you measure).
# One line per run is appended to WORKDIR/replay_scale.tsv, and the full
# /usr/bin/time -v output goes to WORKDIR/replay-<order>-<models>-<events>.log.
set -euo pipefail

root="$(cd "$(dirname "$0")/../.." && pwd)"
gen="${APPORTION_LOAD_BIN:-$root/target/release/apportion-load}"
bin="${APPORTION_BIN:-$root/target/release/apportion}"
work="$1"; events="$2"; shift 2
users=$(( events / 10 ))
mkdir -p "$work"
export APPORTION_PSEUDONYM_KEY="${APPORTION_PSEUDONYM_KEY:-apportion-load-bench-key}"
tsv="$work/replay_scale.tsv"
[ -f "$tsv" ] || printf 'date\tevents\torder\tmodels\twall_s\tuser_s\tsys_s\tcpu_pct\tmax_rss_kb\tevents_per_s\tcredit_rows\tcredit_bytes\tload_avg_before\n' > "$tsv"

# Appends the TSV line of one finished run: record LOG EVENTS ORDER MODELS LOAD
record() {
  local log="$1" events="$2" order="$3" models="$4" load="$5"
  local bytes=0
  if [ -f "$work/credit.ndjson" ]; then bytes=$(stat -c %s "$work/credit.ndjson"); rm -f "$work/credit.ndjson"; fi
  local wall user sys cpu rss rows eps
  wall=$(grep 'Elapsed (wall clock)' "$log" | awk '{print $NF}' | awk -F: '{ if (NF==3) print $1*3600+$2*60+$3; else print $1*60+$2 }')
  user=$(grep 'User time' "$log" | awk '{print $NF}')
  sys=$(grep 'System time' "$log" | awk '{print $NF}')
  cpu=$(grep 'Percent of CPU' "$log" | awk '{print $NF}' | tr -d %)
  rss=$(grep 'Maximum resident' "$log" | awk '{print $NF}')
  rows=$(grep -o '[0-9]* credit rows' "$log" | awk '{print $1}')
  eps=$(awk -v e="$events" -v w="$wall" 'BEGIN { printf "%.0f", e / w }')
  printf '%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\n' "$(date -u +%FT%TZ)" "$events" "$order" "$models" \
    "$wall" "$user" "$sys" "$cpu" "$rss" "$eps" "$rows" "$bytes" "$load" | tee -a "$tsv"
}

if [ "${1:-}" = "--record" ]; then
  # Record a run whose /usr/bin/time -v log already exists: --record ORDER MODELS LOG LOAD
  record "$4" "$events" "$2" "$3" "$5"
  exit 0
fi

while [ $# -ge 2 ]; do
  order="$1"; models="$2"; shift 2
  case "$models" in
    rules) list="last_touch,first_touch,linear,time_decay,u_shaped" ;;
    datadriven) list="shapley,markov" ;;
    *) list="$models" ;;
  esac
  input="$work/gen-$order-$events.ndjson"
  if [ ! -f "$input" ]; then
    flag=""; [ "$order" = unsorted ] && flag="--unsorted"
    "$gen" gen --events "$events" --users "$users" --seed 1 --out "$input" $flag
  fi
  log="$work/replay-$order-$models-$events.log"
  load="$(cut -d' ' -f1-3 /proc/loadavg)"
  /usr/bin/time -v "$bin" replay --input "$input" --output "$work/credit.ndjson" --models "$list" > "$log" 2>&1
  record "$log" "$events" "$order" "$models" "$load"
done
