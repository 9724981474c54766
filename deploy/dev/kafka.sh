#!/usr/bin/env bash
# A single-node Apache Kafka broker (KRaft, broker+controller in one JVM) on 127.0.0.1
# for tests and benchmarks. The jars come from Maven Central through Maven
# (deploy/dev/kafka/pom.xml) and are cached under deploy/dev/.cache/.
#
#   kafka.sh start            start (or, if running, just print env); prints the env line
#   kafka.sh stop             stop the broker and delete its data
#   kafka.sh restart          stop the broker and start it again on the same ports, keeping its data
#   kafka.sh status           "running ..." (exit 0) or "stopped" (exit 1)
#   kafka.sh env              export APPORTION_TEST_KAFKA=127.0.0.1:PORT (exit 1 if stopped)
#   kafka.sh topics-create NAME PARTITIONS [KEY=VALUE..]  create a topic (no-op if it exists)
#   kafka.sh perf-classpath   class path of broker + tools jars (fetches them if needed)
#   kafka.sh run CLASS ARGS.. run a Kafka tool class, e.g. org.apache.kafka.tools.ConsumerPerformance
#   kafka.sh version          the Kafka version these scripts use
#
# Environment: KAFKA_VERSION (default 4.3.1), KAFKA_PORT / KAFKA_CONTROLLER_PORT (default:
# free ports), KAFKA_HEAP_OPTS (default -Xms256m -Xmx512m), KAFKA_START_TIMEOUT seconds
# (default 120), APPORTION_DEV_RUN_DIR / APPORTION_DEV_CACHE_DIR (default deploy/dev/run, .cache).
set -euo pipefail

DEV_SCRIPT_NAME=kafka.sh
# shellcheck source=lib.sh
source "$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)/lib.sh"

KAFKA_VERSION="${KAFKA_VERSION:-4.3.1}"
LIB_DIR="$DEV_CACHE_DIR/kafka-$KAFKA_VERSION/lib"
RUN="$DEV_RUN_DIR/kafka"
PID_FILE="$RUN/broker.pid"
PORT_FILE="$RUN/port"
LOG_FILE="$RUN/broker.log"
DATA_DIR="$RUN/data"
HEAP_OPTS="${KAFKA_HEAP_OPTS:--Xms256m -Xmx512m}"
START_TIMEOUT="${KAFKA_START_TIMEOUT:-120}"

# Fetches the jars once; later calls find $LIB_DIR/.complete and do nothing.
ensure_jars() {
  [[ -f "$LIB_DIR/.complete" ]] && return 0
  command -v mvn >/dev/null || die "mvn not found (Maven is needed to fetch the Kafka jars)"
  command -v java >/dev/null || die "java not found (Java 17+ is needed to run Kafka)"
  local tmp="$LIB_DIR.tmp.$$"
  rm -rf "$tmp"
  mkdir -p "$tmp"
  say "fetching Apache Kafka $KAFKA_VERSION jars with Maven into $LIB_DIR"
  # KAFKA_MVN_OPTS: extra Maven arguments, e.g. -Dmaven.repo.local=/some/dir
  # shellcheck disable=SC2086
  if ! mvn -q -B -f "$DEV_DIR/kafka/pom.xml" ${KAFKA_MVN_OPTS:-} \
    -Dkafka.version="$KAFKA_VERSION" -DincludeScope=runtime -DoutputDirectory="$tmp" \
    dependency:copy-dependencies >"$tmp.mvn.log" 2>&1; then
    tail -n 30 "$tmp.mvn.log" >&2
    rm -rf "$tmp" "$tmp.mvn.log"
    die "Maven could not fetch org.apache.kafka:kafka_2.13:$KAFKA_VERSION"
  fi
  rm -f "$tmp.mvn.log"
  [[ -f "$tmp/kafka_2.13-$KAFKA_VERSION.jar" ]] || die "kafka_2.13-$KAFKA_VERSION.jar missing after Maven"
  touch "$tmp/.complete"
  rm -rf "$LIB_DIR"
  mv "$tmp" "$LIB_DIR"
}

