"""Start the parallel launcher's worker processes while the launch prepares.

Hydra's joblib launcher starts its worker processes only when the first jobs
are handed out, after the launch has composed and checked every job and
opened the store; each worker then spends seconds importing the libraries a
job needs. Here the same workers start at the beginning of the launch and
import, build the sweep's first detector (without fitting it) and load its
dataset, while the launch checks its settings.
One worker builds the sweep's detectors to check their settings (the launch
defers those checks to it) and prepares the tracking store as soon as its
imports are done and the launch's other checks passed, while the others go
on warming. So the launching process imports neither the detectors'
libraries (scikit-learn, torch) nor MLflow on the way to the first job,
seconds of CPU that would compete with the workers' imports on a small
machine, and goes on to Hydra's set-up while the warm-up ends. The workers are
joblib's reusable ones: the launcher's own ``Parallel`` call, made with the
same arguments, gets them back with their imports done. Once the sweep is
over they are ended at once instead of at the interpreter's exit.
"""

from __future__ import annotations

import gc
import importlib
import os
import pickle
import shutil
import tempfile
import threading
import time

# What any job imports: the job itself, the run, the tracking store.
JOB_MODULES = ("evenflag.runner.app", "evenflag.runner.job", "evenflag.runner.run", "evenflag.runner.tracking",
               "mlflow.store.tracking.sqlalchemy_store")


def prepare_worker(modules: list[str], dataset: dict | None = None, signals: str | None = None,
                   detector: dict | None = None, store: tuple | None = None) -> None:
    """Import ``modules``; if ``store`` is given, wait for the launch's own
    checks, run the detector checks it deferred and prepare the tracking
    store (``Signals``); build ``detector`` (a detector config: its
    libraries, often imported only then, cost the first job most of a second)
    and load ``dataset``. ``signals`` is the launch's folder of signal files
    (``Signals``); once its cancel file exists (the launch failed its checks)
    the worker stops early.

    The warm-up runs without garbage collection and what it made is then
    frozen (``gc.freeze``), as in the launching process (app.launch): over
    millions of imported objects CPython's collections would cost seconds,
    and loky runs a full collection in its workers after each task of more
    than a second (when psutil is absent): 0.04 to 0.1 s a job over what a
    warm-up left unfrozen, against a few milliseconds once it is frozen.
    """
    gc.disable()
    try:
        _warm_up(modules, dataset, Signals(signals) if signals else None, detector, store)
    finally:
        gc.freeze()
        gc.enable()


def _warm_up(modules: list[str], dataset: dict | None, signals: Signals | None, detector: dict | None,
             store: tuple | None) -> None:
    cancelled = signals.cancelled if signals else (lambda: False)
    for module in modules:
        if cancelled():
            return
        try:
            importlib.import_module(module)
        except Exception:  # a job that needs it reports the problem itself
            pass
    if store is not None and signals is not None:
        checks = signals.wait_for_checks()
        if checks is None or not signals.send_store(store, checks):
            return  # the launch failed its checks
    if detector is not None and not cancelled():
        try:  # what the launch's check does; nothing is fitted
            from evenflag.runner.config import check_detector

            check_detector(detector, seed=0)
        except Exception:  # the jobs build (and report) it themselves
            pass
    if dataset is not None and not cancelled():
        try:  # parsed once per process (data/registry.py), so the worker's first job finds it loaded
            from evenflag.data.registry import load_dataset, to_spec

            load_dataset(to_spec(dataset))
        except Exception:  # the jobs load (and report) it themselves
            pass


class Signals:
    """Files through which a launch and its warming workers talk while the
    workers' warm-up runs (a joblib task's result comes back only at its end):
    *checked* (the launch's own checks passed; it holds the detector checks
    it deferred, config.check_values), *cancel* (they failed: stop) and
    *store* (the store prepared once the deferred checks passed, or the
    first error)."""

    def __init__(self, folder: str):
        self.folder = folder
        self.checked_file = os.path.join(folder, "checked")
        self.cancel_file = os.path.join(folder, "cancel")
        self.store_file = os.path.join(folder, "store")

    def cancelled(self) -> bool:
        return os.path.exists(self.cancel_file)

    def wait_for_checks(self) -> list | None:
        """In a worker: once the launch's own checks passed, the detector
        checks it deferred; None if they failed or the launching process is gone."""
        parent = os.getppid()
        while not os.path.exists(self.checked_file):
            if self.cancelled() or os.getppid() != parent:
                return None
            time.sleep(0.01)
        with open(self.checked_file, "rb") as handle:
            return pickle.load(handle)

    def send_checked(self, checks: list) -> None:
        """In the launch: its own checks passed; ``checks`` are those it deferred."""
        self._write(self.checked_file, pickle.dumps(checks))

    def send_store(self, settings: tuple, checks: list) -> bool:
        """In a worker: the deferred ``checks``, then ``tracking.prepare_store``;
        its result or the first error, for ``receive_store``. False if there
        was an error."""
        from evenflag.runner.config import check_detectors
        from evenflag.runner.tracking import prepare_store

        try:
            check_detectors(checks)
            outcome = ("done", prepare_store(settings))
        except Exception as error:  # the launch raises it as it is (bad settings, a store that cannot be used)
            outcome = ("error", error)
        try:
            payload = pickle.dumps((settings, outcome))
        except Exception:  # an error that cannot be pickled: the launch checks and prepares the store itself
            return False
        self._write(self.store_file, payload)
        return outcome[0] == "done"

    @staticmethod
    def _write(path: str, payload: bytes) -> None:
        partial = path + ".partial"
        with open(partial, "wb") as handle:
            handle.write(payload)
        os.replace(partial, path)  # never read half-written

    def receive_store(self, settings: tuple, waiting: threading.Thread):
        """In the launch: the outcome sent for ``settings``, or None once
        ``waiting`` (the warm-up) ended without one."""
        while not os.path.exists(self.store_file):
            if not waiting.is_alive() and not os.path.exists(self.store_file):
                return None
            time.sleep(0.01)
        try:
            with open(self.store_file, "rb") as handle:
                sent, outcome = pickle.load(handle)
        except Exception:  # an error of a kind that does not unpickle: the launch prepares the store itself
            return None
        return outcome if sent == settings else None


