#!/usr/bin/env bash
# Set up a working copy from a fresh clone: creates .venv, installs the CPU
# build of torch first (an unpinned torch pulls a multi-GB CUDA build), then
# evenflag itself with its dev extras. Safe to run again; it only tops up.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  "$PYTHON" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip
if ! .venv/bin/python -c "import torch" >/dev/null 2>&1; then
  .venv/bin/python -m pip install --quiet torch==2.13.0
fi
.venv/bin/python -m pip install --quiet -e ".[dev]"
