#!/usr/bin/env bash
# Create .venv (if missing) and install flairwatch with the extras named as arguments.
# Usage: bash scripts/setup.sh [EXTRA...]   e.g. bash scripts/setup.sh test train
set -euo pipefail
cd "$(dirname "$0")/.."
PY="${PYTHON:-python3}"
[ -x .venv/bin/python ] || "$PY" -m venv .venv
extras=$(IFS=,; echo "$*")
spec="."
[ -n "$extras" ] && spec=".[$extras]"
.venv/bin/python -m pip install --quiet --retries 10 --timeout 60 --upgrade pip
.venv/bin/python -m pip install --quiet --retries 10 --timeout 60 -e "$spec"
