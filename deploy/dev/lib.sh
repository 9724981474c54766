# Shared helpers for the dev/test server scripts in deploy/dev/. Sourced, not run.
# shellcheck shell=bash disable=SC2034 # DEV_CACHE_DIR, DEV_RUN_DIR, DEV_APT_UPDATED are used by the sourcing scripts

DEV_DIR="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
# Downloaded jars and other reusable things (git-ignored).
DEV_CACHE_DIR="${APPORTION_DEV_CACHE_DIR:-$DEV_DIR/.cache}"
# Pid files, ports, logs and data of running servers (git-ignored).
DEV_RUN_DIR="${APPORTION_DEV_RUN_DIR:-$DEV_DIR/run}"

say() { printf '%s: %s\n' "${DEV_SCRIPT_NAME:-dev}" "$*" >&2; }
die() { say "error: $*"; exit 1; }

# True when something on this machine has a TCP socket on 127.0.0.1/any with this
# local port (listening or not). Reads /proc, so it needs neither python nor ss.
port_in_use() {
  local hex
  hex="$(printf '%04X' "$1")"
  # Column 2 is local_address "IP:PORT" in hex.
  awk -v h=":$hex" 'NR > 1 && substr($2, length($2) - 4) == h { found = 1 } END { exit !found }' \
    /proc/net/tcp /proc/net/tcp6 2>/dev/null
}

# Prints a free TCP port in 20000..31999 (below Linux's ephemeral range, so outgoing
# connections do not take it meanwhile), avoiding the ports given as arguments.
free_port() {
  local p i x taken
  for ((i = 0; i < 500; i++)); do
    p=$((20000 + (RANDOM * 32768 + RANDOM) % 12000))
    taken=0
    for x in "$@"; do [[ "$x" == "$p" ]] && taken=1; done
    ((taken)) && continue
    port_in_use "$p" && continue
    echo "$p"
    return 0
  done
  die "no free TCP port found in 20000..31999"
}

# True when a TCP connection to 127.0.0.1:$1 is accepted.
tcp_answers() {
  (exec 3<>"/dev/tcp/127.0.0.1/$1") 2>/dev/null
}

# True when the pid in file $1 is a live process (a zombie, killed but not yet
# reaped, does not count).
pid_alive() {
  local pid state
  [[ -s "$1" ]] || return 1
  pid="$(cat "$1")"
  [[ "$pid" =~ ^[0-9]+$ ]] || return 1
  kill -0 "$pid" 2>/dev/null || return 1
  state="$(awk '{ print $3 }' "/proc/$pid/stat" 2>/dev/null || true)"
  [[ -n "$state" && "$state" != Z && "$state" != X ]]
}

# Runs "$@" while holding an exclusive lock on file $1 (serialises start/stop).
# Servers started under it must close DEV_LOCK_FD ({DEV_LOCK_FD}>&-) or they keep the lock.
with_lock() {
  local lock="$1"
  shift
  mkdir -p "$(dirname "$lock")"
  exec {DEV_LOCK_FD}>"$lock"
  if ! flock -n "$DEV_LOCK_FD"; then
    say "waiting for another start/stop to finish (lock $lock)"
    flock -w 300 "$DEV_LOCK_FD" || die "timed out after 300 s waiting for lock $lock"
  fi
  "$@"
}

# apt-get update, at most once per script run.
DEV_APT_UPDATED=0
apt_install() {
  [[ "$(id -u)" == 0 ]] || die "need root to apt-get install $* (or install it yourself)"
  if ((DEV_APT_UPDATED == 0)); then
    say "apt-get update"
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEV_APT_UPDATED=1
  fi
  say "apt-get install $*"
  DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "$@" >&2
}
