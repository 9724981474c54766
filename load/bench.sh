#!/usr/bin/env bash
# Throughput baseline (issue 11, "Benchmark"): one run, the same generated
# input for every part, ratios against outside references.
#
# usage: load/bench.sh [--quick] [--events N] [--skip-kafka] [--datadriven-serve] WORKDIR
#   --quick             smoke test of the harness: 20000 events, replay (i) (ii) (iii),
#                       DuckDB and the totals check; the Kafka part only when
#                       APPORTION_TEST_KAFKA is set. Fails only when a step fails or
#                       the totals disagree; never on speed.
#   --events N          events to generate (default 1000000; --quick: 20000)
#   --skip-kafka        leave out part b
#   --datadriven-serve  part b also runs serve with all seven models
#   WORKDIR             scratch directory outside the repository (inputs are kept
#                       there as gen-N.ndjson and reused; outputs are deleted)
#
# Parts:
#  a. `apportion replay` on WORKDIR/gen-N.ndjson with (i) the five rule models,
#     (ii) last_touch,linear, (iii) all seven; then DuckDB (Python module) running
#     last_touch + linear as SQL (load/bench/duckdb_credit.py) over the same input,
#     timed as a whole process. load/bench/compare_totals.py checks that the
#     (model, channel) totals of (ii) and DuckDB agree to 1e-6 relative (and that
#     no row differs). DuckDB runs twice: with its default threads (one per core)
#     and with one thread, as replay credits on one thread. Ratio = DuckDB wall
#     time / replay wall time: how many times faster replay is (> 1: replay is
#     faster).
#  b. Kafka (dev broker of deploy/dev/kafka.sh; APPORTION_TEST_KAFKA, else the
#     broker `kafka.sh env` reports, else skipped): a fresh 4-partition topic
#     filled with the same lines (key = user_id, one event per message);
#     org.apache.kafka.tools.ConsumerPerformance reads the whole topic; then
#     `apportion serve` (five rule models; seven with --datadriven-serve) reads it
#     from a fresh group and writes credit to Kafka topics (serve has no file sink
#     when it reads Kafka). Its time runs from process start until its metrics
#     count every message consumed; peak RSS is VmHWM read before SIGTERM.
#     Ratio = serve events/s / ConsumerPerformance msgs/s (its own reported
#     rate, group join included; 1 = as fast as the bare consumer).
#
# Not yet measured (issue 11 c/d/e): latency percentiles at a fixed input rate,
# RSS with 1M/5M open journeys, serde/HMAC floors.
#
# Output: a table at the end; the same lines are appended to WORKDIR/bench.tsv
# (date, commit, what, events, wall_s, events_per_s, max_rss_kb, reference,
# ref_wall_s, ratio). /usr/bin/time -v logs stay in WORKDIR/logs/.
#
# Binaries: APPORTION_BIN (default target/release/apportion) and
# APPORTION_LOAD_BIN (default target/release/apportion-load); pin copies of
# them if others rebuild the workspace while you measure.
set -euo pipefail

root="$(cd "$(dirname "$0")/.." && pwd)"
gen="${APPORTION_LOAD_BIN:-$root/target/release/apportion-load}"
bin="${APPORTION_BIN:-$root/target/release/apportion}"
export APPORTION_PSEUDONYM_KEY="${APPORTION_PSEUDONYM_KEY:-apportion-load-bench-key}"

quick=0; events=""; skip_kafka=0; dd_serve=0; work=""
while [ $# -gt 0 ]; do
  case "$1" in
    --quick) quick=1 ;;
    --events) events="$2"; shift ;;
    --skip-kafka) skip_kafka=1 ;;
    --datadriven-serve) dd_serve=1 ;;
    -h|--help) sed -n '2,45p' "$0" | sed 's/^# \{0,1\}//'; exit 0 ;;
    -*) echo "bench.sh: unknown option $1" >&2; exit 2 ;;
    *) [ -z "$work" ] || { echo "bench.sh: one WORKDIR only" >&2; exit 2; }; work="$1" ;;
  esac
  shift
