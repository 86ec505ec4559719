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
