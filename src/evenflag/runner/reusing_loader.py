"""Compose each job of a sweep from a copy: one composition per combination of config-group choices.

Hydra composes every job of a sweep from scratch: it walks the defaults tree,
loads and merges every yaml file, then applies the job's plain overrides
(``seed=3``, ``detector.weight=0.5``). On evenflag's config tree that costs
about 0.11 s per job, while the jobs of a grid or a search usually differ only
in plain values. This loader composes each distinct combination of group
choices once per process, through Hydra itself, and makes every job from a
copy of it with the job's plain overrides applied the way Hydra applies them.

Which overrides are plain is Hydra's own decision (the defaults list's
``config_overrides``), asked for the first job of a sweep and confirmed for
every new combination of group choices; a job whose overrides Hydra would
treat differently is composed by Hydra in full.
Plain values cannot change the defaults tree (Hydra allows interpolations in
a defaults list to reference group choices only), so a copy composed from the
group choices and then given the plain overrides is the config Hydra builds.
tests/test_sweep_compose.py checks that job by job against Hydra's loader.

It lives outside the ``hydra_plugins`` package on purpose: Hydra's plugin scan
executes those modules a second time, and a class defined twice cannot be
pickled to the parallel launcher's workers.
"""

from __future__ import annotations

import copy
import uuid
from typing import Any

from hydra._internal.config_loader_impl import ConfigLoaderImpl, get_overrides_dirname
from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.types import HydraContext, RunMode
from omegaconf import DictConfig, OmegaConf, open_dict

# Per process (a parallel launcher's worker keeps its own), per launch: the
# loader is pickled to workers with its launch token, never with these.
_COMPOSED: dict[tuple, DictConfig | None] = {}        # (token, keys, group overrides) -> composition
_PLAIN_POSITIONS: dict[tuple, frozenset[int]] = {}    # (token, keys) -> which overrides are plain


class ReusingConfigLoader:
    """A Hydra ``ConfigLoader`` whose ``load_sweep_config`` reuses the
    composition of earlier jobs with the same group choices; every other call
    goes to the wrapped loader."""

    def __init__(self, inner: Any):
        self.inner = inner
        self.token = uuid.uuid4().hex  # a new launch never reuses an old launch's compositions

    def __getattr__(self, name: str) -> Any:
        if name == "inner":  # not yet set (while unpickling)
            raise AttributeError(name)
        return getattr(self.inner, name)

    def load_sweep_config(self, master_config: DictConfig, sweep_overrides: list[str]) -> DictConfig:
        overrides = list(sweep_overrides)
        parsed = OverridesParser.create().parse_overrides(overrides=overrides)
        keys = tuple(o.get_key_element() for o in parsed)
        asked = None
        if (self.token, keys) not in _PLAIN_POSITIONS:
            _drop_other_launches(self.token)
            asked = _PLAIN_POSITIONS[self.token, keys] = self._plain_positions(master_config, overrides, parsed)
        plain = _PLAIN_POSITIONS[self.token, keys]
        if not plain:
            return self.inner.load_sweep_config(master_config, overrides)
        rest = tuple(line for i, line in enumerate(overrides) if i not in plain)
        if (self.token, keys, rest) not in _COMPOSED:
            # A new combination of group choices: confirm with Hydra that the
            # same overrides are plain under it before reusing its composition.
            same = (asked or self._plain_positions(master_config, overrides, parsed)) == plain
            _COMPOSED[self.token, keys, rest] = self.inner.load_sweep_config(master_config, list(rest)) if same else None
        composed = _COMPOSED[self.token, keys, rest]
        if composed is None:
            return self.inner.load_sweep_config(master_config, overrides)
        cfg = copy.deepcopy(composed)
        ConfigLoaderImpl._apply_overrides_to_config([parsed[i] for i in sorted(plain)], cfg)
        task = [o for o in parsed if not o.is_hydra_override()]
        with open_dict(cfg.hydra):
            cfg.hydra.overrides.task = [o.input_line for o in task]
            dirname = cfg.hydra.job.config.override_dirname
            cfg.hydra.job.override_dirname = get_overrides_dirname(
                overrides=task, kv_sep=dirname.kv_sep, item_sep=dirname.item_sep, exclude_keys=dirname.exclude_keys)
        OmegaConf.copy_cache(from_config=master_config, to_config=cfg)
        return cfg

    def _plain_positions(self, master_config: DictConfig, overrides: list[str], parsed: list) -> frozenset[int]:
        """Positions of the overrides Hydra applies as plain config overrides for this job."""
        hydra_overrides = list(OmegaConf.to_container(master_config.hydra.overrides.hydra))
        defaults = self.inner.compute_defaults_list(master_config.hydra.job.config_name, hydra_overrides + overrides,
                                                    RunMode.RUN)
        applied = {o.input_line for o in defaults.config_overrides}
        return frozenset(i for i, o in enumerate(parsed)
                         if o.input_line in applied and not o.is_hydra_override() and o.package is None)


def _drop_other_launches(token: str) -> None:
    for cache in (_COMPOSED, _PLAIN_POSITIONS):
        for key in [k for k in cache if k[0] != token]:
            del cache[key]


def reusing_context(hydra_context: HydraContext) -> HydraContext:
    """The same context with a loader that reuses compositions between jobs."""
    if isinstance(hydra_context.config_loader, ReusingConfigLoader):
        return hydra_context
    return HydraContext(config_loader=ReusingConfigLoader(hydra_context.config_loader),
                        callbacks=hydra_context.callbacks)
