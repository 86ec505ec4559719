"""``evenflag audit FILE``: compose the settings, read the file, compute, track
the audit as a run and write its memo.

An audit is stored like a benchmark run (params, metrics, tags, the
``scores.parquet`` artifact), so ``evenflag report`` reads audits unchanged
and audits of successive periods sit in one study. Its fingerprint is the
file's sha256 plus the settings and the code version: the same file audited
again with the same settings is skipped unless ``rerun=true``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd
from omegaconf import DictConfig, OmegaConf

from evenflag.audit.spec import AuditSpec, check_spec as check_audit
from evenflag.errors import ConfigError, EvenflagError
from evenflag.metrics.suites import MetricsSpec, check_spec as check_metrics
from evenflag.runner.config import TrackingSpec
from evenflag.thresholds import ThresholdSpec, check_spec as check_threshold

SCHEMA_NAME = "audit_schema"
TOP_LEVEL = ("study", "seed", "tags", "rerun", "out")


@dataclass
class AuditConfig:
    audit: AuditSpec = field(default_factory=AuditSpec)
    threshold: ThresholdSpec = field(default_factory=ThresholdSpec)
    metrics: MetricsSpec = field(default_factory=MetricsSpec)
    tracking: TrackingSpec = field(default_factory=TrackingSpec)
    study: str = "audits"
    seed: int = 0
    tags: dict[str, str] = field(default_factory=dict)
    rerun: bool = False
    out: Optional[str] = None


def audit_overrides(file: str, overrides: list[str]) -> list[str]:
    """The file as ``audit.file``; the audit's own settings may drop the
    ``audit.`` prefix (``score=risk`` means ``audit.score=risk``)."""
    own = {f.name for f in dataclasses.fields(AuditSpec)}
    out = [f"audit.file={json.dumps(str(file))}"]
    for item in overrides:
        key = item.split("=", 1)[0].lstrip("+~")
        out.append(f"audit.{item}" if key in own and key not in TOP_LEVEL else item)
    return out


def compose_audit_config(file: str, overrides: list[str], extra_dirs: list[str] = ()) -> DictConfig:
    from hydra import compose, initialize_config_dir
    from hydra.core.config_store import ConfigStore
    from hydra.errors import HydraException, MissingConfigException
    from omegaconf.errors import OmegaConfBaseException

    from evenflag.paths import config_dir

    ConfigStore.instance().store(name=SCHEMA_NAME, node=AuditConfig)
    search = [f"hydra.searchpath=[{','.join('file://' + str(Path(d).resolve()) for d in extra_dirs)}]"] if extra_dirs else []
    try:
        with initialize_config_dir(config_dir=str(config_dir()), version_base="1.3"):
            cfg = compose("audit_config", overrides=search + audit_overrides(file, overrides))
    except MissingConfigException as exc:
        raise ConfigError(str(exc).splitlines()[0]) from exc
    except (HydraException, OmegaConfBaseException) as exc:
        text = " ".join(f"{exc} {exc.__cause__ or ''}".split())
        import re

        unknown = re.search(r"Key '(\w+)' not in '(\w+)'", text) or re.search(r"Could not override '([\w.]+)'", text)
        if unknown:
            allowed = ", ".join(f.name for f in dataclasses.fields(AuditSpec))
            raise ConfigError(f"unknown setting '{unknown.group(1)}'; audit settings: {allowed}; also threshold.*, "
                              f"metrics.*, tracking.*, {', '.join(TOP_LEVEL)}") from exc
        raise ConfigError(text[:300]) from exc
    return cfg


def _specs(cfg: DictConfig):
    values = OmegaConf.to_container(cfg, resolve=True)
    audit = AuditSpec(**values["audit"])
    threshold = ThresholdSpec(**values["threshold"])
    metrics = MetricsSpec(**values["metrics"])
    try:
        check_audit(audit)
        check_threshold(threshold)
        check_metrics(metrics)
    except EvenflagError as exc:
        raise ConfigError(str(exc)) from exc
    return values, audit, threshold, metrics


def fingerprint(values: dict, sha256: str) -> str:
    """The file's bytes, the settings that shape the numbers, the code version
    (the file's path and name are not part of it: a moved file is the same audit)."""
    from evenflag.runner.provenance import code_version

    audit = {k: v for k, v in values["audit"].items() if k not in ("file", "name", "chunk_rows")}
    what = {"audit": audit, "threshold": values["threshold"], "metrics": values["metrics"], "seed": values["seed"],
            "data": sha256, "code": code_version(), "kind": "audit"}
    return hashlib.sha256(json.dumps(what, sort_keys=True, default=str).encode()).hexdigest()[:32]


def run_audit(cfg: DictConfig) -> int:
    from evenflag.audit.compute import check_flag_source, compute_audit
    from evenflag.audit.table import read_audit_file
    from evenflag.runner.lease import Heartbeat
    from evenflag.runner.provenance import code_version, flatten, git_state, library_versions
    from evenflag.runner.tracking import TAG, tracker_for

    values, audit, threshold, metrics = _specs(cfg)
    _check_out(values)
    table = read_audit_file(audit)
    check_flag_source(table, threshold)
    launch_dir = Path.cwd()
    tracker = tracker_for(values["tracking"]["uri"], values["study"], values["tracking"]["artifact_root"], launch_dir,
                          values["tracking"]["timeout_seconds"], values["tracking"]["claim_settle_seconds"])
    fp = fingerprint(values, table.sha256)
    commit, dirty = git_state()
    periods = table.period_names
    tags = {f"{TAG}kind": "audit", f"{TAG}data_sha256": table.sha256, f"{TAG}table_sha256": table.sha256,
            f"{TAG}git_commit": commit, f"{TAG}git_dirty": str(dirty).lower(), f"{TAG}dataset": table.name,
            f"{TAG}detector": audit.detector, f"{TAG}audit.file": str(table.path), f"{TAG}audit.rows": str(table.n_rows),
            f"{TAG}audit.periods": f"{periods[0]}..{periods[-1]}" if periods else "",
            **{f"{TAG}version.{k}": v for k, v in library_versions().items()},
            **{str(k): str(v) for k, v in (values.get("tags") or {}).items()}}
    run_id, busy = tracker.claim(fp, f"audit {table.name}", tags, rerun=bool(values["rerun"]))
    if run_id is None:
        print(f"evenflag: {table.name} with these settings was audited before ({busy}); rerun=true audits it again")
        return 0
    beat = Heartbeat(lambda: tracker.heartbeat(run_id),
                     on_orphaned=lambda: tracker.kill(run_id, "its process was orphaned"))
    staging = Path(tempfile.mkdtemp(prefix=".audit-", dir=_out_root(values, launch_dir)))
    try:
        # Params a benchmark run also has, so that the report's columns fill in for audits.
        params = {"dataset.name": table.name, "protocol.kind": "audit", "seed": values["seed"],
                  "threshold.policy": "flag column" if audit.flag else threshold.policy,
                  "threshold.fraction": "" if audit.flag else threshold.fraction,
                  **flatten({k: v for k, v in values.items() if k in ("audit", "metrics")})}
        tracker.log(run_id, params, {}, {})
        result = compute_audit(table, threshold, metrics, seed=int(values["seed"]))
        flags = result.flags
        written = _write_outputs(staging, values, table, result, flags, run_id, tracker, code_version())
        notes = {f"{TAG}{k}": v for k, v in result.notes.items()}
        notes[f"{TAG}groups"] = ",".join(table.group_names)
        notes[f"{TAG}source"] = f"file:{table.path}"
        notes[f"{TAG}skipped"] = " | ".join(result.skipped)[:5000]
        notes[f"{TAG}status"] = "finished"
        tracker.log(run_id, {}, result.values, notes)
        _log_period_steps(tracker, run_id, result.periods)
        tracker.log_artifacts(run_id, staging)
        out = _final_folder(values, launch_dir, table, run_id)
        shutil.rmtree(out, ignore_errors=True)
        staging.rename(out)
        beat.stop()
        tracker.finish(run_id)
        if values["rerun"]:
            tracker.supersede(fp, run_id)
    except (KeyboardInterrupt, SystemExit):
        tracker.kill(run_id, "interrupted before it finished")
        raise
    except Exception as exc:
        from evenflag.runner.app import format_exception

        tracker.fail(run_id, format_exception(exc))
        raise
    finally:
        beat.stop()
        shutil.rmtree(staging, ignore_errors=True)
    print(written["_summary"])
    print(f"written: {out / 'memo.md'}, {out / 'groups.md'}" + (f", {out / 'trend.png'}" if periods else "")
          + f"; run {run_id[:8]} in study {values['study']} ({tracker.uri})")
    return 0


def _check_out(values: dict) -> None:
    """``out`` is replaced by the audit's outputs: refuse a folder that holds
    anything but an earlier audit's outputs (or that holds the current folder)."""
    if not values.get("out"):
        return
    out = Path(values["out"]).expanduser().resolve()
    here = Path.cwd().resolve()
    if out == here or out in here.parents:
        raise ConfigError(f"out={values['out']} is the current folder or holds it; give a new folder for the audit's "
                          "outputs")
    if out.exists() and (not out.is_dir() or (any(out.iterdir()) and not (out / "memo.md").is_file())):
        raise ConfigError(f"out={values['out']} exists and is not an earlier audit's folder; give a new or empty "
                          "folder (its contents would be replaced)")


def _out_root(values: dict, launch_dir: Path) -> Path:
    root = Path(values["out"]).expanduser().parent if values.get("out") else launch_dir / "outputs" / "audits" / values["study"]
    root.mkdir(parents=True, exist_ok=True)
    return root


def _final_folder(values: dict, launch_dir: Path, table, run_id: str) -> Path:
    if values.get("out"):
        return Path(values["out"]).expanduser()
    stem = table.name.split(".")[0] or "audit"
    return _out_root(values, launch_dir) / f"{stem}-{run_id[:8]}"


def _log_period_steps(tracker, run_id: str, periods: pd.DataFrame) -> None:
    """Per-period flag rates and ratio as metric steps (step = period index), for the MLflow UI."""
    if periods.empty:
        return
    history = []
    keys = [c for c in periods.columns if (c == "flag_rate_ratio" or c.startswith("flag_rate/")) and "." not in c]
    for _, row in periods.iterrows():
        history.append({f"period.{k}": row[k] for k in keys if pd.notna(row.get(k))})
    from mlflow.entities import Metric

    from evenflag.runner.tracking import MAX_METRICS, metric_key

    items = [Metric(metric_key(k), float(v), 0, step) for step, row in enumerate(history) for k, v in row.items()]
    for start in range(0, len(items), MAX_METRICS):
        tracker.client.log_batch(run_id, metrics=items[start:start + MAX_METRICS])


def _write_outputs(folder: Path, values: dict, table, result, flags, run_id: str, tracker, code: str) -> dict:
    from evenflag.report.audit_memo import audit_memo, group_table

    (folder / "config.yaml").write_text(OmegaConf.to_yaml(OmegaConf.create(values)))
    scores = pd.DataFrame({"row_id": np.arange(table.n_rows, dtype=np.int64),
                           "label": table.label if table.label is not None else np.full(table.n_rows, -1, np.int8),
                           "group": pd.Categorical.from_codes(table.group, table.group_names),
                           "score": table.score, "flag": flags})
    if table.period is not None:
        scores["period"] = pd.Categorical.from_codes(table.period, table.period_names, ordered=True)
    scores.to_parquet(folder / "scores.parquet", index=False)
    figure = None
    if not result.periods.empty:
        result.periods.to_csv(folder / "periods.csv", index=False)
        from evenflag.report.figures import trend_figure

        trend_figure(result.periods, table.group_names, folder, title=f"{table.name}: flags per period")
        figure = "trend.png"
    sizes = table.group_sizes()
    flagged = dict(zip(table.group_names, np.bincount(table.group[flags], minlength=len(table.group_names)).tolist()))
    audit = values["audit"]
    settings = [f"score column: `{audit['score']}` ({'lower' if audit['lower_is_suspicious'] else 'higher'} = more "
                "suspicious)",
                f"group column(s): {', '.join(f'`{g}`' for g in audit['group'])}; reference group: "
                f"{result.notes.get('reference_group')}",
                f"flags: {result.notes['flag_source']}",
                f"labels: {_labels_text(result.labels_known, audit)}"]
    if result.score_levels >= 1 << 16:
        settings.append(f"score metrics use {result.score_levels:,} score levels (equal-count bins of the pooled "
                        "order; an AUROC moves by at most about 1/65,536)")
    meta = {"file": table.name, "path": str(table.path), "format": table.fmt, "rows": table.n_rows,
            "sha256": table.sha256, "run_id": run_id, "study": values["study"], "uri": tracker.uri, "code": code,
            "periods": table.period_names, "settings": settings, "sizes": sizes, "flagged": flagged}
    level = values["metrics"]["level"]
    memo = audit_memo(meta, result.values, result.notes, result.periods, result.skipped, figure, level)
    (folder / "memo.md").write_text(memo)
    groups = "\n".join(group_table(result.values, sizes, flagged, result.notes.get("reference_group", ""), level))
    (folder / "groups.md").write_text(groups + "\n")
    ratio = result.values.get("flag_rate_ratio", float("nan"))
    summary = [f"{table.name}: {table.n_rows:,} rows, {int(flags.sum()):,} flagged; flag-rate ratio {ratio:.3f}"
               + (" (below the four-fifths line)" if result.values.get("four_fifths_pass") == 0.0 else ""), groups]
    summary += [f"left out: {line}" for line in result.skipped]
    from evenflag.report.audit_memo import AUDIT_CAUTION

    summary.append(AUDIT_CAUTION.replace("**", ""))
    return {"_summary": "\n".join(summary)}


def _labels_text(known: str, audit: dict) -> str:
    return {"none": "none (detection metrics left out)",
            "all": f"`{audit['label']}` known for every row",
            "flagged_only": f"`{audit['label']}` known for flagged rows only (hit rates among the flagged computed; "
                            "error rates that need unflagged outcomes left out)",
            "partial": f"`{audit['label']}` known for some rows (hit rates among reviewed flagged rows only)"}[known]