class Workers:
    """The warming workers of one launch."""

    def __init__(self, arguments: dict, count: int, modules: list[str], dataset: dict | None,
                 detector: dict | None = None, store: tuple | None = None):
        self.arguments = arguments
        self.signals = Signals(tempfile.mkdtemp(prefix=f"evenflag-warm-{os.getpid()}-"))
        self.thread = threading.Thread(target=self._warm, args=(count, modules, dataset, detector, store),
                                       name="evenflag-warm-workers", daemon=True)
        self.thread.start()
        _WARMING.append(self)

    def _parallel(self):
        from joblib import Parallel

        return Parallel(**self.arguments)

    def _warm(self, count: int, modules: list[str], dataset: dict | None, detector: dict | None,
              store: tuple | None) -> None:
        from joblib import delayed

        try:  # one worker prepares the store while the others go on warming
            self._parallel()(delayed(prepare_worker)(list(modules), dataset, self.signals.folder, detector,
                                                     store if task == 0 else None)
                             for task in range(count))
        except Exception:  # only a head start; the launcher starts its workers anyway
            pass

    def prepare_store(self, settings: tuple, checks: list) -> tuple[str, int]:
        """The deferred detector ``checks`` (config.check_values), then
        ``tracking.prepare_store`` for ``settings``, in a worker as soon as its
        imports are done, while the others still warm up; called once the
        launch's own checks passed. Their errors (bad detector settings, a
        store that cannot be used) are raised here as they are."""
        from evenflag.errors import EvenflagError
        from evenflag.runner.config import check_detectors
        from evenflag.runner.tracking import prepare_store

        self.signals.send_checked(checks)
        outcome = self.signals.receive_store(settings, self.thread)
        if outcome is not None:
            status, value = outcome
            if status == "error":
                raise value
            return value
        # No worker sent it (the pool broke, or the settings differ): in a worker now, or here.
        from joblib import delayed

        check_detectors(checks)
        self.thread.join()
        try:
            return self._parallel()([delayed(prepare_store)(settings)])[0]
        except EvenflagError:
            raise
        except Exception:  # no worker could do it: here, as for the other launchers
            return prepare_store(settings)


    def stop(self) -> None:
        """End the workers now: idle once the sweep returned; still importing
        when a check failed, in which case they are told to stop first (ended
        mid-task, joblib and loky print errors of their own) and the exit does
        not wait for their imports."""
        try:
            if self.thread.is_alive():
                open(self.signals.cancel_file, "w").close()
                self.thread.join()
            from joblib.externals.loky import get_reusable_executor, reusable_executor

            # reuse=True hands back the running executor whatever its arguments
            # (any other call replaces it); none running: nothing to end.
            if getattr(reusable_executor, "_executor", None) is not None:
                get_reusable_executor(reuse=True).shutdown(wait=True, kill_workers=True)
        except Exception:  # they end at the interpreter's exit as before
            pass
        finally:
            shutil.rmtree(self.signals.folder, ignore_errors=True)
            if self in _WARMING:
                _WARMING.remove(self)


# This process's warming workers, for wait_for_warm_up.
_WARMING: list[Workers] = []


def wait_for_warm_up() -> None:
    """Until this process's workers finished warming up. Hydra's launcher calls
    ``Parallel`` on the same workers; it waits here (the sweeper, just before
    it launches) so that two ``Parallel`` calls never share them at once."""
    for workers in list(_WARMING):
        workers.thread.join()


def start_joblib_workers(launcher: dict, modules: list[str], dataset: dict | None = None,
                         detector: dict | None = None, store: tuple | None = None) -> Workers | None:
    """Start the workers of a joblib launcher config (``hydra.launcher``) in a
    background thread that imports ``modules``, builds ``detector`` and loads
    ``dataset`` (configs) in each, and in one of them prepares ``store``
    (``tracker_for``'s arguments) once the launch says its checks passed.
    None if the config is not the joblib launcher's."""
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
    return Workers(arguments, count, modules, dataset, detector, store)
