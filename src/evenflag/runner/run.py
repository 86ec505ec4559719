"""One run, start to end, as a pure computation (no tracking):
data -> split -> preprocessing -> detector -> scores -> flags -> metrics."""

from __future__ import annotations

import dataclasses
import json
import os
import random
import sys
import time
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from omegaconf import DictConfig, OmegaConf

from evenflag import mitigation
from evenflag.data.dataset import Dataset
from evenflag.data.preprocessing import PreparedData, prepare
from evenflag.data.protocol import ProtocolSpec, base_rates, hold_out, make_split
from evenflag.data.registry import load_dataset, to_spec
from evenflag.detectors.base import build_detector
from evenflag.errors import DetectorError, warn_line
from evenflag.metrics.inputs import FlagRule, MetricNaNWarning
from evenflag.metrics.suites import MetricsSpec, check_spec, evaluate
from evenflag.thresholds import ThresholdSpec, check_spec as check_threshold, flag_scores

_PREPARED: dict[tuple, PreparedData] = {}
_MAX_PREPARED = 16


@dataclass
class RunOutput:
    dataset: Dataset
    scores: pd.DataFrame                 # row_id, label, group, score, flag (test rows)
    metrics: dict[str, float]
    notes: dict[str, str]
    timings: dict[str, float] = field(default_factory=dict)
    history: list[dict[str, float]] = field(default_factory=list)


def seed_everything(seed: int) -> None:
    random.seed(seed)
    np.random.seed(seed % (2**32))
    if "torch" in sys.modules:  # neural detectors also seed their own generator
        sys.modules["torch"].manual_seed(seed)


def limit_threads(threads: int | None) -> None:
    """One intra-op thread per job when jobs run side by side: two jobs with two
    threads each on two cores ran 11x slower than with one thread each."""
    threads = threads or int(os.environ.get("OMP_NUM_THREADS", "0") or 0) or None
    if not threads:
        return
    from threadpoolctl import threadpool_limits

    threadpool_limits(threads)
    if "torch" in sys.modules:
        sys.modules["torch"].set_num_threads(threads)
    os.environ["EVENFLAG_THREADS"] = str(threads)


def _as_obj(node, cls):
    if isinstance(node, cls):
        return node
    if isinstance(node, DictConfig):
        node = OmegaConf.to_container(node, resolve=True)
    return OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(cls), node))


def prepared_data(dataset: Dataset, dataset_key: str, protocol: ProtocolSpec, seed: int) -> PreparedData:
    """Split + preprocessing, memoised per (dataset, protocol, seed) in this process."""
    key = (dataset_key, repr(protocol), seed)
    if key not in _PREPARED:
        if len(_PREPARED) >= _MAX_PREPARED:
            _PREPARED.pop(next(iter(_PREPARED)))
        split = make_split(dataset, protocol, seed)
        _PREPARED[key] = prepare(dataset, split, protocol.group_as_feature)
    return _PREPARED[key]


def flag_rule(threshold: ThresholdSpec, mitigation_kind: str) -> FlagRule | None:
    """How the flags follow from the test scores, for resampling: a rank rule for
    ``top_fraction`` and ``true_rate``; none for a cut learned on other rows or
    per-group thresholds (flags then stay fixed and closed-form intervals apply)."""
    if mitigation_kind == "group_thresholds" or threshold.policy == "train_quantile":
        return None
    if threshold.policy == "top_fraction":
        return FlagRule("top_fraction", threshold.fraction)
    return FlagRule("top_anomalies")


