"""The detector contract and how a config names a detector.

A detector is any class with

* ``fit(X, group=None) -> self``: learn from training rows (float32 array);
  ``group`` is the group value of each row, for detectors that use it;
* ``anomaly_score(X) -> 1-d float array``: higher = more anomalous;
* optionally ``embed(X) -> 2-d array``: the learned representation.

Learned state lives in attributes ending in ``_``. A detector that takes a
``seed`` argument gets the run's seed.

A config names a detector by ``_target_`` (an import path ``pkg.mod.Class``)
or by ``name``: a built-in name, or one registered by another package under
the entry-point group ``evenflag.detectors``.
"""

from __future__ import annotations

import functools
import inspect
import sys
from importlib.metadata import entry_points
from typing import Any, Protocol, runtime_checkable

import numpy as np

from evenflag.errors import ConfigError, UnknownNameError
from evenflag.plugins import import_object

ENTRY_POINT_GROUP = "evenflag.detectors"

BUILT_IN = {
    "isolation_forest": "evenflag.detectors.classic:IsolationForestDetector",
    "sklearn": "evenflag.detectors.classic:SklearnDetector",
    "autoencoder": "evenflag.detectors.neural:AutoencoderDetector",
    "deep_svdd": "evenflag.detectors.neural:DeepSVDDDetector",
    "adversarial": "evenflag.detectors.neural:AdversarialDetector",
    "distribution_matching": "evenflag.detectors.neural:DistributionMatchingDetector",
    "fairod": "evenflag.detectors.neural:FairODDetector",
}


@runtime_checkable
class Detector(Protocol):
    def fit(self, X: np.ndarray, group: np.ndarray | None = None) -> "Detector": ...

    def anomaly_score(self, X: np.ndarray) -> np.ndarray: ...


def registered_names() -> dict[str, str]:
    names = dict(BUILT_IN)
    for name, value in _entry_point_names(tuple(sys.path)):
        names.setdefault(name, value)
    return names


@functools.lru_cache(maxsize=8)
def _entry_point_names(path: tuple[str, ...]) -> tuple[tuple[str, str], ...]:
    """Installed plugins' names, read once per import path (a scan of every
    installed package's metadata costs about 10 ms, and every run asks)."""
    return tuple((entry.name, entry.value) for entry in entry_points(group=ENTRY_POINT_GROUP))


def resolve_detector_class(name_or_path: str):
    """A detector class from a registered name or an import path."""
    names = registered_names()
    if name_or_path in names:
        return import_object(names[name_or_path])
    if "." in name_or_path or ":" in name_or_path:
        return import_object(name_or_path)
    raise UnknownNameError(f"unknown detector '{name_or_path}'; registered names: {', '.join(sorted(names))}")


def detector_module(config: dict) -> str:
    """The module a detector config's class comes from ('' if it cannot be told),
    without importing it; the sklearn wrapper's estimator counts too."""
    names = registered_names()
    target = config.get("_target_") or names.get(str(config.get("name", "")), "") or str(config.get("name", ""))
    if config.get("name") == "sklearn" and config.get("estimator"):
        target = str(config["estimator"])
    module, sep, _ = str(target).partition(":")
    if not sep:
        module = module.rpartition(".")[0]
    return module


def _accepts(cls, parameter: str) -> bool:
    try:
        params = inspect.signature(cls.__init__).parameters
    except (TypeError, ValueError):
        return False
    return parameter in params or any(p.kind is p.VAR_KEYWORD for p in params.values())


# Config-group options that do not name one detector: the label comes from the config instead.
GENERIC_CHOICES = ("by_name", "sklearn")


def describe_detector(config: dict[str, Any], choice: str | None = None) -> str:
    """The detector's one name in logs, tags, ``--where`` and reports.

    ``choice`` is the config-group option the user picked (``detector=...``);
    it is the name unless it is generic (``by_name``, ``sklearn``), in which
    case the registered ``name``, the estimator of the scikit-learn wrapper or
    the class of a ``_target_`` is used. A wrapper's base is appended.

    >>> describe_detector({"name": "sklearn", "estimator": "sklearn.neighbors.LocalOutlierFactor"}, "local_outlier_factor")
    'local_outlier_factor'
    >>> describe_detector({"name": "sklearn", "estimator": "sklearn.mixture.GaussianMixture"}, "sklearn")
    'GaussianMixture'
    >>> describe_detector({"name": "adversarial", "base": {"name": "deep_svdd"}}, "adversarial")
    'adversarial deep_svdd'
    """
    if choice and choice not in GENERIC_CHOICES:
        name = choice
    else:
        name = config.get("name") or str(config.get("_target_") or "?").rsplit(".", 1)[-1].rsplit(":", 1)[-1]
        if name == "sklearn":
            name = str(config.get("estimator") or "sklearn").rsplit(".", 1)[-1]
    base = config.get("base")
    if isinstance(base, dict) and base.get("name") and not name.endswith(f" {base['name']}"):
        name = f"{name} {base['name']}"
    return name


def build_detector(config: dict[str, Any], seed: int | None = None):
    """Instantiate a detector from its config mapping (``name`` or ``_target_``
    plus constructor arguments); unknown arguments are refused with the list of
    allowed ones."""
    config = dict(config)
    target = config.pop("_target_", None)
    name = config.pop("name", None)
    if not target and not name:
        raise ConfigError("detector config needs 'name' (a registered detector) or '_target_' (an import path)")
    cls = resolve_detector_class(target or name)
    signature = inspect.signature(cls.__init__)
    allowed = [p for p in signature.parameters if p != "self"]
    if not any(p.kind is p.VAR_KEYWORD for p in signature.parameters.values()):
        unknown = [k for k in config if k not in allowed]
        if unknown:
            raise ConfigError(
                f"detector '{name or target}' has no setting {unknown}; allowed settings: {', '.join(allowed) or 'none'}"
            )
    if seed is not None and "seed" not in config and _accepts(cls, "seed"):
        config["seed"] = seed
    try:
        return cls(**config)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"detector '{name or target}': {exc}") from exc
