#!/usr/bin/env bash
# The whole example from the command line: two earlier searches, then the new one
# with their logbooks as history, then the best configuration and a report.
set -euo pipefail
cd "$(dirname "$0")"
forebear check consumer.yaml
forebear run earlier-smb.yaml
forebear run earlier-enterprise.yaml
forebear run consumer.yaml
forebear best runs/churn-consumer.jsonl --json
forebear report runs/churn-consumer.jsonl -o report
