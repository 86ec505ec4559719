"""Settings of an audit (the schema of configs/audit/*.yaml)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional

from evenflag.errors import ConfigError

LABELS_KNOWN = ("auto", "all", "flagged_only")
FORMATS = ("auto", "csv", "csv.gz", "parquet")


@dataclass
class AuditSpec:
    """Which column of the exported file holds what.

    ``score``: higher = more suspicious unless ``lower_is_suspicious``.
    ``group``: one or more group columns (several make intersectional values).
    ``label`` (optional): the outcome of review; ``anomaly_values`` and
    ``normal_values`` list what it may hold (anything else is refused), an
    empty cell means "not reviewed". ``flag`` (optional): who was actually
    flagged (1/0, true/false); without it the threshold policy flags rows,
    within each period when there is a ``period`` column. ``weight``
    (optional): a non-negative row weight (survey or sampling weight).
    ``id`` (optional): a case id that must be unique.
    ``labels_known``: ``auto`` (decided from the file), ``all`` (every row
    must have a label) or ``flagged_only`` (only flagged rows were reviewed).
    """

    file: Optional[str] = None
    name: Optional[str] = None             # shown in tables as the dataset; default: the file's name
    detector: str = "deployed"             # shown in tables as the detector
    format: str = "auto"
    encoding: str = "utf-8"
    score: str = "score"
    lower_is_suspicious: bool = False
    group: list[str] = field(default_factory=lambda: ["group"])
    label: Optional[str] = None
    anomaly_values: list[Any] = field(default_factory=lambda: [1])
    normal_values: list[Any] = field(default_factory=lambda: [0])
    labels_known: str = "auto"
    flag: Optional[str] = None
    period: Optional[str] = None
    weight: Optional[str] = None
    id: Optional[str] = None
    min_group_size: int = 30
    chunk_rows: int = 1_000_000             # rows read at a time (Parquet row groups are read whole)


def check_spec(spec: AuditSpec) -> None:
    """Refuse settings that cannot work, before the file is read."""
    if not spec.file:
        raise ConfigError("no file to audit; give it as `evenflag audit FILE` (or audit.file=PATH)")
    if spec.format not in FORMATS:
        raise ConfigError(f"audit.format '{spec.format}' is not supported; use one of {', '.join(FORMATS)}")
    if not spec.group:
        raise ConfigError("audit.group is empty; name the group column(s), e.g. audit.group=[sex] or [sex,region]")
    if spec.labels_known not in LABELS_KNOWN:
        raise ConfigError(f"audit.labels_known '{spec.labels_known}' is unknown; use one of {', '.join(LABELS_KNOWN)}")
    if spec.label and not spec.anomaly_values:
        raise ConfigError("audit.anomaly_values is empty; list the label values that mean a confirmed anomaly")
    overlap = {str(v) for v in spec.anomaly_values} & {str(v) for v in spec.normal_values}
    if overlap:
        raise ConfigError(f"label value(s) {sorted(overlap)} are in both audit.anomaly_values and audit.normal_values; "
                          "list each value once")
    if spec.min_group_size < 1:
        raise ConfigError(f"audit.min_group_size must be at least 1, got {spec.min_group_size}")
    if spec.chunk_rows < 1000:
        raise ConfigError(f"audit.chunk_rows must be at least 1000, got {spec.chunk_rows}")
    named = [spec.score, *spec.group, spec.label, spec.flag, spec.period, spec.weight, spec.id]
    named = [c for c in named if c]
    repeated = sorted({c for c in named if named.count(c) > 1})
    if repeated:
        raise ConfigError(f"column '{repeated[0]}' is given for two roles (score, group, label, flag, period, "
                          "weight, id); give each role its own column")
