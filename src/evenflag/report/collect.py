"""Read runs from a tracking store into one table (one row per run). Never re-trains.

A table cell is one resolved configuration up to the seed: runs share a cell
only when every config key but the seed is equal, and the data bytes and the
code version are the same. Keys that differ between cells of one dataset,
detector and weight are spelt out in the ``settings`` column, so that two
different configurations never look alike. Two finished runs of one cell with
one seed are counted once (the newest is kept).
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass

import numpy as np
import pandas as pd

from evenflag.errors import EvenflagError

CELL = ["dataset", "detector", "weight", "settings"]
# Params that say where and how to run, not what was computed (and the seed, which a cell spans).
NOT_CELL = ("seed", "rerun", "threads", "study")
NOT_CELL_PREFIX = ("tracking.", "tags.", "hydra.")


@dataclass
class RunTable:
    runs: pd.DataFrame          # one row per run: identity columns, status, error, metric columns
    metric_columns: list[str]
    uri: str
    studies: list[str]


def detector_label(params: dict, tags: dict | None = None) -> str:
    """The detector's name as tagged at run time (rebuilt from the params for
    runs older than the tag), plus the mitigation."""
    from evenflag.detectors.base import describe_detector

    name = (tags or {}).get("evenflag.detector")
    if not name:
        config = {k[len("detector."):]: v for k, v in params.items()
                  if k.startswith("detector.") and v not in ("None", "")}
        if "base.name" in config:
            config["base"] = {"name": config["base.name"]}
        name = describe_detector(config)
    mitigation = params.get("mitigation.kind", "none")
    return name if mitigation in ("none", None) else f"{name} + {mitigation}"


def _matches(where: dict[str, str], params: dict, tags: dict) -> bool:
    """``--where`` keys are params or tags; ``detector`` and ``detector.name``
    also match the detector's one name (``detector.name=local_outlier_factor``)."""
    for key, value in where.items():
        found = {params.get(key, tags.get(key))}
        if key in ("detector", "detector.name"):
            found.add(tags.get("evenflag.detector"))
        if value not in found:
            return False
    return True


def load_runs(uri: str, studies: list[str], where: dict[str, str] | None = None) -> RunTable:
    """All runs of the named studies, optionally filtered by param or tag values
    (``{"protocol.kind": "contaminated", "owner": "claims-team"}``)."""
    os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
    from mlflow.tracking import MlflowClient

    from mlflow.exceptions import MlflowException

    client = MlflowClient(tracking_uri=uri)
    experiments = []
    try:
        return _load(client, uri, studies, where, experiments)
    except MlflowException as exc:
        from evenflag.runner.tracking import store_problem

        raise EvenflagError(f"cannot read the tracking store {uri} ({store_problem(exc)})") from exc


