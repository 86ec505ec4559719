"""Run the real `evenflag` command in a scratch directory and read its store."""

import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
SMALL = ["dataset=synthetic_claims", "dataset.source.rows=800", "metrics=quick"]


def evenflag(cwd, *args, timeout=300, env=None):
    environment = {**os.environ, "PYTHONPATH": str(REPO), **(env or {})}
    return subprocess.run([sys.executable, "-m", "evenflag.cli", *args], cwd=cwd, capture_output=True, text=True,
                          timeout=timeout, env=environment)


def client_for(cwd):
    from mlflow.tracking import MlflowClient

    return MlflowClient(tracking_uri=f"sqlite:///{Path(cwd) / 'outputs' / 'tracking' / 'mlflow.db'}")


def runs_of(client, study):
    experiment = client.get_experiment_by_name(study)
    return client.search_runs([experiment.experiment_id], max_results=1000) if experiment else []
