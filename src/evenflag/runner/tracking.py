"""Recording runs in MLflow: one MLflow run per evenflag run, one experiment per study.

Only MlflowClient calls are used (no fluent, process-global active run), so
jobs in the same worker process cannot leak state into each other.
"""

from __future__ import annotations

import contextlib
import os
import re
import time
from pathlib import Path

from evenflag.errors import ConfigError
from evenflag.runner.lease import identity_tags, is_dead
from evenflag.runner.store import file_lock, prepare_sqlite_store, sqlite_path

TAG = "evenflag."
MAX_PARAMS, MAX_METRICS, MAX_TAGS = 100, 1000, 100  # MLflow's per-batch limits
_KEY_OK = re.compile(r"[^\w\-. /:]")
DATABASE_SCHEMES = ("postgresql", "mysql", "mssql")  # SQLAlchemy URIs MLflow accepts as stores


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


def tracker_for(uri: str | None, study: str, artifact_root: str | None = None, launch_dir: Path | None = None,
                timeout_seconds: float = 15.0, claim_settle_seconds: float = 2.0) -> "Tracker":
    """One Tracker per (store, study) per process: opening an MLflow store costs
    about 0.2 s, which a sweep would otherwise pay on every job."""
    key = (uri, study, artifact_root, str(launch_dir or Path.cwd()))
    if key not in _OPEN:
        _OPEN[key] = Tracker(uri, study, artifact_root, launch_dir, timeout_seconds, claim_settle_seconds)
    return _OPEN[key]


def prepare_store(settings: tuple) -> tuple[str, int]:
    """Before any job of a launch: create the store and the study once (several
    jobs creating them at once would collide) and end the runs that dead
    launches left RUNNING. ``settings`` are ``tracker_for``'s arguments;
    returns (the store's URI, how many runs were ended)."""
    tracker = tracker_for(*settings)
    tracker.experiment_id
    return tracker.uri, tracker.close_stale_runs()