def _load(client, uri, studies, where, experiments) -> RunTable:
    for study in studies:
        found = client.get_experiment_by_name(study)
        if found is None:
            known = [e.name for e in client.search_experiments()]
            raise EvenflagError(f"study '{study}' is not in the tracking store {uri}; studies there: {', '.join(known) or 'none'}")
        experiments.append(found)
    rows = []
    keys_seen: set[str] = set()
    token = None
    while True:
        page = client.search_runs([e.experiment_id for e in experiments], max_results=5000, page_token=token)
        for run in page:
            params, tags = run.data.params, run.data.tags
            config = {k: v for k, v in params.items()
                      if k not in NOT_CELL and not k.startswith(NOT_CELL_PREFIX)}
            config["data"] = tags.get("evenflag.data_sha256", "")
            config["code"] = (tags.get("evenflag.git_commit", "")[:12]
                              + ("+dirty" if tags.get("evenflag.git_dirty") == "true" else ""))
            row = {
                "run_id": run.info.run_id,
                "start_time": run.info.start_time or 0,
                "config": config,
                "cell_id": hashlib.sha256(json.dumps(config, sort_keys=True).encode()).hexdigest()[:16],
                "study": next(e.name for e in experiments if e.experiment_id == run.info.experiment_id),
                "status": run.info.status,
                "dataset": params.get("dataset.name", tags.get("evenflag.dataset", "?")),
                "detector": detector_label(params, tags),
                "weight": float(params["detector.weight"]) if params.get("detector.weight") not in (None, "None") else np.nan,
                "seed": int(params["seed"]) if params.get("seed", "").lstrip("-").isdigit() else -1,
                "error": tags.get("evenflag.error", ""),
                "data_sha256": tags.get("evenflag.data_sha256", ""),
                "git_commit": tags.get("evenflag.git_commit", ""),
                "protocol": params.get("protocol.kind", ""),
                "threshold": f"{params.get('threshold.policy', '')} {params.get('threshold.fraction', '')}".strip(),
                "groups": tags.get("evenflag.groups", ""),
                "natural_base_rates": tags.get("evenflag.natural_base_rates", ""),
                "reference_group": tags.get("evenflag.reference_group", ""),
                "kind": tags.get("evenflag.kind", "run"),   # "audit" for `evenflag audit` of an exported file
                "audit_file": tags.get("evenflag.audit.file", ""),
                "audit_rows": tags.get("evenflag.audit.rows", ""),
                "audit_periods": tags.get("evenflag.audit.periods", ""),
                "labels_known": tags.get("evenflag.labels_known", ""),
                "search_trial": tags.get("search_trial", ""),           # set by the search sweeper
                "search_objectives": tags.get("search_objectives", ""),
                "search_params": tags.get("search_params", ""),
            }
            keys_seen.update(params, tags)
            if where and not _matches(where, params, tags):
                continue
            row.update(run.data.metrics)
            rows.append(row)
        token = page.token
        if not token:
            break
    runs = pd.DataFrame(rows)
    unknown = sorted(k for k in (where or {}) if k not in keys_seen and k != "detector")
    if unknown:
        shown = sorted(k for k in keys_seen if not k.startswith(("mlflow.", "evenflag.version.")))
        raise EvenflagError(f"--where {unknown[0]}: no run in studies {studies} has a param or tag of that name; "
                            f"use one of: {', '.join(shown[:40])}{' ...' if len(shown) > 40 else ''}")
    if runs.empty:
        raise EvenflagError(f"no runs match in studies {studies}; run a sweep first or loosen the filter")
    runs = deduplicate(with_settings(runs))
    identity = {"run_id", "study", "status", "dataset", "detector", "weight", "seed", "error", "data_sha256",
                "git_commit", "protocol", "threshold", "groups", "start_time", "config", "cell_id", "settings",
                "natural_base_rates", "reference_group", "kind", "audit_file", "audit_rows", "audit_periods",
                "labels_known", "search_trial", "search_objectives",
                "search_params"}
    metrics = sorted(c for c in runs.columns if c not in identity)
    return RunTable(runs=runs, metric_columns=metrics, uri=uri, studies=list(studies))


def _shown(key: str) -> bool:
    """Keys already visible in the dataset, detector and weight columns."""
    return key in ("dataset.name", "detector.weight", "detector.name", "detector.base.name", "mitigation.kind")


def with_settings(runs: pd.DataFrame) -> pd.DataFrame:
    """Add ``settings``: the config keys (and data or code versions) that differ
    between the cells of one dataset, detector and weight, as ``key=value``."""
    runs = runs.copy()
    runs["settings"] = ""
    weight = runs["weight"].fillna(-1.0)
    for _, index in runs.groupby([runs["dataset"], runs["detector"], weight]).groups.items():
        part = runs.loc[index]
        if part["cell_id"].nunique() < 2:
            continue
        configs = list(part["config"])
        keys = sorted({k for c in configs for k in c})
        varying = [k for k in keys if not _shown(k) and len({c.get(k, "(unset)") for c in configs}) > 1]
        runs.loc[index, "settings"] = [
            "; ".join(f"{k}={_short(c.get(k, '(unset)'))}" for k in varying) for c in configs]
    return runs


def _short(value: str) -> str:
    value = str(value)
    return value if len(value) <= 24 else value[:12] + "…"


def deduplicate(runs: pd.DataFrame) -> pd.DataFrame:
    """One run per cell and seed: the newest finished one, else the newest.
    Runs left out are still in the store (for example a run superseded by a
    ``rerun=true`` of the same cell)."""
    order = runs.assign(_finished=runs["status"].eq("FINISHED")).sort_values(["_finished", "start_time"])
    kept = order.drop_duplicates(["cell_id", "seed"], keep="last").drop(columns="_finished")
    return kept.sort_index()
