#!/usr/bin/env bash
# Check the spec, run the search, show the status and the best configuration.
set -euo pipefail
cd "$(dirname "$0")"
forebear check search.yaml
forebear run search.yaml
forebear status runs/delivery-w4.jsonl
forebear best runs/delivery-w4.jsonl --json
forebear export runs/delivery-w4.jsonl --csv runs/delivery-w4.csv
