#!/usr/bin/env bash
# The notebook-style example as one command: a LocalCluster, a background search on its client.
set -euo pipefail
cd "$(dirname "$0")"
python greenhouse.py
forebear best runs/greenhouse-water.jsonl --json