class Tracker:
    """The study's MLflow experiment in one tracking store.

    A job *claims* its cell before computing: it creates its run (RUNNING, with
    the fingerprint and a heartbeat) only if no finished run and no live claim
    of that fingerprint exists. On a local SQLite store the check and the
    creation happen under one file lock. On a tracking server, which no file
    lock reaches, the claim is created, the job waits ``claim_settle_seconds``
    (longer than the write takes to become visible to other clients), and of
    all live claims of the fingerprint the one that started first (ties: the
    smaller run id) proceeds; every other claimant withdraws its own run. Every
    launch applies the same rule, so exactly one proceeds.
    """

    def __init__(self, uri: str | None, study: str, artifact_root: str | None = None, launch_dir: Path | None = None,
                 timeout_seconds: float = 15.0, claim_settle_seconds: float = 2.0):
        os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
        import logging

        for noisy in ("mlflow", "alembic"):
            logging.getLogger(noisy).setLevel(logging.WARNING)

        launch_dir = launch_dir or Path.cwd()
        default_uri, default_artifacts = default_store(launch_dir)
        self.uri = uri or default_uri
        self.study = study
        if not str(study).strip():
            raise ConfigError("study is empty; name the study (study=my_study), it becomes the MLflow experiment")
        self.sqlite = sqlite_path(self.uri)
        self.claim_settle_seconds = 0.0 if self.sqlite else claim_settle_seconds
        if self.sqlite:
            # Artifacts live beside the store (never in ./mlruns of wherever the command ran).
            self.artifact_root = artifact_root or (self.sqlite.resolve().parent / "artifacts").as_uri()
            prepare_sqlite_store(self.sqlite)
        elif self.uri.startswith(("http://", "https://")):
            self.artifact_root = artifact_root
            check_server(self.uri, timeout_seconds)
        elif self.uri.split("://", 1)[0].split("+", 1)[0] in DATABASE_SCHEMES:
            self.artifact_root = artifact_root  # a database MLflow opens directly; claims use the server rule
        else:
            raise ConfigError(f"tracking.uri '{self.uri}' is not supported; use sqlite:///path/to/mlflow.db, "
                              "http://host:port, https://host:port or a database URI (postgresql://...)")
        from mlflow.tracking import MlflowClient

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
                raise ConfigError(f"tracking store {self.uri} cannot be used ({store_problem(exc)}); "
                                  "check tracking.uri") from exc
        return self._experiment_id

    def _lock(self):
        """Serialises claims on a local store; nothing to hold on a server (see the class docstring)."""
        if self.sqlite:
            return file_lock(self.sqlite.with_name(self.sqlite.name + ".claims.lock"), "claims on the tracking store")
        return contextlib.nullcontext()

    def _runs_of(self, fingerprint: str, status: str | None = None):
        """The cell's runs, of one ``status`` or (None) of any."""
        where = f"tags.`{TAG}fingerprint` = '{fingerprint}'" + (f" and attributes.status = '{status}'" if status else "")
        return self.client.search_runs([self.experiment_id], filter_string=where, max_results=1000)

    def metrics_of(self, run_id: str) -> dict[str, float]:
        return dict(self.client.get_run(run_id).data.metrics)

    def find_finished(self, fingerprint: str) -> str | None:
        runs = self._runs_of(fingerprint, "FINISHED")
        return runs[0].info.run_id if runs else None

    def claim(self, fingerprint: str, run_name: str, tags: dict[str, str], rerun: bool = False):
        """(run_id, None) when this job may run the cell, else (None, reason)."""
        with self._lock():
            # One query for both questions, a finished run of the cell and a live
            # claim of it (MLflow's filters cannot ask for two statuses at once).
            runs = self._runs_of(fingerprint)
            finished = next((r.info.run_id for r in runs if r.info.status == "FINISHED"), None)
            if finished and not rerun:
                return None, f"finished before as run {finished[:8]}"
            for run in (r for r in runs if r.info.status == "RUNNING"):
                dead = is_dead(run.data.tags, TAG)
                if dead:
                    self.kill(run.info.run_id, f"taken over: {dead}")
                else:
                    return None, (f"running in another launch (run {run.info.run_id[:8]} on "
                                  f"{run.data.tags.get(f'{TAG}host', '?')})")
            run_id = self.start(run_name, {**tags, f"{TAG}fingerprint": fingerprint})
        if self.claim_settle_seconds:
            time.sleep(self.claim_settle_seconds)
            running = self._runs_of(fingerprint, "RUNNING")
            live = [r for r in running if not is_dead(r.data.tags, TAG)] or [r for r in running if r.info.run_id == run_id]
            winner = min(live, key=lambda r: (r.info.start_time, r.info.run_id)) if live else None
            if winner is not None and winner.info.run_id != run_id:
                self.withdraw(run_id, f"the cell was claimed first by run {winner.info.run_id[:8]}")
                return None, f"running in another launch (run {winner.info.run_id[:8]})"
            if not rerun:
                finished = self.find_finished(fingerprint)
                if finished:
                    self.withdraw(run_id, f"the cell finished as run {finished[:8]}")
                    return None, f"finished before as run {finished[:8]}"
        return run_id, None

    def supersede(self, fingerprint: str, run_id: str) -> None:
        """After ``rerun=true`` finished: older finished runs of the cell stay, marked as superseded."""
        for run in self._runs_of(fingerprint, "FINISHED"):
            if run.info.run_id != run_id:
                self.client.set_tag(run.info.run_id, f"{TAG}superseded_by", run_id)

    def close_stale_runs(self) -> int:
        """Mark RUNNING runs that are dead (heartbeat older than the lease on any
        host, or process gone on this host) as KILLED with the reason."""
        closed = 0
        for run in self.client.search_runs([self.experiment_id], filter_string="attributes.status = 'RUNNING'",
                                           max_results=5000):
            dead = is_dead(run.data.tags, TAG)
            if dead:
                self.kill(run.info.run_id, dead)
                closed += 1
        return closed

    def close_launch(self, launch_id: str, reason: str) -> int:
        """Mark this launch's runs that are still RUNNING as KILLED (the launch is ending)."""
        if not launch_id:
            return 0
        closed = 0
        for run in self.client.search_runs(
                [self.experiment_id],
                filter_string=f"attributes.status = 'RUNNING' and tags.`{TAG}launch` = '{launch_id}'", max_results=5000):
            self.kill(run.info.run_id, reason)
            closed += 1
        return closed

    def start(self, run_name: str, tags: dict[str, str]) -> str:
        tags = {**tags, **identity_tags(TAG), f"{TAG}status": "running"}
        run = self.client.create_run(self.experiment_id, run_name=run_name, tags=tags)
        return run.info.run_id

    def heartbeat(self, run_id: str) -> None:
        self.client.set_tag(run_id, f"{TAG}heartbeat", f"{time.time():.3f}")

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
        self._end(run_id, "FAILED", "failed", message)

    def kill(self, run_id: str, reason: str) -> None:
        """End a run that did not finish (interrupted, orphaned, dead) as KILLED, with the reason."""
        self._end(run_id, "KILLED", "killed", reason)

    def withdraw(self, run_id: str, reason: str) -> None:
        """Take back a claim that lost to another: ended and deleted, so it never shows as a result."""
        self._end(run_id, "KILLED", "withdrawn", reason)
        self.client.delete_run(run_id)

    def _end(self, run_id: str, status: str, word: str, message: str) -> None:
        from mlflow.entities import RunTag

        self.client.log_batch(run_id, tags=[RunTag(f"{TAG}status", word), RunTag(f"{TAG}error", message[:5000])])
        self.client.set_terminated(run_id, status=status)


def store_problem(exc: BaseException) -> str:
    """The first line of a store error, with the real cause of a read-only database."""
    text = str(exc).splitlines()[0][:200] if str(exc) else exc.__class__.__name__
    if "readonly" in text.lower() or "read-only" in text.lower():
        return "the store or its folder is read-only; make it writable or set tracking.uri elsewhere"
    return text


def check_server(uri: str, timeout_seconds: float) -> None:
    """Fail within ``timeout_seconds`` with one line when the tracking server does
    not answer (MLflow itself retries for minutes), and make MLflow's own
    requests give up after the same time."""
    import urllib.error
    import urllib.request

    os.environ.setdefault("MLFLOW_HTTP_REQUEST_TIMEOUT", str(int(max(timeout_seconds, 1))))
    os.environ.setdefault("MLFLOW_HTTP_REQUEST_MAX_RETRIES", "2")
    try:
        with urllib.request.urlopen(uri.rstrip("/") + "/health", timeout=timeout_seconds):
            return
    except urllib.error.HTTPError:
        return  # it answered: an MLflow server without /health, or behind a proxy
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise ConfigError(f"the tracking server {uri} did not answer within {timeout_seconds:g} s ({reason}); "
                          "start it, check tracking.uri, or raise tracking.timeout_seconds for a slow network") from exc
