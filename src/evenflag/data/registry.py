"""Dataset names -> specs (from configs/dataset/*.yaml) -> loaded datasets."""

from __future__ import annotations

import copy
import dataclasses
import json
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from evenflag.data.cache import table_sha256
from evenflag.data.dataset import Dataset, build_dataset
from evenflag.data.sources import reader_for
from evenflag.data.spec import DatasetSpec
from evenflag.errors import ConfigError, UnknownNameError
from evenflag.paths import config_dir

_LOADED: dict[str, Dataset] = {}
_SPECS: dict[str, DatasetSpec] = {}


def dataset_config_dir() -> Path:
    return config_dir() / "dataset"


def available_datasets() -> list[str]:
    return sorted(p.stem for p in dataset_config_dir().glob("*.yaml"))


def to_spec(config: Any) -> DatasetSpec:
    """Validate a dict or DictConfig against :class:`DatasetSpec`.

    A misspelt or mistyped key gives one line naming it.
    """
    if isinstance(config, DatasetSpec):
        return config
    memo_key = json.dumps(config, sort_keys=True, default=str) if isinstance(config, dict) else None
    if memo_key in _SPECS:  # validating through OmegaConf costs ~10 ms; a sweep repeats it per job
        return copy.deepcopy(_SPECS[memo_key])
    spec = _validate(config)
    if memo_key is not None:
        _SPECS[memo_key] = copy.deepcopy(spec)
    return spec


def _validate(config: Any) -> DatasetSpec:
    try:
        merged = OmegaConf.merge(OmegaConf.structured(DatasetSpec), config)
        missing = sorted(OmegaConf.missing_keys(merged))
        if missing:
            raise ConfigError(
                f"dataset '{merged.get('name', '?')}': required value(s) {missing} not set; "
                f"set them in the yaml or on the command line, e.g. dataset.{missing[0]}=..."
            )
        spec = OmegaConf.to_object(merged)
    except OmegaConfBaseException as exc:
        raise ConfigError(f"dataset config: {str(exc).splitlines()[0]}; see configs/dataset/*.yaml for the allowed keys") from exc
    return spec


def get_spec(name: str) -> DatasetSpec:
    path = dataset_config_dir() / f"{name}.yaml"
    if not path.exists():
        raise UnknownNameError(f"unknown dataset '{name}'; valid names: {', '.join(available_datasets())}")
    raw = OmegaConf.load(path)
    if isinstance(raw, DictConfig) and "_target_" in raw:
        raw = OmegaConf.masked_copy(raw, [k for k in raw if k != "_target_"])
    return to_spec(raw)


def load_dataset(config: Any) -> Dataset:
    """Load a dataset by name, spec, or config mapping; parsed once per process.

    Examples
    --------
    >>> ds = load_dataset("german_credit")
    >>> ds.n_rows
    1000
    """
    spec = get_spec(config) if isinstance(config, str) else to_spec(config)
    key = json.dumps(dataclasses.asdict(spec), sort_keys=True, default=str)
    if key not in _LOADED:
        reader = reader_for(spec.source.kind, spec.name)
        frame, digest, source = reader(spec.source, spec.name, na_values=spec.na_values)
        _LOADED[key] = build_dataset(
            frame,
            name=spec.name,
            label_column=spec.label,
            anomaly_values=spec.anomaly_values,
            group_columns=spec.group,
            source=source,
            sha256=digest,
            drop_columns=spec.drop,
            min_group_size=spec.min_group_size,
            small_groups=spec.small_groups,
            group_value_names=spec.group_value_names,
            licence=spec.licence,
            citation=spec.citation,
        )
        _LOADED[key].table_sha256 = table_sha256(frame)
    return _LOADED[key]


def forget_loaded() -> None:
    """Drop the in-process memo (tests use this to exercise the disk cache)."""
    _LOADED.clear()
