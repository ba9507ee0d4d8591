#!/usr/bin/env bash
# The main job: set up .venv if needed, then run the demo bake-off sweep and its comparison report.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
. .venv/bin/activate
export HF_HUB_OFFLINE=1 TRANSFORMERS_OFFLINE=1 HF_DATASETS_OFFLINE=1
# --budget: the forecast on this machine fits the sweep to 15 minutes (fewer trials, then fewer seeds; see README)
tiltyard sweep configs/bakeoff.yaml --budget 15m "$@"
