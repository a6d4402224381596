#!/usr/bin/env bash
# Start a loopback Dask cluster for forebear: one scheduler and N worker processes,
# every listener on 127.0.0.1, pid files in a state folder. Stop it with stop.sh.
#
#   deploy/local/start.sh [-n WORKERS] [-p PORT] [-d STATE_DIR] [-r RESOURCES]
#
#   -n  worker processes (default 2), one thread each
#   -p  scheduler port (default 8786)
#   -d  where pid files and logs go (default ./.forebear-cluster)
#   -r  resources every worker advertises, e.g. "GPU=1" (default none); a trial with
#       resources: {GPU: 1} in its spec runs only on workers that advertise GPU=1
#
# Prints the scheduler address (tcp://127.0.0.1:PORT) on stdout once every worker
# has connected. PYTHON picks the interpreter (default: python3 on PATH).
set -euo pipefail

workers=2
port=8786
state=./.forebear-cluster
resources=""
while getopts "n:p:d:r:h" opt; do
  case "$opt" in
    n) workers=$OPTARG ;;
    p) port=$OPTARG ;;
    d) state=$OPTARG ;;
    r) resources=$OPTARG ;;
    h) sed -n '2,15p' "$0"; exit 0 ;;
    *) echo "start.sh: unknown option; see start.sh -h" >&2; exit 2 ;;
  esac
done
case "$workers" in ''|*[!0-9]*|0) echo "start.sh: -n must be a whole number > 0, got '$workers'" >&2; exit 2 ;; esac
case "$port" in ''|*[!0-9]*) echo "start.sh: -p must be a port number, got '$port'" >&2; exit 2 ;; esac
python=${PYTHON:-python3}
address="tcp://127.0.0.1:$port"

mkdir -p "$state"
if ls "$state"/*.pid >/dev/null 2>&1; then
  echo "start.sh: $state already holds pid files; run deploy/local/stop.sh -d $state first" >&2
  exit 2
fi

# setsid: each process leads its own process group, so stop.sh can end it with its
# children (a worker's nanny and the worker it supervises) and nothing else.
setsid "$python" -m distributed.cli.dask_scheduler --host 127.0.0.1 --port "$port" \
  --no-dashboard --dashboard-address 127.0.0.1:0 >"$state/scheduler.log" 2>&1 </dev/null &
echo $! >"$state/scheduler.pid"

worker_args=(--host 127.0.0.1 --nthreads 1 --no-dashboard --dashboard-address 127.0.0.1:0 --death-timeout 60)
if [ -n "$resources" ]; then
  worker_args+=(--resources "$resources")
fi
for i in $(seq 1 "$workers"); do
  setsid "$python" -m distributed.cli.dask_worker "$address" "${worker_args[@]}" \
    --name "local-$i" >"$state/worker-$i.log" 2>&1 </dev/null &
  echo $! >"$state/worker-$i.pid"
done

# Wait until the scheduler answers and every worker has joined (60 s at most).
if ! "$python" - "$address" "$workers" <<'PY'
import sys
from distributed import Client
address, n = sys.argv[1], int(sys.argv[2])
try:
    with Client(address, timeout=30) as client:
        client.wait_for_workers(n, timeout=60)
except Exception as exc:  # any failure means the cluster did not come up
    print(f"start.sh: cluster at {address} did not come up: {exc}", file=sys.stderr)
    sys.exit(1)
PY
then
  echo "start.sh: see the logs in $state; stopping what started" >&2
  "$(dirname "$0")/stop.sh" -d "$state" >&2 || true
  exit 1
fi
echo "$address" >"$state/address"
echo "$address"
