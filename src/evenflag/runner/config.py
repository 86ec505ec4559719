"""Structured configs: the schema every composed run config is checked against."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional

from hydra.core.config_store import ConfigStore

from evenflag.data.protocol import ProtocolSpec
from evenflag.data.spec import DatasetSpec
from evenflag.metrics.suites import MetricsSpec
from evenflag.thresholds import ThresholdSpec


@dataclass
class TrackingSpec:
    """Where runs are recorded. ``uri: null`` = a local SQLite store under
    ``outputs/tracking/`` of the launch directory; otherwise any MLflow
    tracking URI (``http://host:5000`` for a team server, ``sqlite:///path``)."""

    uri: Optional[str] = None
    artifact_root: Optional[str] = None     # null: beside a SQLite store; the server's default for a server
    timeout_seconds: float = 15.0           # a tracking server that does not answer within this fails the launch
    claim_settle_seconds: float = 2.0       # server only: wait before a claim of a cell is final (see tracking.py)


@dataclass
class MitigationSpec:
    """Fairness mitigation around any detector: ``none``, ``group_balanced``
    (resample training rows to equal group sizes) or ``group_thresholds``
    (per-group thresholds that equalise flag rates)."""

    kind: str = "none"


@dataclass
class RunConfig:
    dataset: DatasetSpec = field(default_factory=DatasetSpec)
    protocol: ProtocolSpec = field(default_factory=ProtocolSpec)
    detector: Any = field(default_factory=dict)
    threshold: ThresholdSpec = field(default_factory=ThresholdSpec)
    metrics: MetricsSpec = field(default_factory=MetricsSpec)
    tracking: TrackingSpec = field(default_factory=TrackingSpec)
    mitigation: MitigationSpec = field(default_factory=MitigationSpec)
    study: str = "default"
    seed: int = 0
    tags: dict[str, str] = field(default_factory=dict)
    rerun: bool = False
    threads: Optional[int] = None


SCHEMA_NAME = "run_schema"
GROUP_SCHEMAS = {
    "dataset": DatasetSpec,
    "protocol": ProtocolSpec,
    "threshold": ThresholdSpec,
    "metrics": MetricsSpec,
    "tracking": TrackingSpec,
    "mitigation": MitigationSpec,
}


def register() -> None:
    ConfigStore.instance().store(name=SCHEMA_NAME, node=RunConfig)


def check_values(cfg, deferred: list | None = None, label: str = "") -> None:
    """Every value of a composed run config that can be checked without data,
    checked before any job starts (one ConfigError naming the key and the fix).

    The schema above checks types; this checks ranges and names, and builds
    the detector once (``check_detector``). With a ``deferred`` list the
    detector is appended to it instead, with ``label`` (the value that made
    this config), for ``check_detectors`` to build later: a parallel
    launcher's worker does it while the launch itself imports no detector
    library (runner/warm.py)."""
    from omegaconf import OmegaConf

    from evenflag.data.protocol import check_spec as check_protocol
    from evenflag.errors import ConfigError, EvenflagError
    from evenflag.metrics.suites import check_spec as check_metrics
    from evenflag.mitigation import check_kind
    from evenflag.thresholds import check_spec as check_threshold

    values = OmegaConf.to_container(OmegaConf.masked_copy(cfg, [k for k in cfg if k != "hydra"]), resolve=True)
    try:
        check_threshold(ThresholdSpec(**values["threshold"]))
        check_protocol(ProtocolSpec(**values["protocol"]))
        check_metrics(MetricsSpec(**values["metrics"]))
    except EvenflagError as exc:
        raise ConfigError(str(exc)) from exc
    check_kind(values["mitigation"]["kind"])
    dataset = values["dataset"]
    if dataset.get("small_groups") not in ("merge", "refuse"):
        raise ConfigError(f"dataset.small_groups must be 'merge' or 'refuse', got '{dataset.get('small_groups')}'")
    if int(dataset.get("min_group_size") or 0) < 0:
        raise ConfigError(f"dataset.min_group_size must be 0 or more, got {dataset['min_group_size']}")
    if values["protocol"]["min_group_size"] < 1:
        raise ConfigError(f"protocol.min_group_size must be at least 1, got {values['protocol']['min_group_size']}")
    threads = values.get("threads")
    if threads is not None and threads < 1:
        raise ConfigError(f"threads={threads} is invalid; use a positive number of threads per job, or null for the "
                          "library default")
    tracking = values["tracking"]
    for key in ("timeout_seconds", "claim_settle_seconds"):
        if not tracking[key] >= 0:
            raise ConfigError(f"tracking.{key} must be 0 or more, got {tracking[key]}")
    if deferred is None:
        check_detector(values["detector"], values["seed"])
    else:
        deferred.append((label, values["detector"], values["seed"]))


def check_detectors(deferred: list) -> None:
    """The detector checks ``check_values`` deferred, in order; the first that
    fails raises its ConfigError as ``check_values`` would have, prefixed by
    its label."""
    from evenflag.errors import ConfigError

    done = set()
    for label, detector, seed in deferred:
        if repr((detector, seed)) in done:
            continue
        done.add(repr((detector, seed)))
        try:
            check_detector(detector, seed)
        except ConfigError as exc:
            raise ConfigError(f"{label}: {exc}" if label else str(exc)) from exc


def check_detector(detector: dict, seed: int) -> None:
    """Build the detector of a (resolved) detector config once, so that its own
    argument checks (and scikit-learn's parameter constraints) run at launch
    rather than after training; one ConfigError if they fail."""
    from evenflag.detectors.base import build_detector
    from evenflag.errors import ConfigError, EvenflagError

    try:
        check = getattr(build_detector(detector, seed=seed), "check_settings", None)
        if callable(check):
            check()
    except ConfigError:
        raise
    except EvenflagError as exc:
        raise ConfigError(str(exc)) from exc
