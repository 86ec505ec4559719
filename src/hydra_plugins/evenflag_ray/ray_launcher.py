"""A Hydra launcher that runs every job of a sweep as a task on a Ray cluster.

Why our own: Hydra's Ray launcher plugin (hydra-ray-launcher 1.2.2) requires
cloudpickle below 3, while joblib 1.6 (the parallel launcher's engine) requires
3 or later, so both cannot be installed together. This launcher uses only
Ray's public task API (``ray.init``, ``ray.remote``, ``ray.get``,
``ray.cancel``).

Each job is composed on the launching machine (its sweep folder resolved to
one absolute path) and shipped to a worker with the launch's ``EVENFLAG_*``
and ``MLFLOW_*`` environment (the ledger, the launcher's identity, tracking
credentials). Workers must have evenflag installed and reach the tracking
store: with workers on other machines, use ``tracking=server``.

Ctrl-C or SIGTERM of the launch cancels the tasks not yet finished; their runs
are closed as KILLED by the launch (runner/app.py) or, failing that, by the
lease.
"""

from __future__ import annotations

import logging
import os
import signal
from pathlib import Path
from typing import Any, Sequence

from hydra.core.singleton import Singleton
from hydra.core.utils import JobReturn, configure_log, filter_overrides, run_job, setup_globals
from hydra.plugins.launcher import Launcher
from hydra.types import HydraContext, TaskFunction
from omegaconf import DictConfig, open_dict

log = logging.getLogger(__name__)

FORWARDED_PREFIXES = ("EVENFLAG_", "MLFLOW_")


def evenflag_job(job_config: DictConfig, hydra_context: HydraContext, task_function: TaskFunction,
                 singleton_state: dict[Any, Any], environment: dict[str, str]) -> JobReturn:
    """One job, composed by the launcher, inside a Ray worker process (workers are reused across tasks)."""
    from hydra.core.hydra_config import HydraConfig

    os.environ.update(environment)
    setup_globals()
    Singleton.set_state(singleton_state)
    HydraConfig.instance().set_config(job_config)
    return run_job(hydra_context=hydra_context, config=job_config, task_function=task_function,
                   job_dir_key="hydra.sweep.dir", job_subdir_key="hydra.sweep.subdir")


class RayLauncher(Launcher):
    """Jobs as Ray tasks.

    Parameters
    ----------
    address : str or None
        The cluster to attach to: ``"HOST:PORT"`` of its head (``ray start
        --head`` prints it), ``"auto"`` for the cluster running on this
        machine, or None to start a Ray instance for this launch on this
        machine only.
    cpus_per_job : int
        CPUs each job reserves. Ray sets ``OMP_NUM_THREADS`` of a task to its
        CPUs, and evenflag passes that to torch: one CPU means one intra-op
        thread per job, which is what parallel jobs need.
    local_cpus : int or None
        With ``address=None``: CPUs of the instance started here (None: all).
    """

    def __init__(self, address: str | None = None, cpus_per_job: int = 1, local_cpus: int | None = None) -> None:
        self.address = address
        self.cpus_per_job = cpus_per_job
        self.local_cpus = local_cpus
        self.config: DictConfig | None = None
        self.task_function: TaskFunction | None = None
        self.hydra_context: HydraContext | None = None

    def setup(self, *, hydra_context: HydraContext, task_function: TaskFunction, config: DictConfig) -> None:
        self.config = config
        self.task_function = task_function
        self.hydra_context = hydra_context

    def _connect(self):
        # Every job's progress line is printed (Ray folds repeated lines by
        # default), without colour codes in logs; read when ray is imported.
        os.environ.setdefault("RAY_DEDUP_LOGS", "0")
        os.environ.setdefault("RAY_COLOR_PREFIX", "0")
        import ray

        if not ray.is_initialized():
            settings = dict(include_dashboard=False, log_to_driver=True, configure_logging=False)
            # Ray's core installs its own SIGTERM handler, which exits at once; the
            # launch's own (runner/app.py) first ends the running runs as KILLED.
            on_sigterm = signal.getsignal(signal.SIGTERM)
            if self.address:
                ray.init(address=self.address, **settings)
            else:
                ray.init(num_cpus=self.local_cpus, **settings)
            if on_sigterm is not None:
                signal.signal(signal.SIGTERM, on_sigterm)
        return ray

    def launch(self, job_overrides: Sequence[Sequence[str]], initial_job_idx: int) -> Sequence[JobReturn]:
        assert self.config is not None and self.task_function is not None and self.hydra_context is not None
        setup_globals()
        configure_log(self.config.hydra.hydra_logging, self.config.hydra.verbose)
        ray = self._connect()
        # Resolved here once: a worker resolving ${now:...} itself would pick another folder.
        sweep_dir = Path(str(self.config.hydra.sweep.dir)).resolve()
        sweep_dir.mkdir(parents=True, exist_ok=True)
        environment = {k: v for k, v in os.environ.items() if k.startswith(FORWARDED_PREFIXES)}
        singleton_state = Singleton.get_state()
        remote = ray.remote(num_cpus=self.cpus_per_job, max_retries=0)(evenflag_job)
        log.info(f"Ray ({self.address or 'started here'}) is launching {len(job_overrides)} jobs, "
                 f"sweep output dir: {sweep_dir}")
        refs = []
        for offset, overrides in enumerate(job_overrides):
            idx = initial_job_idx + offset
            log.info(f"\t#{idx} : {' '.join(filter_overrides(overrides))}")
            sweep_config = self.hydra_context.config_loader.load_sweep_config(self.config, list(overrides))
            with open_dict(sweep_config):
                sweep_config.hydra.job.id = f"{sweep_config.hydra.job.name}_{idx}"
                sweep_config.hydra.job.num = idx
                sweep_config.hydra.sweep.dir = str(sweep_dir)
            refs.append(remote.remote(sweep_config, self.hydra_context, self.task_function, singleton_state,
                                      environment))
        results, lost = [], []
        try:
            for ref in refs:
                try:
                    results.append(ray.get(ref))
                except ray.exceptions.RayError as exc:  # the worker died: let the other jobs finish first
                    lost.append(exc)
        except (KeyboardInterrupt, SystemExit):
            # The launch was interrupted: stop the rest, so no job runs on after it.
            for ref in refs:
                ray.cancel(ref, force=True)
            raise
        if lost:
            raise RuntimeError(f"{len(lost)} of {len(refs)} Ray task(s) were lost (a worker died): {lost[0]}")
        return results