done
[ -n "$work" ] || { echo "usage: load/bench.sh [--quick] [--events N] [--skip-kafka] [--datadriven-serve] WORKDIR" >&2; exit 2; }
if [ -z "$events" ]; then
  if [ "$quick" = 1 ]; then events=20000; else events=1000000; fi
fi
users=$(( events / 10 ))
[ "$users" -ge 1 ] || users=1
for b in "$bin" "$gen"; do
  [ -x "$b" ] || { echo "bench.sh: $b not found or not executable (set APPORTION_BIN / APPORTION_LOAD_BIN)" >&2; exit 1; }
done
python3 -c "import duckdb" 2>/dev/null || python3 -m pip install --quiet duckdb

mkdir -p "$work/logs"
work="$(cd "$work" && pwd)"
logs="$work/logs"
tsv="$work/bench.tsv"
[ -f "$tsv" ] || printf 'date\tcommit\twhat\tevents\twall_s\tevents_per_s\tmax_rss_kb\treference\tref_wall_s\tratio\n' > "$tsv"
commit="$(git -C "$root" rev-parse --short HEAD 2>/dev/null || echo unknown)"
stamp="$(date -u +%FT%TZ)"
rules="last_touch,first_touch,linear,time_decay,u_shaped"
seven="$rules,shapley,markov"
summary=()

say() { printf '== %s\n' "$*" >&2; }
# wall seconds of a /usr/bin/time -v log
tv_wall() { grep 'Elapsed (wall clock)' "$1" | awk '{print $NF}' | awk -F: '{ if (NF==3) print $1*3600+$2*60+$3; else print $1*60+$2 }'; }
tv_rss() { grep 'Maximum resident' "$1" | awk '{print $NF}'; }
tv_status() { grep 'Exit status' "$1" | awk '{print $NF}'; }
# a / b to 3 significant digits, "-" when either is missing or b is 0
ratio() { awk -v a="$1" -v b="$2" 'BEGIN { if (a == "" || b == "" || a == "-" || b == "-" || b + 0 == 0) print "-"; else printf "%.3g", a / b }'; }
eps() { awk -v e="$1" -v w="$2" 'BEGIN { if (w + 0 == 0) print "-"; else printf "%.0f", e / w }'; }
# row WHAT WALL EPS RSS REFERENCE REF_WALL RATIO
row() {
  local line
  line="$(printf '%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s' "$stamp" "$commit" "$1" "$events" "$2" "$3" "$4" "$5" "$6" "$7")"
  printf '%s\n' "$line" >> "$tsv"
  summary+=("$line")
}
# timed NAME CMD..: runs CMD under /usr/bin/time -v, log in $logs/NAME.log; fails if CMD fails
timed() {
  local name="$1"; shift
  local log="$logs/$name.log"
  if ! /usr/bin/time -v "$@" > "$log" 2>&1; then
    tail -n 30 "$log" >&2
    echo "bench.sh: step $name failed (log $log)" >&2
    exit 1
  fi
  [ "$(tv_status "$log")" = 0 ] || { tail -n 30 "$log" >&2; echo "bench.sh: step $name failed" >&2; exit 1; }
}

say "load average before: $(cut -d' ' -f1-3 /proc/loadavg); commit $commit; $events events"
input="$work/gen-$events.ndjson"
if [ ! -s "$input" ]; then
  say "generating $input"
  "$gen" gen --events "$events" --users "$users" --seed 1 --out "$input.tmp" >&2
  mv "$input.tmp" "$input"
fi
lines=$(wc -l < "$input")

# ---- a. replay vs DuckDB
runs=("rules:$rules" "lt_linear:last_touch,linear" "seven:$seven")
for r in "${runs[@]}"; do
  tag="${r%%:*}"; models="${r#*:}"
  say "replay ($tag): $models"
  timed "replay-$tag-$events" "$bin" replay --quiet --input "$input" --output "$work/replay-$tag.ndjson" --models "$models"
