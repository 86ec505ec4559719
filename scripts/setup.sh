#!/usr/bin/env bash
# Set up a working copy from a fresh clone: creates .venv, installs the CPU
# build of torch first (a plain `torch` from PyPI is the multi-GB CUDA build),
# then evenflag itself with its dev extras. Safe to run again; it only tops up.
#
# EVENFLAG_TORCH_INDEX  where torch comes from (default: the PyTorch project's
#                       CPU-only wheel index). Set it to "default" to take torch
#                       from your normal package index or mirror instead.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON=${PYTHON:-python3}
TORCH_VERSION=2.13.0
TORCH_INDEX=${EVENFLAG_TORCH_INDEX:-https://download.pytorch.org/whl/cpu}
if [ ! -x .venv/bin/python ]; then
  "$PYTHON" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip

index_reachable() {
  # One short try, no retries: an unreachable index must cost seconds, not minutes.
  .venv/bin/python - "$1" <<'PY' >/dev/null 2>&1
import sys, urllib.request
urllib.request.urlopen(sys.argv[1].rstrip("/") + "/torch/", timeout=5)
PY
}

if ! .venv/bin/python -c "import torch" >/dev/null 2>&1; then
  if [ "$TORCH_INDEX" = "default" ]; then
    .venv/bin/python -m pip install --quiet "torch==$TORCH_VERSION"
  elif index_reachable "$TORCH_INDEX" \
      && .venv/bin/python -m pip install --quiet --timeout 30 --retries 1 --index-url "$TORCH_INDEX" "torch==$TORCH_VERSION"; then
    :
  else
    echo "setup: could not install torch from $TORCH_INDEX; taking torch==$TORCH_VERSION from the default package index instead (a CPU build only if your index or a local wheel provides one; point EVENFLAG_TORCH_INDEX at a reachable CPU index to avoid the multi-GB CUDA build)" >&2
    .venv/bin/python -m pip install --quiet "torch==$TORCH_VERSION"
  fi
fi
# compat mode puts src/ on the path, so Hydra's plugin scan sees evenflag's
# sweepers in the hydra_plugins namespace (the default editable mode hides it).
.venv/bin/python -m pip install --quiet -e ".[dev]" --config-settings editable_mode=compat
