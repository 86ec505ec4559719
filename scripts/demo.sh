#!/usr/bin/env bash
# The README's demo: set up, list the datasets, preview a split.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
export MLFLOW_DISABLE_TELEMETRY=true
.venv/bin/evenflag datasets fetch
.venv/bin/evenflag datasets
.venv/bin/evenflag datasets show adult --protocol contaminated --seed 0
