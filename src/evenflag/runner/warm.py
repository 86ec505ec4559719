"""Start the parallel launcher's worker processes while the launch prepares.

Hydra's joblib launcher starts its worker processes only when the first jobs
are handed out, after the launch has composed and checked every job and
opened the store; each worker then spends seconds importing the libraries a
job needs. Starting the same workers at the beginning of the launch, and
importing there, overlaps that with the launch's own preparation. The workers
are joblib's reusable ones: the launcher's own ``Parallel`` call, made with the
same arguments, gets them back with their imports done.
"""

from __future__ import annotations

import importlib
import threading

# What any job imports: the job itself, the run, the tracking store.
JOB_MODULES = ("evenflag.runner.app", "evenflag.runner.job", "evenflag.runner.run", "evenflag.runner.tracking",
               "mlflow.store.tracking.sqlalchemy_store")


def import_modules(modules: list[str]) -> None:
    for module in modules:
        try:
            importlib.import_module(module)
        except Exception:  # a job that needs it reports the problem itself
            pass


def start_joblib_workers(launcher: dict, modules: list[str]) -> threading.Thread | None:
    """Start the workers of a joblib launcher config (``hydra.launcher``) in a
    background thread that imports ``modules`` in each; join it before the
    launcher runs. None if the config is not the joblib launcher's."""
    if not str(launcher.get("_target_", "")).endswith("JoblibLauncher"):
        return None
    from hydra_plugins.hydra_joblib_launcher._core import process_joblib_cfg
    from joblib import Parallel, delayed, effective_n_jobs

    # The arguments Hydra's joblib launcher passes to Parallel, so that its
    # call reuses these workers (joblib keeps one executor per argument set).
    arguments = {k: v for k, v in launcher.items() if k != "_target_"}
    arguments["backend"] = "loky"
    process_joblib_cfg(arguments)
    workers = effective_n_jobs(arguments.get("n_jobs") or 1)
    if workers < 2:
        return None

    def warm():
        try:
            Parallel(**arguments)(delayed(import_modules)(list(modules)) for _ in range(workers))
        except Exception:  # only a head start; the launcher starts its workers anyway
            pass

    thread = threading.Thread(target=warm, name="evenflag-warm-workers", daemon=True)
    thread.start()
    return thread
