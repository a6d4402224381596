#!/usr/bin/env bash
# Stop the loopback cluster that start.sh started, by the pid files in its state folder.
#
#   deploy/local/stop.sh [-d STATE_DIR]     (default ./.forebear-cluster)
#
# Sends SIGTERM to each process group it started, waits up to 20 s, then SIGKILL.
# Workers go first so the scheduler does not reschedule their tasks needlessly.
set -euo pipefail

state=./.forebear-cluster
while getopts "d:h" opt; do
  case "$opt" in
    d) state=$OPTARG ;;
    h) sed -n '2,7p' "$0"; exit 0 ;;
    *) echo "stop.sh: unknown option; see stop.sh -h" >&2; exit 2 ;;
  esac
done
if ! ls "$state"/*.pid >/dev/null 2>&1; then
  echo "stop.sh: no pid files in $state; nothing to stop" >&2
  exit 0
fi

pidfiles=()
for f in "$state"/worker-*.pid "$state"/scheduler.pid; do
  [ -f "$f" ] && pidfiles+=("$f")
done

for f in "${pidfiles[@]}"; do
  pid=$(cat "$f")
  # The pid leads its own process group (start.sh used setsid): end the group.
  kill -TERM -- "-$pid" 2>/dev/null || kill -TERM "$pid" 2>/dev/null || true
done
for f in "${pidfiles[@]}"; do
  pid=$(cat "$f")
  for _ in $(seq 1 40); do
    kill -0 "$pid" 2>/dev/null || break
    sleep 0.5
  done
  if kill -0 "$pid" 2>/dev/null; then
    echo "stop.sh: pid $pid ($f) ignored SIGTERM; sending SIGKILL" >&2
    kill -KILL -- "-$pid" 2>/dev/null || kill -KILL "$pid" 2>/dev/null || true
  fi
  rm -f "$f"
done
rm -f "$state/address"
echo "stopped ${#pidfiles[@]} processes from $state" >&2