done
say "DuckDB: last_touch,linear as SQL"
timed "duckdb-$events" python3 "$root/load/bench/duckdb_credit.py" "$input" "$work/duckdb.ndjson"
say "DuckDB again with one thread (replay credits on one thread)"
timed "duckdb-1thread-$events" python3 "$root/load/bench/duckdb_credit.py" --threads 1 "$input" "$work/duckdb-1thread.ndjson"
say "totals check: replay (last_touch,linear) vs DuckDB"
check_log="$logs/totals-$events.tsv"
if ! python3 "$root/load/bench/compare_totals.py" "$work/replay-lt_linear.ndjson" "$work/duckdb.ndjson" > "$check_log"; then
  cat "$check_log" >&2
  echo "bench.sh: replay and DuckDB totals disagree (table: $check_log)" >&2
  exit 1
fi
tail -n 2 "$check_log" >&2
replay_rows=()
for r in "${runs[@]}"; do
  tag="${r%%:*}"
  replay_rows+=("$tag:$(wc -l < "$work/replay-$tag.ndjson")")
done
cmp -s "$work/duckdb.ndjson" "$work/duckdb-1thread.ndjson" || echo "note: DuckDB's row order differs between 1 and N threads (the totals check used the N-thread output)" >&2
rm -f "$work"/replay-*.ndjson "$work/duckdb.ndjson" "$work/duckdb-1thread.ndjson"

d_wall="$(tv_wall "$logs/duckdb-$events.log")"
for r in "${runs[@]}"; do
  tag="${r%%:*}"; models="${r#*:}"
  log="$logs/replay-$tag-$events.log"
  w="$(tv_wall "$log")"
  row "replay $models" "$w" "$(eps "$lines" "$w")" "$(tv_rss "$log")" "duckdb last_touch,linear, $(nproc) threads" "$d_wall" "$(ratio "$d_wall" "$w")"
done
d1_wall="$(tv_wall "$logs/duckdb-1thread-$events.log")"
w="$(tv_wall "$logs/replay-lt_linear-$events.log")"
row "replay last_touch,linear" "$w" "$(eps "$lines" "$w")" "$(tv_rss "$logs/replay-lt_linear-$events.log")" \
  "duckdb last_touch,linear, 1 thread" "$d1_wall" "$(ratio "$d1_wall" "$w")"
row "duckdb last_touch,linear (SQL, $(nproc) threads)" "$d_wall" "$(eps "$lines" "$d_wall")" "$(tv_rss "$logs/duckdb-$events.log")" "-" "-" "-"
row "duckdb last_touch,linear (SQL, 1 thread)" "$d1_wall" "$(eps "$lines" "$d1_wall")" "$(tv_rss "$logs/duckdb-1thread-$events.log")" "-" "-" "-"

