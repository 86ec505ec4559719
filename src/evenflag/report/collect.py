"""Read runs from a tracking store into one table (one row per run). Never re-trains."""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pandas as pd

from evenflag.errors import EvenflagError

CELL = ["dataset", "detector", "weight"]


@dataclass
class RunTable:
    runs: pd.DataFrame          # one row per run: identity columns, status, error, metric columns
    metric_columns: list[str]
    uri: str
    studies: list[str]


def detector_label(params: dict) -> str:
    """The detector's label rebuilt from flattened params, plus the mitigation."""
    from evenflag.detectors.base import describe_detector

    config = {k[len("detector."):]: v for k, v in params.items() if k.startswith("detector.") and v not in ("None", "")}
    if "base.name" in config:
        config["base"] = {"name": config["base.name"]}
    name = describe_detector(config)
    mitigation = params.get("mitigation.kind", "none")
    return name if mitigation in ("none", None) else f"{name} + {mitigation}"


def load_runs(uri: str, studies: list[str], where: dict[str, str] | None = None) -> RunTable:
    """All runs of the named studies, optionally filtered by param or tag values
    (``{"protocol.kind": "contaminated", "owner": "claims-team"}``)."""
    os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
    from mlflow.tracking import MlflowClient

    client = MlflowClient(tracking_uri=uri)
    experiments = []
    for study in studies:
        found = client.get_experiment_by_name(study)
        if found is None:
            known = [e.name for e in client.search_experiments()]
            raise EvenflagError(f"study '{study}' is not in the tracking store {uri}; studies there: {', '.join(known) or 'none'}")
        experiments.append(found)
    rows = []
    token = None
    while True:
        page = client.search_runs([e.experiment_id for e in experiments], max_results=5000, page_token=token)
        for run in page:
            params, tags = run.data.params, run.data.tags
            row = {
                "run_id": run.info.run_id,
                "study": next(e.name for e in experiments if e.experiment_id == run.info.experiment_id),
                "status": run.info.status,
                "dataset": params.get("dataset.name", tags.get("evenflag.dataset", "?")),
                "detector": detector_label(params),
                "weight": float(params["detector.weight"]) if params.get("detector.weight") not in (None, "None") else np.nan,
                "seed": int(params["seed"]) if params.get("seed", "").lstrip("-").isdigit() else -1,
                "error": tags.get("evenflag.error", ""),
                "data_sha256": tags.get("evenflag.data_sha256", ""),
                "git_commit": tags.get("evenflag.git_commit", ""),
                "protocol": params.get("protocol.kind", ""),
                "threshold": f"{params.get('threshold.policy', '')} {params.get('threshold.fraction', '')}".strip(),
                "groups": tags.get("evenflag.groups", ""),
            }
            if where and any(params.get(k, tags.get(k)) != v for k, v in where.items()):
                continue
            row.update(run.data.metrics)
            rows.append(row)
        token = page.token
        if not token:
            break
    runs = pd.DataFrame(rows)
    if runs.empty:
        raise EvenflagError(f"no runs match in studies {studies}; run a sweep first or loosen the filter")
    identity = {"run_id", "study", "status", "dataset", "detector", "weight", "seed", "error", "data_sha256",
                "git_commit", "protocol", "threshold", "groups"}
    metrics = sorted(c for c in runs.columns if c not in identity)
    return RunTable(runs=runs, metric_columns=metrics, uri=uri, studies=list(studies))
