#!/usr/bin/env bash
# The earlier site's search (all curves recorded), then site 17's with the history rule; status and best.
set -euo pipefail
cd "$(dirname "$0")"
export PYTHONPATH="$PWD${PYTHONPATH:+:$PYTHONPATH}"
forebear check search.yaml
forebear run earlier.yaml
forebear run search.yaml
forebear status runs/coldstore-site17.jsonl
forebear best runs/coldstore-site17.jsonl --json
forebear report runs/coldstore-site17.jsonl -o runs/report
