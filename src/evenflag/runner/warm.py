"""Start the parallel launcher's worker processes while the launch prepares.

Hydra's joblib launcher starts its worker processes only when the first jobs
are handed out, after the launch has composed and checked every job and
opened the store; each worker then spends seconds importing the libraries a
job needs. Here the same workers start at the beginning of the launch and
import, build the sweep's first detector (without fitting it) and load its
dataset, while the launch checks its settings.
A worker then prepares the tracking store, so the launching process never
imports MLflow (about 1.5 s) on the way to the first job. The workers are
joblib's reusable ones: the launcher's own ``Parallel`` call, made with the
same arguments, gets them back with their imports done. Once the sweep is
over they are ended at once instead of at the interpreter's exit.
"""

from __future__ import annotations

import importlib
import os
import tempfile
import threading
import uuid

# What any job imports: the job itself, the run, the tracking store.
JOB_MODULES = ("evenflag.runner.app", "evenflag.runner.job", "evenflag.runner.run", "evenflag.runner.tracking",
               "mlflow.store.tracking.sqlalchemy_store")


def prepare_worker(modules: list[str], dataset: dict | None = None, cancel: str | None = None,
                   detector: dict | None = None) -> None:
    """Import ``modules``, build ``detector`` (a detector config: its libraries,
    often imported only then, cost the first job most of a second) and load
    ``dataset``, stopping early once the file ``cancel`` exists (the launch
    failed its checks)."""
    for module in modules:
        if cancel and os.path.exists(cancel):
            return
        try:
            importlib.import_module(module)
        except Exception:  # a job that needs it reports the problem itself
            pass
    if detector is not None and not (cancel and os.path.exists(cancel)):
        try:  # what the launch's own check does; nothing is fitted
            from evenflag.detectors.base import build_detector

            check = getattr(build_detector(detector, seed=0), "check_settings", None)
            if callable(check):
                check()
        except Exception:  # the jobs build (and report) it themselves
            pass
    if dataset is not None and not (cancel and os.path.exists(cancel)):
        try:  # parsed once per process (data/registry.py), so the worker's first job finds it loaded
            from evenflag.data.registry import load_dataset, to_spec

            load_dataset(to_spec(dataset))
        except Exception:  # the jobs load (and report) it themselves
            pass


class Workers:
    """The warming workers of one launch."""

    def __init__(self, arguments: dict, count: int, modules: list[str], dataset: dict | None,
                 detector: dict | None = None):
        self.arguments = arguments
        self.cancel = os.path.join(tempfile.gettempdir(), f"evenflag-warm-{os.getpid()}-{uuid.uuid4().hex}")
        self.thread = threading.Thread(target=self._warm, args=(count, modules, dataset, detector),
                                       name="evenflag-warm-workers", daemon=True)
        self.thread.start()

    def _parallel(self):
        from joblib import Parallel

        return Parallel(**self.arguments)

    def _warm(self, count: int, modules: list[str], dataset: dict | None, detector: dict | None) -> None:
        from joblib import delayed

        try:
            self._parallel()(delayed(prepare_worker)(list(modules), dataset, self.cancel, detector)
                             for _ in range(count))
        except Exception:  # only a head start; the launcher starts its workers anyway
            pass

    def prepare_store(self, settings: tuple) -> tuple[str, int]:
        """``tracking.prepare_store`` run in a worker once the imports are done;
        its errors (a store that cannot be used) are raised here as they are."""
        from joblib import delayed

        from evenflag.errors import EvenflagError
        from evenflag.runner.tracking import prepare_store

        self.thread.join()
        try:
            return self._parallel()([delayed(prepare_store)(settings)])[0]
        except EvenflagError:
            raise
        except Exception:  # no worker could do it (the pool broke): here, as for the other launchers
            return prepare_store(settings)

    def stop(self) -> None:
        """End the workers now: idle once the sweep returned; still importing
        when a check failed, in which case they are told to stop first (ended
        mid-task, joblib and loky print errors of their own) and the exit does
        not wait for their imports."""
        try:
            if self.thread.is_alive():
                open(self.cancel, "w").close()
                self.thread.join()
            from joblib.externals.loky import get_reusable_executor, reusable_executor

            # reuse=True hands back the running executor whatever its arguments
            # (any other call replaces it); none running: nothing to end.
            if getattr(reusable_executor, "_executor", None) is not None:
                get_reusable_executor(reuse=True).shutdown(wait=True, kill_workers=True)
        except Exception:  # they end at the interpreter's exit as before
            pass
        finally:
            if os.path.exists(self.cancel):
                os.unlink(self.cancel)


def start_joblib_workers(launcher: dict, modules: list[str], dataset: dict | None = None,
                         detector: dict | None = None) -> Workers | None:
    """Start the workers of a joblib launcher config (``hydra.launcher``) in a
    background thread that imports ``modules``, builds ``detector`` and loads
    ``dataset`` (configs) in each. None if the config is not the joblib launcher's."""
    if not str(launcher.get("_target_", "")).endswith("JoblibLauncher"):
        return None
    from hydra_plugins.hydra_joblib_launcher._core import process_joblib_cfg
    from joblib import effective_n_jobs

    # The arguments Hydra's joblib launcher passes to Parallel, so that its
    # call reuses these workers (joblib keeps one executor per argument set).
    arguments = {k: v for k, v in launcher.items() if k != "_target_"}
    arguments["backend"] = "loky"
    process_joblib_cfg(arguments)
    count = effective_n_jobs(arguments.get("n_jobs") or 1)
    if count < 2:
        return None
    return Workers(arguments, count, modules, dataset, detector)
