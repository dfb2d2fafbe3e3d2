#!/usr/bin/env bash
# Set up (if needed) and run the main job on built-in demo data.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh phantoms
exec .venv/bin/flairwatch demo "$@"