# ---- b. serve vs ConsumerPerformance
kafka_part() {
  local kafka="${APPORTION_TEST_KAFKA:-}" topic perf_log perf_rate perf_wall t0 t1 t2
  if [ -z "$kafka" ]; then
    if [ "$quick" = 1 ]; then say "Kafka part skipped (--quick without APPORTION_TEST_KAFKA)"; return 0; fi
    kafka="$(bash "$root/deploy/dev/kafka.sh" env 2>/dev/null | sed -n 's/^export APPORTION_TEST_KAFKA=//p')" || true
    [ -n "$kafka" ] || { say "Kafka part skipped: no broker (start one: bash deploy/dev/kafka.sh start)"; return 0; }
  fi
  local ks=(bash "$root/deploy/dev/kafka.sh")
  topic="bench-$(date +%s)-$$"
  say "Kafka $kafka: topic $topic-events (4 partitions)"
  "${ks[@]}" run org.apache.kafka.tools.TopicCommand --bootstrap-server "$kafka" --create \
    --topic "$topic-events" --partitions 4 --replication-factor 1 > "$logs/topic-$events.log" 2>&1
  say "producing $lines messages (key = user_id)"
  t0=$(date +%s.%N)
  sed -E 's/^.*"user_id":"([^"]*)".*$/\1\t&/' "$input" | "${ks[@]}" run org.apache.kafka.tools.ConsoleProducer \
    --bootstrap-server "$kafka" --topic "$topic-events" --reader-property parse.key=true \
    --reader-property "key.separator=$(printf '\t')" --command-property linger.ms=20 \
    --command-property batch.size=262144 --command-property compression.type=none > "$logs/produce-$events.log" 2>&1
  t1=$(date +%s.%N)
  local pw; pw=$(awk -v a="$t0" -v b="$t1" 'BEGIN { printf "%.2f", b - a }')
  row "produce (ConsoleProducer, keyed)" "$pw" "$(eps "$lines" "$pw")" "-" "-" "-" "-"

  say "ConsumerPerformance over the whole topic"
  perf_log="$logs/consumer-perf-$events.log"
  timed "consumer-perf-process-$events" "${ks[@]}" run org.apache.kafka.tools.ConsumerPerformance \
    --bootstrap-server "$kafka" --topic "$topic-events" --num-records "$lines" --timeout 120000
  cp "$logs/consumer-perf-process-$events.log" "$perf_log"
  # start.time, end.time, MB, MB.sec, nMsg, nMsg.sec, rebalance.time.ms, fetch.time.ms, ...
  local perf_line; perf_line="$(grep -E '^[0-9]{4}-' "$perf_log" | tail -n 1)"
  [ -n "$perf_line" ] || { echo "bench.sh: no ConsumerPerformance result (log $perf_log)" >&2; exit 1; }
  local perf_n; perf_n="$(echo "$perf_line" | awk -F', ' '{print $5}')"
  [ "$perf_n" = "$lines" ] || { echo "bench.sh: ConsumerPerformance read $perf_n of $lines messages" >&2; exit 1; }
  perf_rate="$(echo "$perf_line" | awk -F', ' '{printf "%.0f", $6}')"
  perf_wall="$(awk -v n="$lines" -v r="$perf_rate" 'BEGIN { printf "%.2f", n / r }')"
  local pp_wall; pp_wall="$(tv_wall "$logs/consumer-perf-process-$events.log")"
  row "ConsumerPerformance (reported: $(echo "$perf_line" | awk -F', ' '{printf "rebalance %s ms, fetch %.0f msg/s", $7, $10}'))" \
    "$perf_wall" "$perf_rate" "$(tv_rss "$logs/consumer-perf-process-$events.log")" "-" "-" "-"
  row "ConsumerPerformance (whole JVM process)" "$pp_wall" "$(eps "$lines" "$pp_wall")" \
    "$(tv_rss "$logs/consumer-perf-process-$events.log")" "-" "-" "-"

  local sets=("rules:$rules")
  [ "$dd_serve" = 1 ] && sets+=("seven:$seven")
  local s tag models dir port pid n hwm cfg limit rows_line
  for s in "${sets[@]}"; do
    tag="${s%%:*}"; models="${s#*:}"
    dir="$work/serve-$tag"
    rm -rf "$dir"; mkdir -p "$dir"
    port="$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')"
    cfg="$dir/apportion.toml"
    cat > "$cfg" <<EOF
data_dir = "$dir/data"
models = ["${models//,/\", \"}"]
[admin]
listen = "127.0.0.1:$port"
[log]
format = "text"
level = "info"
[kafka]
brokers = "$kafka"
group_id = "$topic-$tag-group"
input_topics = ["$topic-events"]
credit_topic = "$topic-$tag-credit"
paths_topic = "$topic-$tag-paths"
dead_letter_topic = "$topic-$tag-dead"
repartition_topic = "$topic-$tag-repart"
input_keyed_by_user = true
EOF
    say "serve ($tag): $models, until $lines messages are consumed"
    t0=$(date +%s.%N)
    "$bin" serve --config "$cfg" > "$logs/serve-$tag-$events.log" 2>&1 &
    pid=$!
    limit=$(( 120 + lines / 1000 ))
    n=0
    while :; do
      sleep 0.1
      if ! kill -0 "$pid" 2>/dev/null; then
        tail -n 30 "$logs/serve-$tag-$events.log" >&2
        echo "bench.sh: serve exited early" >&2; exit 1
      fi
      n="$(curl -sf "127.0.0.1:$port/metrics" 2>/dev/null | awk '/^apportion_events_consumed_total/ { s += $NF } END { printf "%.0f", s }')" || n=0
      [ "${n:-0}" -ge "$lines" ] && break
      if awk -v a="$t0" -v b="$(date +%s.%N)" -v l="$limit" 'BEGIN { exit !(b - a > l) }'; then
        kill -TERM "$pid" 2>/dev/null || true; wait "$pid" || true
        echo "bench.sh: serve consumed $n of $lines messages in ${limit}s" >&2; exit 1
      fi
    done
    t1=$(date +%s.%N)
    hwm="$(awk '/^VmHWM/ { print $2 }' "/proc/$pid/status")"
    curl -sf "127.0.0.1:$port/metrics" > "$logs/serve-$tag-$events.metrics" || true
    kill -TERM "$pid"
    wait "$pid" || { tail -n 30 "$logs/serve-$tag-$events.log" >&2; echo "bench.sh: serve did not exit 0 on SIGTERM" >&2; exit 1; }
    t2=$(date +%s.%N)
    local sw; sw=$(awk -v a="$t0" -v b="$t1" 'BEGIN { printf "%.2f", b - a }')
    rows_line="$(awk '/^apportion_credit_rows_total/ { s += $NF } END { printf "%.0f", s }' "$logs/serve-$tag-$events.metrics")"
    say "serve ($tag): ${sw}s, VmHWM ${hwm} kB, $rows_line credit rows at that moment, stop took $(awk -v a="$t1" -v b="$t2" 'BEGIN { printf "%.1f", b - a }')s"
    # the group's committed lag after the stop (not timed)
    "${ks[@]}" run org.apache.kafka.tools.consumer.group.ConsumerGroupCommand --bootstrap-server "$kafka" \
      --describe --group "$topic-$tag-group" > "$logs/serve-$tag-$events.lag" 2>&1 || true
    local lag; lag="$(awk '$2 == "'"$topic-events"'" && $6 ~ /^[0-9]+$/ { s += $6 } END { printf "%.0f", s }' "$logs/serve-$tag-$events.lag")"
    say "serve ($tag): committed lag after stop: ${lag:-?} (ConsumerGroupCommand)"
    row "serve $models (kafka in/out)" "$sw" "$(eps "$lines" "$sw")" "$hwm" "ConsumerPerformance" "$perf_wall" \
      "$(ratio "$(eps "$lines" "$sw")" "$perf_rate")"
    rm -rf "$dir"
  done
  # best effort: the topics hold a copy of the input
  "${ks[@]}" run org.apache.kafka.tools.TopicCommand --bootstrap-server "$kafka" --delete \
    --topic "$topic-.*" > /dev/null 2>&1 || true
}
if [ "$skip_kafka" = 1 ]; then say "Kafka part skipped (--skip-kafka)"; else kafka_part; fi

# ---- summary
echo
echo "Throughput baseline, $events events ($lines lines), commit $commit, $stamp; replay credit rows: ${replay_rows[*]}"
echo "ratio: replay rows = DuckDB wall / replay wall (> 1: replay faster); serve = serve events/s / ConsumerPerformance msgs/s"
{
  printf 'what\twall_s\tevents_per_s\tmax_rss_kb\treference\tref_wall_s\tratio\n'
  for l in "${summary[@]}"; do printf '%s\n' "$l" | cut -f3,5-10; done
} | if command -v column > /dev/null; then column -t -s "$(printf '\t')"; else cat; fi
echo "(appended to $tsv; logs in $logs)"
