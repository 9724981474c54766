#!/usr/bin/env bash
# Makes sure Prometheus' promtool is on this machine (Debian package "prometheus",
# which puts it at /usr/bin/promtool; installed with apt-get if missing; the package's
# server is not started) and prints its version.
#
#   promtool.sh              install if needed, print "promtool, version ..."
#   promtool.sh ARGS...      install if needed, then run promtool ARGS
#                            e.g. promtool.sh check metrics < metrics.txt
set -euo pipefail

DEV_SCRIPT_NAME=promtool.sh
# shellcheck source=lib.sh
source "$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)/lib.sh"

if ! command -v promtool >/dev/null 2>&1; then
  if [[ "$(id -u)" == 0 ]] && command -v apt-cache >/dev/null 2>&1; then
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEV_APT_UPDATED=1
    candidate="$(apt-cache policy prometheus 2>/dev/null | awk '/Candidate:/ { print $2 }')"
    if [[ -z "$candidate" || "$candidate" == "(none)" ]]; then
      die "the Debian package 'prometheus' (which provides promtool) is not available from apt here"
    fi
    apt_install prometheus
  else
    die "promtool is not installed; as root, this script installs it with: apt-get install prometheus"
  fi
  command -v promtool >/dev/null 2>&1 || die "package prometheus installed but promtool is not on PATH"
fi

if [[ $# -eq 0 ]]; then
  promtool --version 2>&1 | head -n 1
else
  exec promtool "$@"
fi