classpath() {
  local f cp=""
  for f in "$LIB_DIR"/*.jar; do cp="${cp:+$cp:}$f"; done
  echo "$cp"
}

# Runs a Kafka class in a small JVM (tools, not the broker). Log output at WARN.
run_class() {
  ensure_jars
  java -Xmx256m -XX:+UseSerialGC -XX:TieredStopAtLevel=1 -Djava.awt.headless=true \
    -Dorg.slf4j.simpleLogger.defaultLogLevel=warn -Dorg.slf4j.simpleLogger.logFile=System.err \
    -cp "$(classpath)" "$@"
}

# Running = our pid is alive and its port accepts connections.
running() { pid_alive "$PID_FILE" && [[ -s "$PORT_FILE" ]] && tcp_answers "$(cat "$PORT_FILE")"; }

print_env() { echo "export APPORTION_TEST_KAFKA=127.0.0.1:$(cat "$PORT_FILE")"; }

write_config() {
  local port="$1" cport="$2"
  cat >"$RUN/server.properties" <<EOF
# Written by deploy/dev/kafka.sh; one node that is both broker and controller (KRaft).
process.roles=broker,controller
node.id=1
controller.quorum.voters=1@127.0.0.1:$cport
listeners=PLAINTEXT://127.0.0.1:$port,CONTROLLER://127.0.0.1:$cport
advertised.listeners=PLAINTEXT://127.0.0.1:$port
listener.security.protocol.map=PLAINTEXT:PLAINTEXT,CONTROLLER:PLAINTEXT
inter.broker.listener.name=PLAINTEXT
controller.listener.names=CONTROLLER
log.dirs=$DATA_DIR
num.partitions=4
default.replication.factor=1
min.insync.replicas=1
auto.create.topics.enable=true
offsets.topic.replication.factor=1
offsets.topic.num.partitions=4
transaction.state.log.replication.factor=1
transaction.state.log.min.isr=1
transaction.state.log.num.partitions=4
share.coordinator.state.topic.replication.factor=1
share.coordinator.state.topic.min.isr=1
group.initial.rebalance.delay.ms=0
num.network.threads=2
num.io.threads=4
num.recovery.threads.per.data.dir=1
log.retention.hours=24
EOF
}

tail_log() {
  if [[ -f "$LOG_FILE" ]]; then
    say "last lines of $LOG_FILE:"
    tail -n 40 "$LOG_FILE" >&2
  fi
}

kill_broker() {
  local pid i
  pid_alive "$PID_FILE" || return 0
  pid="$(cat "$PID_FILE")"
  kill -TERM "$pid" 2>/dev/null || true
  for ((i = 0; i < 300; i++)); do
    kill -0 "$pid" 2>/dev/null || return 0
    sleep 0.1
  done
  say "broker pid $pid did not stop in 30 s; killing it"
  kill -KILL "$pid" 2>/dev/null || true
  for ((i = 0; i < 50; i++)); do
    kill -0 "$pid" 2>/dev/null || return 0
    sleep 0.1
  done
}

do_stop() {
  if pid_alive "$PID_FILE"; then
    say "stopping broker pid $(cat "$PID_FILE")"
    kill_broker
  fi
  rm -rf "$DATA_DIR" "$PID_FILE" "$PORT_FILE" "$RUN/controller.port" "$RUN/server.properties"
}

do_start() {
  if running; then
    print_env
    return 0
  fi
  # Leftovers of a broker that died: clear them.
  do_stop
  ensure_jars
  mkdir -p "$RUN"

  local port cport
  port="${KAFKA_PORT:-$(free_port)}"
  cport="${KAFKA_CONTROLLER_PORT:-$(free_port "$port")}"
  ! port_in_use "$port" || die "port $port is already in use"
  ! port_in_use "$cport" || die "controller port $cport is already in use"
  [[ "$port" != "$cport" ]] || die "KAFKA_PORT and KAFKA_CONTROLLER_PORT must differ"
  write_config "$port" "$cport"

  local cluster_id
  cluster_id="$(run_class kafka.tools.StorageTool random-uuid | tail -n 1)"
  [[ -n "$cluster_id" ]] || die "StorageTool random-uuid printed nothing"
  if ! run_class kafka.tools.StorageTool format -c "$RUN/server.properties" -t "$cluster_id" \
    >"$RUN/format.log" 2>&1; then
    cat "$RUN/format.log" >&2
    die "formatting the KRaft storage failed"
  fi

  launch "$port" "$cport"
  echo "$port" >"$PORT_FILE"
  print_env
}

# Starts the JVM on the configuration in $RUN and waits until it answers.
launch() {
  local port="$1" cport="$2"
  say "starting Apache Kafka $KAFKA_VERSION on 127.0.0.1:$port (controller $cport); log $LOG_FILE"
  # The lock fd is closed for the broker, or it would hold the start/stop lock forever.
  # setsid: the broker is not in the caller's process group, so a Ctrl-C or a test
  # harness killing its group does not take it down half-way; stop it with "stop".
  # shellcheck disable=SC2086
  setsid nohup java $HEAP_OPTS -XX:+UseG1GC -XX:MaxGCPauseMillis=20 -Djava.awt.headless=true \
    -Dorg.slf4j.simpleLogger.defaultLogLevel=info -Dorg.slf4j.simpleLogger.logFile=System.out \
    -Dorg.slf4j.simpleLogger.showDateTime=true \
    -Dorg.slf4j.simpleLogger.dateTimeFormat="yyyy-MM-dd'T'HH:mm:ss.SSS" \
    -cp "$(classpath)" kafka.Kafka "$RUN/server.properties" \
    >"$LOG_FILE" 2>&1 </dev/null {DEV_LOCK_FD}>&- &
  echo $! >"$PID_FILE"
  echo "$cport" >"$RUN/controller.port"

  # Ready = the listener accepts TCP and an admin client gets metadata (lists topics).
  local deadline=$((SECONDS + START_TIMEOUT))
  while ! tcp_answers "$port"; do
    if ! pid_alive "$PID_FILE"; then
      tail_log
      rm -f "$PID_FILE"
      die "the broker exited during start-up"
    fi
    if ((SECONDS >= deadline)); then
      tail_log
      kill_broker
      die "the broker did not open 127.0.0.1:$port within ${START_TIMEOUT}s"
    fi
    sleep 0.2
  done
  local left=$((deadline - SECONDS))
  ((left > 5)) || left=5
  if ! timeout "$left" java -Xmx128m -XX:+UseSerialGC -XX:TieredStopAtLevel=1 \
    -Dorg.slf4j.simpleLogger.defaultLogLevel=error -cp "$(classpath)" \
    org.apache.kafka.tools.TopicCommand --bootstrap-server "127.0.0.1:$port" --list \
    >"$RUN/ready-check.log" 2>&1; then
    cat "$RUN/ready-check.log" >&2
    tail_log
    kill_broker
    die "the broker opened its port but did not answer a metadata request"
  fi
}

do_restart() {
  running || die "no broker is running"
  local port cport
  port="$(cat "$PORT_FILE")"
  cport="$(cat "$RUN/controller.port")"
  say "restarting broker pid $(cat "$PID_FILE") (data kept)"
  kill_broker
  rm -f "$PID_FILE" "$PORT_FILE"
  launch "$port" "$cport"
  echo "$port" >"$PORT_FILE"
  print_env
}

do_status() {
  if running; then
    echo "running: Apache Kafka $KAFKA_VERSION, pid $(cat "$PID_FILE"), 127.0.0.1:$(cat "$PORT_FILE")" \
      "(controller $(cat "$RUN/controller.port" 2>/dev/null || echo '?')), log $LOG_FILE"
  else
    echo "stopped"
    return 1
  fi
}

do_env() {
  running || die "no broker is running (run: $DEV_DIR/kafka.sh start)"
  print_env
}

do_topics_create() {
  [[ $# -ge 2 ]] || die "usage: kafka.sh topics-create NAME PARTITIONS [CONFIG=VALUE...]"
  local name="$1" parts="$2"
  shift 2
  running || die "no broker is running"
  local extra=() c
  for c in "$@"; do extra+=(--config "$c"); done
  run_class org.apache.kafka.tools.TopicCommand --bootstrap-server "127.0.0.1:$(cat "$PORT_FILE")" \
    --create --if-not-exists --topic "$name" --partitions "$parts" --replication-factor 1 \
    "${extra[@]}"
}

cmd="${1:-}"
[[ $# -gt 0 ]] && shift
case "$cmd" in
  start) with_lock "$DEV_RUN_DIR/kafka.lock" do_start ;;
  stop) with_lock "$DEV_RUN_DIR/kafka.lock" do_stop ;;
  restart) with_lock "$DEV_RUN_DIR/kafka.lock" do_restart ;;
  status) do_status ;;
  env) do_env ;;
  topics-create) do_topics_create "$@" ;;
  perf-classpath)
    ensure_jars
    classpath
    ;;
  run)
    [[ $# -ge 1 ]] || die "usage: kafka.sh run CLASS [ARGS...]"
    run_class "$@"
    ;;
  version) echo "$KAFKA_VERSION" ;;
  *)
    sed -n '2,18p' "${BASH_SOURCE[0]}" | sed 's/^# \{0,1\}//' >&2
    exit 2
    ;;
esac
