#!/usr/bin/env bash
# Start a loopback scheduler and two workers that each advertise one GPU, run the
# search against them, show its status, and stop the cluster (also on errors).
# PORT picks the scheduler port (default 8786; the spec's address must match).
set -euo pipefail
cd "$(dirname "$0")"
deploy=../../deploy/local
port=${PORT:-8786}
state=./.cluster

"$deploy/start.sh" -n 2 -p "$port" -d "$state" -r GPU=1
trap '"$deploy/stop.sh" -d "$state"' EXIT

forebear run search.yaml
forebear status runs/returns-mlp.jsonl
forebear best runs/returns-mlp.jsonl --json
