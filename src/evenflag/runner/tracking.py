"""Recording runs in MLflow: one MLflow run per evenflag run, one experiment per study.

Only MlflowClient calls are used (no fluent, process-global active run), so
jobs in the same worker process cannot leak state into each other.
"""

from __future__ import annotations

import os
import re
import socket
import time
from pathlib import Path

from evenflag.errors import ConfigError

TAG = "evenflag."
MAX_PARAMS, MAX_METRICS, MAX_TAGS = 100, 1000, 100  # MLflow's per-batch limits
_KEY_OK = re.compile(r"[^\w\-. /:]")


def metric_key(key: str) -> str:
    """MLflow keys allow letters, digits, _ - . space / and :; others become '-'."""
    return _KEY_OK.sub("-", key)


def default_store(launch_dir: Path) -> tuple[str, str]:
    root = (launch_dir / "outputs" / "tracking").resolve()
    return f"sqlite:///{root / 'mlflow.db'}", (root / "artifacts").as_uri()


def ui_command(uri: str) -> str:
    if uri.startswith(("http://", "https://")):
        return f"open {uri} in a browser"
    return f"mlflow ui --backend-store-uri {uri}"


_OPEN: dict[tuple, "Tracker"] = {}


def tracker_for(uri: str | None, study: str, artifact_root: str | None = None, launch_dir: Path | None = None) -> "Tracker":
    """One Tracker per (store, study) per process: opening an MLflow store costs
    about 0.2 s, which a sweep would otherwise pay on every job."""
    key = (uri, study, artifact_root, str(launch_dir or Path.cwd()))
    if key not in _OPEN:
        _OPEN[key] = Tracker(uri, study, artifact_root, launch_dir)
    return _OPEN[key]


class Tracker:
    """The study's MLflow experiment in one tracking store."""

    def __init__(self, uri: str | None, study: str, artifact_root: str | None = None, launch_dir: Path | None = None):
        os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
        import logging

        from mlflow.tracking import MlflowClient

        for noisy in ("mlflow", "alembic"):
            logging.getLogger(noisy).setLevel(logging.WARNING)

        launch_dir = launch_dir or Path.cwd()
        default_uri, default_artifacts = default_store(launch_dir)
        self.uri = uri or default_uri
        self.artifact_root = artifact_root or (default_artifacts if uri is None else None)
        if self.uri.startswith("sqlite:///"):
            Path(self.uri[len("sqlite:///"):]).parent.mkdir(parents=True, exist_ok=True)
        self.study = study
        self.client = MlflowClient(tracking_uri=self.uri)
        self._experiment_id = None

    @property
    def experiment_id(self) -> str:
        if self._experiment_id is None:
            from mlflow.exceptions import MlflowException

            try:
                found = self.client.get_experiment_by_name(self.study)
                if found is not None and found.lifecycle_stage == "deleted":
                    raise ConfigError(f"study '{self.study}' was deleted in the tracking store; restore it or pick another study name")
                if found is None:
                    location = f"{self.artifact_root}/{self.study}" if self.artifact_root else None
                    try:
                        self._experiment_id = self.client.create_experiment(self.study, artifact_location=location)
                    except MlflowException:  # another job created it a moment ago
                        self._experiment_id = self.client.get_experiment_by_name(self.study).experiment_id
                else:
                    self._experiment_id = found.experiment_id
            except MlflowException as exc:
                raise ConfigError(f"tracking store {self.uri} cannot be used ({str(exc).splitlines()[0][:200]}); "
                                  "check tracking.uri") from exc
        return self._experiment_id

    def find_finished(self, fingerprint: str) -> str | None:
        runs = self.client.search_runs(
            [self.experiment_id],
            filter_string=f"tags.`{TAG}fingerprint` = '{fingerprint}' and attributes.status = 'FINISHED'",
            max_results=1,
        )
        return runs[0].info.run_id if runs else None

    def close_stale_runs(self) -> int:
        """Mark RUNNING runs whose process on this host is gone as KILLED, so an
        interrupted sweep leaves nothing that looks alive."""
        host = socket.gethostname()
        closed = 0
        for run in self.client.search_runs([self.experiment_id], filter_string="attributes.status = 'RUNNING'",
                                           max_results=5000):
            tags = run.data.tags
            if tags.get(f"{TAG}host") != host:
                continue
            pid = int(tags.get(f"{TAG}pid", "0") or 0)
            if pid and _alive(pid) and pid != os.getpid():
                continue
            self.client.set_tag(run.info.run_id, f"{TAG}status", "killed")
            self.client.set_terminated(run.info.run_id, status="KILLED")
            closed += 1
        return closed

    def start(self, run_name: str, tags: dict[str, str]) -> str:
        tags = {**tags, f"{TAG}host": socket.gethostname(), f"{TAG}pid": str(os.getpid()), f"{TAG}status": "running"}
        run = self.client.create_run(self.experiment_id, run_name=run_name, tags=tags)
        return run.info.run_id

    def log(self, run_id: str, params: dict[str, str], metrics: dict[str, float], tags: dict[str, str]) -> None:
        """As few log_batch calls as MLflow's per-batch limits allow (usually one)."""
        from mlflow.entities import Metric, Param, RunTag

        now = int(time.time() * 1000)
        params_left = [Param(k[:250], str(v)[:6000]) for k, v in params.items()]
        metrics_left = [Metric(metric_key(k), float(v), now, 0) for k, v in metrics.items()]
        tags_left = [RunTag(k, str(v)[:5000]) for k, v in tags.items()]
        while params_left or metrics_left or tags_left:
            p, params_left = params_left[:MAX_PARAMS], params_left[MAX_PARAMS:]
            t, tags_left = tags_left[:MAX_TAGS], tags_left[MAX_TAGS:]
            room = MAX_METRICS - len(p) - len(t)
            m, metrics_left = metrics_left[:room], metrics_left[room:]
            self.client.log_batch(run_id, metrics=m, params=p, tags=t)

    def log_history(self, run_id: str, history: list[dict[str, float]]) -> None:
        """Per-epoch training curves as metric steps (e.g. detection loss, adversary accuracy)."""
        from mlflow.entities import Metric

        now = int(time.time() * 1000)
        items = [Metric(metric_key(f"train.{k}"), float(v), now, step)
                 for step, row in enumerate(history) for k, v in row.items()]
        for start in range(0, len(items), MAX_METRICS):
            self.client.log_batch(run_id, metrics=items[start:start + MAX_METRICS])

    def log_artifacts(self, run_id: str, folder: Path) -> None:
        self.client.log_artifacts(run_id, str(folder))

    def finish(self, run_id: str) -> None:
        self.client.set_terminated(run_id, status="FINISHED")

    def fail(self, run_id: str, message: str) -> None:
        self.client.set_tag(run_id, f"{TAG}status", "failed")
        self.client.set_tag(run_id, f"{TAG}error", message[:5000])
        self.client.set_terminated(run_id, status="FAILED")


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