def execute(cfg) -> RunOutput:
    """Run one configuration. ``cfg`` is a composed run config (DictConfig or dict)."""
    timings = {}
    started = time.perf_counter()
    dataset_spec = to_spec(cfg["dataset"] if not isinstance(cfg, DictConfig) else
                           OmegaConf.to_container(cfg.dataset, resolve=True))
    protocol = _as_obj(cfg["protocol"], ProtocolSpec)
    threshold = _as_obj(cfg["threshold"], ThresholdSpec)
    metrics_spec = _as_obj(cfg["metrics"], MetricsSpec)
    mitigation_kind = (cfg.get("mitigation") or {}).get("kind", "none")
    mitigation.check_kind(mitigation_kind)
    check_threshold(threshold)
    check_spec(metrics_spec)
    seed = int(cfg["seed"])
    detector_cfg = cfg["detector"]
    if isinstance(detector_cfg, DictConfig):
        detector_cfg = OmegaConf.to_container(detector_cfg, resolve=True)

    dataset = load_dataset(dataset_spec)
    data = prepared_data(dataset, json.dumps(dataclasses.asdict(dataset_spec), sort_keys=True, default=str), protocol, seed)
    timings["data"] = time.perf_counter() - started

    X_train, group_train = data.X_train, data.group_train
    X_calibration = group_calibration = None
    if threshold.policy == "train_quantile":
        # The cut is set on training rows the detector never saw (same share of every group).
        held = hold_out(group_train, threshold.calibration_fraction, seed)
        X_calibration, group_calibration = X_train[held], group_train[held]
        X_train, group_train = X_train[~held], group_train[~held]
    if mitigation_kind == "group_balanced":
        rows = mitigation.balanced_rows(group_train, seed)
        X_train, group_train = X_train[rows], group_train[rows]

    seed_everything(seed)
    detector = build_detector(detector_cfg, seed=seed)
    tick = time.perf_counter()
    detector.fit(X_train, group=group_train)
    timings["fit"] = time.perf_counter() - tick
    tick = time.perf_counter()
    test_scores = np.asarray(detector.anomaly_score(data.X_test), dtype=np.float64)
    calibration_scores = (np.asarray(detector.anomaly_score(X_calibration), dtype=np.float64)
                          if X_calibration is not None else None)
    timings["score"] = time.perf_counter() - tick
    if test_scores.shape != (len(data.X_test),) or not np.isfinite(test_scores).all():
        raise DetectorError(
            f"detector returned {test_scores.shape} scores with {int((~np.isfinite(test_scores)).sum())} "
            f"non-finite values for {len(data.X_test)} rows; scores must be finite, one per row")

    tick = time.perf_counter()
    if mitigation_kind == "group_thresholds":
        flags = mitigation.flag_per_group(threshold, test_scores, data.group_test, calibration_scores,
                                          group_calibration, data.label_test)
    else:
        flags = flag_scores(threshold, test_scores, calibration_scores, data.label_test)
    embedding = None
    if "leakage" in metrics_spec.families and hasattr(detector, "embed"):
        embedding = np.asarray(detector.embed(data.X_test))
    with warnings.catch_warnings(record=True) as undefined:
        warnings.simplefilter("always", MetricNaNWarning)
        result = evaluate(metrics_spec.families, data.label_test, test_scores, flags, data.group_test,
                          embedding=embedding, n_bootstrap=metrics_spec.bootstrap, seed=seed,
                          level=metrics_spec.level, resample=metrics_spec.resample,
                          reference_group=metrics_spec.reference_group, rule=flag_rule(threshold, mitigation_kind))
    for caught in undefined:  # one line each (Python's warnings print the source line too); others as they were
        if issubclass(caught.category, MetricNaNWarning):
            warn_line(str(caught.message))
        else:
            warnings.warn_explicit(caught.message, caught.category, caught.filename, caught.lineno)
    result.notes["natural_base_rates"] = ", ".join(
        f"{g}={r:.4f}" for g, r in base_rates(dataset.label, dataset.group.to_numpy()).items())
    timings["metrics"] = time.perf_counter() - tick

    scores = pd.DataFrame({
        "row_id": data.test_rows.astype(np.int64),
        "label": data.label_test.astype(np.int8),
        "group": data.group_test,
        "score": test_scores,
        "flag": flags,
    })
    return RunOutput(dataset=dataset, scores=scores, metrics=result.values, notes=result.notes, timings=timings,
                     history=list(getattr(detector, "history_", []) or []))
