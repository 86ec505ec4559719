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


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_mlflow_server(backend_uri: str, *artifact_args: str, seconds: float = 120):
    """An MLflow tracking server on a free loopback port, in its own session
    (so a kill of its group stops its workers too); returns (process, uri)
    once it answers /health, or fails the test."""
    import time
    import urllib.request

    import pytest

    port = free_port()
    server = subprocess.Popen(
        [str(Path(sys.executable).with_name("mlflow")), "server", "--host", "127.0.0.1", "--port", str(port),
         "--workers", "1", "--backend-store-uri", backend_uri, *artifact_args],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True,
        env={**os.environ, "MLFLOW_DISABLE_TELEMETRY": "true"})
    uri = f"http://127.0.0.1:{port}"
    deadline = time.time() + seconds
    while True:
        try:
            urllib.request.urlopen(f"{uri}/health", timeout=2)
            return server, uri
        except OSError:
            if time.time() > deadline or server.poll() is not None:
                server.kill()
                pytest.fail(f"the MLflow server on loopback did not come up within {seconds:.0f} s")
            time.sleep(0.5)
