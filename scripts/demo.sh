#!/usr/bin/env bash
# The README's demo: set up, list the datasets, run the demo study, report it.
# Everything it writes goes under outputs/ (ignored by git).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
export MLFLOW_DISABLE_TELEMETRY=true
.venv/bin/evenflag datasets fetch
.venv/bin/evenflag datasets
.venv/bin/evenflag datasets show adult --protocol contaminated --seed 0
.venv/bin/evenflag run -m experiment=demo
.venv/bin/evenflag report --study demo --memo
