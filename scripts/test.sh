#!/usr/bin/env bash
# Set up (if needed) and run every check: ruff, mypy, pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh test train cluster
.venv/bin/ruff check flairwatch tests scripts
.venv/bin/ruff format --check flairwatch tests scripts
.venv/bin/mypy
.venv/bin/python -m pytest -q "$@"
