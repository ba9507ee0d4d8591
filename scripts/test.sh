#!/usr/bin/env bash
# The test command: set up .venv if needed, then lint, type-check and run every test (real checkpoints included).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
. .venv/bin/activate
export HF_HUB_OFFLINE=1 TRANSFORMERS_OFFLINE=1 HF_DATASETS_OFFLINE=1
ruff check harness tests scripts
mypy harness
python -m pytest -q -ra --durations=15 "$@"
