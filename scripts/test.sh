#!/usr/bin/env bash
# The test command: set up .venv if needed, then lint, type-check and run every test (real checkpoints included).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
# Headless Chromium renders the HTML reports in one test (Debian's package; skipped where apt is unavailable).
if ! command -v chromium >/dev/null 2>&1 && command -v apt-get >/dev/null 2>&1 && [ "$(id -u)" = 0 ]; then
  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) \
    || echo "note: chromium could not be installed; the browser test will be skipped"
fi
. .venv/bin/activate
export HF_HUB_OFFLINE=1 TRANSFORMERS_OFFLINE=1 HF_DATASETS_OFFLINE=1
ruff check harness tests scripts bench conftest.py
mypy harness scripts bench
python -m pytest -q -ra --durations=15 "$@"
