"""A Hydra sweeper that searches the detection/fairness trade-off with Optuna.

Hydra's own Optuna sweeper plugin pins optuna below 3.0, whose database
storage does not work with SQLAlchemy 2 (which MLflow needs): a study could
not be stored, so a killed search could not resume. This sweeper uses
Optuna's public API (``create_study``, ``ask``, ``tell``) instead.

Each trial is one evenflag run (one MLflow run, fingerprinted as usual). The
job returns its metrics; the sweeper tells Optuna the ``objectives`` named in
its config, each with its direction. The Optuna study lives in an SQLite file
beside the tracking store (``search.db``), named after the evenflag study, so
a relaunch of a killed search resumes: trials the kill left RUNNING are asked
again with the same parameters (their run, if it finished, is then reused
from the store rather than trained again), and the search stops once
``n_trials`` trials have completed or failed.

Search space (``hydra.sweeper.params``, Hydra's sweep syntax):
``interval(0.1, 30)`` (add ``tag(log, ...)`` for a log scale; integer ends
give integers), ``range(1, 5)``, ``choice(a, b)`` or ``a,b``; a plain value is
fixed.

Hydra scans this module without registering it in sys.modules, so it holds no
dataclass (whose string annotations would then fail to resolve); the settings
are configs/hydra/sweeper/search.yaml.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Optional

from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.core.override_parser.types import ChoiceSweep, IntervalSweep, Override, RangeSweep
from hydra.core.plugins import Plugins
from hydra.plugins.sweeper import Sweeper
from hydra.types import HydraContext, TaskFunction
from omegaconf import DictConfig, OmegaConf

from evenflag.runner.reusing_loader import reusing_context
from evenflag.runner.warm import wait_for_warm_up

DIRECTIONS = ("maximize", "minimize")
SAMPLERS = ("tpe", "nsga2", "random")


class SearchError(Exception):
    """A search setting that cannot work (raised before any trial runs)."""


def distributions_of(overrides: list[Override]) -> tuple[dict[str, Any], list[str]]:
    """Optuna distributions of the swept keys, and the fixed overrides."""
    import optuna

    searched, fixed = {}, []
    for item in overrides:
        key = item.get_key_element()
        if not item.is_sweep_override():
            fixed.append(f"{key}={item.get_value_element_as_str()}")
            continue
        value = item.value()
        if isinstance(value, IntervalSweep):
            log_scale = "log" in value.tags
            if isinstance(value.start, int) and isinstance(value.end, int):
                searched[key] = optuna.distributions.IntDistribution(value.start, value.end, log=log_scale)
            else:
                searched[key] = optuna.distributions.FloatDistribution(value.start, value.end, log=log_scale)
        elif isinstance(value, RangeSweep):
            if all(isinstance(v, int) for v in (value.start, value.stop, value.step)):
                searched[key] = optuna.distributions.IntDistribution(value.start, value.stop - 1, step=value.step)
            else:
                searched[key] = optuna.distributions.CategoricalDistribution(list(item.sweep_iterator()))
        elif isinstance(value, ChoiceSweep):
            searched[key] = optuna.distributions.CategoricalDistribution(
                [v if isinstance(v, (int, float, str, bool)) or v is None else str(v) for v in value.list])
        else:
            raise SearchError(f"{key}: cannot search {item.get_value_element_as_str()}; use interval(a, b), "
                              "range(a, b), choice(a, b) or a,b")
    return searched, fixed


def sampler_of(name: str, seed: int):
    import optuna

    if name == "tpe":
        return optuna.samplers.TPESampler(seed=seed, multivariate=True)
    if name == "nsga2":
        return optuna.samplers.NSGAIISampler(seed=seed)
    if name == "random":
        return optuna.samplers.RandomSampler(seed=seed)
    raise SearchError(f"hydra.sweeper.sampler '{name}' is unknown; use one of {', '.join(SAMPLERS)}")


def parse_objectives(objectives) -> dict[str, str]:
    """['auroc:maximize', 'false_flag_gap:minimize'] -> {'auroc': 'maximize', ...}
    (a mapping is taken as it is)."""
    if objectives is None:
        return {"auroc": "maximize", "flag_rate_ratio": "maximize"}
    if hasattr(objectives, "items"):
        return {str(k): str(v) for k, v in objectives.items()}
    out = {}
    for item in objectives:
        key, _, direction = str(item).partition(":")
        out[key.strip()] = direction.strip()
    return out


def check_settings(n_trials, batch_size, sampler, objectives) -> None:
    """One SearchError naming the setting, before any trial runs."""
    if not isinstance(n_trials, int) or not isinstance(batch_size, int) or n_trials < 1 or batch_size < 1:
        raise SearchError(f"hydra.sweeper.n_trials ({n_trials}) and hydra.sweeper.batch_size ({batch_size}) must be "
                          "whole numbers of at least 1")
    if sampler not in SAMPLERS:
        raise SearchError(f"hydra.sweeper.sampler '{sampler}' is unknown; use one of {', '.join(SAMPLERS)}")
    objectives = parse_objectives(objectives) if objectives is not None else {}
    bad = {k: v for k, v in objectives.items() if str(v) not in DIRECTIONS}
    if bad or not objectives:
        raise SearchError(f"hydra.sweeper.objectives takes metric:maximize or metric:minimize items; got "
                          f"{', '.join(f'{k}:{v}' for k, v in bad.items())}" if bad else "hydra.sweeper.objectives is empty; name at least one "
                          "metric key with maximize or minimize")


def default_storage(config: DictConfig) -> str:
    """An SQLite file beside a local tracking store (else under outputs/tracking/)."""
    uri = OmegaConf.select(config, "tracking.uri") or ""
    launch_dir = Path(os.environ.get("EVENFLAG_LAUNCH_DIR", Path.cwd()))
    folder = (Path(uri[len("sqlite:///"):]).parent if uri.startswith("sqlite:///")
              else launch_dir / "outputs" / "tracking")
    folder.mkdir(parents=True, exist_ok=True)
    return f"sqlite:///{(folder / 'search.db').resolve()}"


class SearchSweeper(Sweeper):
    def __init__(self, n_trials: int = 30, batch_size: int = 2, sampler: str = "tpe", seed: int = 0,
                 storage: Optional[str] = None, objectives: Optional[dict] = None, params: Optional[dict] = None):
        super().__init__()
        self.n_trials, self.batch_size, self.sampler, self.seed = n_trials, batch_size, sampler, seed
        self.storage = storage
        self.objectives = parse_objectives(objectives)
        self.params = dict(params or {})
        self.launcher = None
        self.config: Optional[DictConfig] = None
        self.hydra_context: Optional[HydraContext] = None

    def setup(self, *, hydra_context: HydraContext, task_function: TaskFunction, config: DictConfig) -> None:
        hydra_context = reusing_context(hydra_context)  # trials differ in plain values: compose them from a copy
        self.hydra_context, self.config = hydra_context, config
        self.launcher = Plugins.instance().instantiate_launcher(hydra_context=hydra_context,
                                                                task_function=task_function, config=config)

    def check(self) -> None:
        check_settings(self.n_trials, self.batch_size, self.sampler, self.objectives)

    def open_study(self):
        import optuna

        optuna.logging.set_verbosity(optuna.logging.WARNING)
        storage = self.storage or default_storage(self.config)
        name = str(OmegaConf.select(self.config, "study") or "search")
        study = optuna.create_study(storage=storage, study_name=name, load_if_exists=True,
                                    directions=[self.objectives[k] for k in self.objectives])
        # Seeded anew per launch from the trials already made: a relaunch seeded
        # like the first launch would ask the same first points again.
        study.sampler = sampler_of(self.sampler, self.seed + len(study.get_trials(deepcopy=False)))
        return study

    def sweep(self, arguments: list[str]) -> Any:
        import optuna
        from optuna.trial import TrialState

        self.check()
        parser = OverridesParser.create(config_loader=self.hydra_context.config_loader)
        overrides = parser.parse_overrides([f"{k}={v}" for k, v in self.params.items()] + list(arguments))
        distributions, fixed = distributions_of(overrides)
        if not distributions:
            raise SearchError("nothing to search: give hydra.sweeper.params ranges such as "
                              "detector.weight=tag(log, interval(0.1, 30))")
        study = self.open_study()
        if list(study.directions) != [optuna.study.StudyDirection.MAXIMIZE if self.objectives[k] == "maximize"
                                      else optuna.study.StudyDirection.MINIMIZE for k in self.objectives]:
            raise SearchError(f"the stored search '{study.study_name}' has other objectives; pick another study name")
        requeued = resume_interrupted(study)
        if requeued:
            print(f"search '{study.study_name}': {requeued} trial(s) left running by an interrupted launch are "
                  "asked again with the same settings")
        sweep_dir = Path(self.config.hydra.sweep.dir)
        sweep_dir.mkdir(parents=True, exist_ok=True)
        OmegaConf.save(self.config, sweep_dir / "multirun.yaml")
        keys = list(self.objectives)
        job_index = 0
        returns = []
        while True:
            counted = counted_trials(study)
            left = self.n_trials - counted
            if left <= 0:
                break
            trials = [study.ask(distributions) for _ in range(min(self.batch_size, left))]
            batch = [fixed + [f"{key}={trial.params[key]}" for key in distributions]
                     + [f"++tags.search_trial={trial.number}", f"++tags.search_params='{' '.join(distributions)}'",
                        f"++tags.search_objectives='{' '.join(f'{k}:{self.objectives[k]}' for k in keys)}'"]
                     for trial in trials]
            wait_for_warm_up()  # the parallel launcher's workers (runner/warm.py) before its Parallel call
            results = self.launcher.launch(batch, initial_job_idx=job_index)
            job_index += len(batch)
            for trial, result in zip(trials, results):
                outcome = result.return_value if result.status.name == "COMPLETED" else None
                metrics = (outcome or {}).get("metrics") or {}
                missing = [k for k in keys if k not in metrics]
                if outcome and outcome.get("status") in ("done", "skipped") and not missing:
                    study.tell(trial, [float(metrics[k]) for k in keys])
                else:
                    if outcome and outcome.get("status") in ("done", "skipped") and missing:
                        print(f"search: objective '{missing[0]}' is not a metric of the run; its metrics include "
                              f"{', '.join(sorted(k for k in metrics if '.' not in k)[:20])}")
                    study.tell(trial, state=TrialState.FAIL)
            returns.append(results)
        return returns


def trials_left(config: DictConfig) -> int:
    """Trials a launch of this search will run: n_trials minus those an earlier
    launch of the same study completed or failed (trials left running count as left)."""
    import optuna

    n_trials = int(OmegaConf.select(config, "hydra.sweeper.n_trials") or 0)
    storage = OmegaConf.select(config, "hydra.sweeper.storage") or default_storage(config)
    name = str(OmegaConf.select(config, "study") or "search")
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    try:
        study = optuna.load_study(study_name=name, storage=storage)
    except KeyError:  # no search of that name yet
        return n_trials
    return max(n_trials - counted_trials(study), 0)


def resume_interrupted(study) -> int:
    """Trials a killed launch left RUNNING: failed (marked as requeued) and asked
    again with the same parameters, so that none is lost or counted twice."""
    from optuna.trial import TrialState

    count = 0
    for trial in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        study.enqueue_trial(trial.params, user_attrs={"requeued_from": trial.number}, skip_if_exists=False)
        study._storage.set_trial_user_attr(trial._trial_id, "requeued", True)
        study._storage.set_trial_state_values(trial._trial_id, TrialState.FAIL)
        count += 1
    return count


def counted_trials(study) -> int:
    """Trials that count toward n_trials: completed or failed, not requeued."""
    from optuna.trial import TrialState

    return sum(1 for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE, TrialState.FAIL))
               if not t.user_attrs.get("requeued"))
