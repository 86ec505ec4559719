"""The ``evenflag run`` entry point: validation, the Hydra app, the sweep summary.

``launch`` checks every override before any job starts (one clear line per
mistake), creates the tracking store once (several processes creating a new
SQLite store at once crash), closes runs left RUNNING by a killed sweep,
runs the Hydra app, then prints the summary and exits non-zero if any run
failed.
"""

from __future__ import annotations

import gc
import json
import os
import shutil
import signal
import socket
import sys
import time
import traceback
from pathlib import Path

import hydra
from omegaconf import DictConfig, OmegaConf

from evenflag.errors import ConfigError, EvenflagError
from evenflag.paths import config_dir
from evenflag.plugins import PLUGIN_DIRS_ENV
from evenflag.runner import ledger
from evenflag.runner.config import register

register()

PASS_THROUGH = ("--help", "-h", "--hydra-help", "--info", "-i", "--cfg", "-c", "--version", "--resolve", "-p",
                "--package")
HYDRA_HELP = """evenflag run: the Hydra options it supports
  -m, --multirun           run every combination of comma-separated values
  --config-dir DIR         another folder of config groups (before or after the overrides; repeatable)
  --cfg job [--resolve]    print the composed run config instead of running
  --info defaults-tree     show which yaml files make up the config (also: searchpath, plugins)
  --help                   the run config and its config groups
  hydra/launcher=NAME      how jobs run: {launchers}
Shell completion is not offered: Hydra's completion cannot see the `run` sub-command."""
UNSUPPORTED = ("--shell-completion", "-sc", "--experimental-rerun", "--run", "-r")


@hydra.main(config_path=str(config_dir()), config_name="config", version_base="1.3")
def hydra_app(cfg: DictConfig) -> dict:
    from evenflag.runner.job import run_job

    return run_job(cfg)


def launch(argv: list[str]) -> int:
    """Validate, prepare the store, run Hydra, summarise. Returns the exit code."""
    # Until the jobs start, a launch imports MLflow, scikit-learn and pandas
    # (millions of objects, none of them garbage), over which CPython would run
    # about 1,200 collections: 0.5 to 1 s per launch. The jobs run with
    # collection on, once those objects are set aside (gc.freeze in _launch).
    gc.disable()
    try:
        return _launch(argv)
    finally:
        gc.enable()


def _launch(argv: list[str]) -> int:
    unsupported = next((a for a in argv if a.split("=")[0] in UNSUPPORTED), None)
    if unsupported:
        raise ConfigError(f"{unsupported.split('=')[0]} is not supported by evenflag run; see evenflag run --hydra-help "
                          "for the options it supports")
    if "--hydra-help" in argv:
        # Hydra's own page lists --config-path, --config-name and shell completion,
        # which evenflag run does not support; this one lists what it does.
        print(HYDRA_HELP.format(launchers=", ".join(_options("hydra/launcher", []))))
        return 0
    if any(a in PASS_THROUGH or a.split("=")[0] in PASS_THROUGH for a in argv):
        return _call_hydra(argv)
    multirun = any(a in ("-m", "--multirun") for a in argv)
    overrides, extra_dirs = _split_args(argv)
    overrides = _route_detector_name(_free_keys(overrides), extra_dirs)
    # Plugin code named in a --config-dir yaml imports without PYTHONPATH (plugins.py).
    os.environ[PLUGIN_DIRS_ENV] = os.pathsep.join(str(Path(d).resolve()) for d in extra_dirs)
    # Hydra itself reads options before overrides and one --config-dir only:
    # hand it flags first and every config folder as a search path.
    argv = (["--multirun"] if multirun else []) + _search_path(extra_dirs) + overrides
    combos, plain_values = _single_value_combinations(overrides, extra_dirs)
    first = _compose(combos[0], extra_dirs, check=False)
    # A grid sweep on the parallel launcher starts its workers before the
    # checks below, so that their imports (seconds) overlap with the checks'.
    early = multirun and not _is_search(first) and _is_joblib(first)
    if early:
        _check_launcher(first)

    from evenflag.runner.lease import LAUNCH_ID_ENV, LAUNCHER_HOST_ENV, LAUNCHER_PID_ENV
    from evenflag.runner.tracking import prepare_store, tracker_for, ui_command

    # The ledger lives under the launch directory (on clusters usually a shared
    # file system, unlike /tmp), one file per launch, removed at the end.
    folder = Path.cwd() / "outputs" / ".ledgers"
    path = folder / f"{time.strftime('%Y%m%d-%H%M%S')}-{os.getpid()}.jsonl"
    launch_id = f"{socket.gethostname()}-{os.getpid()}-{time.time_ns()}"
    _INTERRUPTED.clear()
    previous = signal.signal(signal.SIGTERM, _terminate)
    previous_sigint = signal.signal(signal.SIGINT, _interrupt)
    interrupted = "the launch ended"
    uri = None
    warming = None
    finished = False
    total = 0
    try:
        def set_environment(total: int) -> None:
            """Before any worker process starts: workers keep the environment they started with."""
            os.environ[ledger.LEDGER_ENV] = str(path)
            os.environ[ledger.TOTAL_ENV] = str(total)
            os.environ[ledger.START_ENV] = str(time.time())
            os.environ[ledger.PLAN_ENV] = json.dumps(_detector_plan(overrides, first, total) if multirun else {})
            # Jobs write the store the launcher prepared, even in other processes,
            # and watch the launcher: workers whose launcher dies end their runs.
            os.environ["EVENFLAG_LAUNCH_DIR"] = str(Path.cwd())
            os.environ[LAUNCHER_PID_ENV] = str(os.getpid())
            os.environ[LAUNCHER_HOST_ENV] = socket.gethostname()
            os.environ[LAUNCH_ID_ENV] = launch_id

        if early:
            total = _count_jobs(overrides, first)
            set_environment(total)
            warming = _start_workers(first)
        from evenflag.runner.config import check_values

        # With warming workers, one of them builds the detectors to check them,
        # so that this process never imports their libraries (seconds of CPU
        # taken from the workers' imports): the checks are deferred to it.
        deferred = [] if warming is not None else None
        check_values(first, deferred)
        for combo in combos[1:]:
            _compose(combo, extra_dirs, deferred=deferred)
        _check_plain_values(first, plain_values, deferred)
        if not multirun and (len(combos) > 1 or plain_values):
            raise ConfigError("comma-separated values sweep several runs; add -m (evenflag run -m ...)")
        if multirun and _is_search(first):
            _check_search(first)
        if not early:
            total = _count_jobs(overrides, first) if multirun else 1
            if multirun and total == 0 and _is_search(first):
                print(f"search '{first.study}': all {first.hydra.sweeper.n_trials} trials are done; raise "
                      "hydra.sweeper.n_trials to search further, or report it: evenflag report --study " + str(first.study))
                return 0
            _check_launcher(first)
            set_environment(total)
            # Everything is checked, so no launch fails on its settings from here on.
            warming = _start_workers(first) if multirun else None

        store = _store_settings(first)
        if warming is not None:  # a worker prepares the store, which keeps MLflow's imports off this process
            uri, closed = warming.prepare_store(store, deferred or [])
        else:
            uri, closed = prepare_store(store)
        if closed:
            print(f"marked {closed} run(s) left RUNNING by an interrupted launch as KILLED")
        ledger.remove_stale(folder)
        path.parent.mkdir(parents=True, exist_ok=True)
        _STOPPED.clear()
        gc.freeze()
        gc.enable()
        try:
            code = _call_hydra(_with_checked_sweeper(_force_keys_of_swept_groups(argv, overrides, extra_dirs), first)
                               if multirun else argv, composed=first)
            raise_if_interrupted()
        except KeyboardInterrupt:
            interrupted = "the launch was interrupted (SIGINT)"
            raise
        if _STOPPED:
            interrupted = "the launch was stopped (SIGTERM)"
        entries = ledger.read(path)
        finished = len(entries) >= total and not _STOPPED
    finally:
        signal.signal(signal.SIGTERM, previous)
        signal.signal(signal.SIGINT, previous_sigint)
        if warming is not None:
            warming.stop()  # the workers are idle now; ending them here spares the exit's wait for them
        if uri is not None and not finished:
            # Runs of this launch still RUNNING (in workers the launcher stopped):
            # end them with the reason. Every job that reported ended its own run.
            try:
                tracker_for(*store).close_launch(launch_id, interrupted)
            except Exception:  # the store is gone or unreachable: the lease closes them later
                pass
        path.unlink(missing_ok=True)
        for key in (ledger.LEDGER_ENV, ledger.TOTAL_ENV, ledger.START_ENV, ledger.PLAN_ENV, LAUNCHER_PID_ENV,
                    LAUNCHER_HOST_ENV, LAUNCH_ID_ENV):
            os.environ.pop(key, None)

    counts = {s: sum(e["status"] == s for e in entries) for s in ("done", "skipped", "failed")}
    if entries and counts["skipped"] == len(entries) == total:
        # Nothing ran: do not leave a new, empty output folder per relaunch (only
        # this launch's folders, as its jobs recorded them; a launch beside it keeps its own).
        for folder in ledger.output_dirs_made(entries, multirun):
            here = Path.cwd().resolve()
            if folder.resolve() != here and folder.resolve() not in here.parents:  # never the launch folder itself
                shutil.rmtree(folder, ignore_errors=True)
    elsewhere = sum(e["status"] == "skipped" and "another launch" in e.get("summary", "") for e in entries)
    print(f"\nstudy '{first.study}': {counts['done']} done, {counts['skipped'] - elsewhere} skipped (already finished), "
          + (f"{elsewhere} running in another launch, " if elsewhere else "")
          + f"{counts['failed']} failed, of {total}")
    for entry in entries:
        if entry["status"] == "failed":
            print(f"  failed: {entry['name']}: {entry['message']}")
    if len(entries) < total:
        print(f"  {total - len(entries)} job(s) did not report; see the log above")
    print(f"results: {uri} (experiment '{first.study}')")
    print(f"open them: {ui_command(uri)}")
    if _STOPPED:
        print("evenflag: stopped by SIGTERM; relaunch the same command to run what is missing", file=sys.stderr)
        return 143
    if code:
        return code
    return 1 if counts["failed"] or len(entries) < total else 0


_STOPPED: list[int] = []
_INTERRUPTED: list[int] = []


def _interrupt(signum, frame):
    """Ctrl-C: raise KeyboardInterrupt as Python does, and remember it. A raise
    that lands inside a finaliser (``__del__``, a weakref callback) is printed
    and dropped by Python; the job and the launch check the flag and raise it
    again, so a launch never runs on after Ctrl-C."""
    _INTERRUPTED.append(signum)
    raise KeyboardInterrupt


def raise_if_interrupted(stopped_too: bool = False) -> None:
    """Raise KeyboardInterrupt if Ctrl-C reached this launch, even if the first
    raise was dropped (and, with ``stopped_too``, SIGTERM's SystemExit)."""
    if stopped_too and _STOPPED:
        raise SystemExit("SIGTERM")
    if _INTERRUPTED:
        raise KeyboardInterrupt


def _terminate(signum, frame):
    """SIGTERM ends the launch like Ctrl-C: the running job records its run as KILLED first."""
    _STOPPED.append(signum)
    raise SystemExit("SIGTERM")


def _is_joblib(cfg: DictConfig) -> bool:
    return str(OmegaConf.select(cfg, "hydra.launcher._target_") or "").endswith("JoblibLauncher")


def _start_workers(cfg: DictConfig):
    """The parallel launcher's workers, started now and importing what a job
    needs (building its detector, loading its dataset) while this launch
    prepares (runner/warm.py); None for other launchers."""
    from evenflag.runner.warm import JOB_MODULES, start_joblib_workers

    launcher = OmegaConf.to_container(OmegaConf.select(cfg, "hydra.launcher") or OmegaConf.create({}), resolve=True)
    try:
        detector = OmegaConf.to_container(cfg.detector, resolve=True)
        dataset = OmegaConf.to_container(cfg.dataset, resolve=True)
    except Exception:  # the jobs build and load (and report) them themselves
        detector = dataset = None
    try:
        store = _store_settings(cfg)
    except Exception:  # the launch reports it after its checks, and prepares the store itself
        store = None
    return start_joblib_workers(launcher, list(JOB_MODULES), dataset, detector, store)


def _store_settings(cfg: DictConfig) -> tuple:
    """``tracker_for``'s arguments for a launch's config."""
    return (cfg.tracking.uri, cfg.study, cfg.tracking.artifact_root, None, cfg.tracking.timeout_seconds,
            cfg.tracking.claim_settle_seconds)


def _check_launcher(cfg: DictConfig) -> None:
    launcher = OmegaConf.select(cfg, "hydra.launcher") or {}
    if str(launcher.get("_target_", "")).endswith(".RayLauncher"):
        _check_ray(launcher)
    n_jobs = launcher.get("n_jobs") if hasattr(launcher, "get") else None
    if n_jobs is not None and (not isinstance(n_jobs, int) or n_jobs == 0 or n_jobs < -1):
        raise ConfigError(f"hydra.launcher.n_jobs={n_jobs} is invalid; use a positive number of parallel jobs "
                          "(or -1 for one per core)")


RAY_CONNECT_SECONDS = 5


def _check_ray(launcher) -> None:
    """Ray installed, and a head that answers at the address: Ray itself retries
    a dead address for minutes."""
    import importlib.util

    if importlib.util.find_spec("ray") is None:
        raise ConfigError("hydra/launcher=ray needs Ray in this environment: pip install ray")
    cpus = launcher.get("cpus_per_job")
    if not isinstance(cpus, int) or isinstance(cpus, bool) or cpus < 1:
        raise ConfigError(f"hydra.launcher.cpus_per_job={cpus} is invalid; use a whole number of at least 1")
    address = launcher.get("address")
    if not address or address == "auto":
        return
    host, _, port = str(address).rpartition(":")
    if not host or not port.isdigit():
        raise ConfigError(f"hydra.launcher.address={address} is invalid; use HOST:PORT of the Ray head "
                          "(ray start --head prints it), auto, or null to start Ray here")
    try:
        socket.create_connection((host.strip("[]"), int(port)), timeout=RAY_CONNECT_SECONDS).close()
    except OSError as exc:
        raise ConfigError(f"hydra.launcher.address={address}: no Ray head answers there within "
                          f"{RAY_CONNECT_SECONDS} s ({exc.strerror or exc}); start one with `ray start --head "
                          f"--port={port}` or fix the address") from None


def _register_plugins() -> None:
    """evenflag's sweepers and Ray launcher, also where an editable install hides them from
    Hydra's scan of the hydra_plugins namespace (the import costs no Optuna)."""
    from hydra.core.plugins import Plugins

    from hydra_plugins.evenflag_ray.ray_launcher import RayLauncher
    from hydra_plugins.evenflag_search.checked_sweeper import CheckedSweeper
    from hydra_plugins.evenflag_search.search_sweeper import SearchSweeper

    Plugins.instance().register(SearchSweeper)
    Plugins.instance().register(CheckedSweeper)
    Plugins.instance().register(RayLauncher)


def _call_hydra(argv: list[str], composed: DictConfig | None = None) -> int:
    """Run Hydra's command line on ``argv``. ``composed``: the launch's own
    composition of the same config, whose ``hydra.mode`` Hydra is told
    instead of composing the whole config once more only to read that value
    (``Hydra.get_mode``; 0.1-0.2 s a launch) before it composes it to run."""
    _register_plugins()
    from hydra._internal.hydra import Hydra

    saved, saved_get_mode = sys.argv, Hydra.__dict__.get("get_mode")
    sys.argv = ["evenflag run", *argv]
    if composed is not None and saved_get_mode is not None:
        mode = OmegaConf.select(composed, "hydra.mode")
        Hydra.get_mode = lambda self, config_name, overrides: mode
    try:
        hydra_app()
    except SystemExit as exc:
        return int(exc.code or 0) if isinstance(exc.code, int) else 1
    finally:
        sys.argv = saved
        if saved_get_mode is not None:
            Hydra.get_mode = saved_get_mode
    return 0


def _split_args(argv: list[str]) -> tuple[list[str], list[str]]:
    overrides, extra_dirs, skip = [], [], False
    for i, arg in enumerate(argv):
        if skip:
            skip = False
            continue
        if arg in ("--config-dir", "-cd"):
            extra_dirs.append(argv[i + 1])
            skip = True
        elif arg.startswith("--config-dir="):
            extra_dirs.append(arg.split("=", 1)[1])
        elif arg in ("--config-name", "-cn", "--config-path", "-cp"):
            raise ConfigError(f"{arg} is not supported by evenflag run; put your configs in --config-dir instead")
        elif not arg.startswith("-"):
            overrides.append(arg)
    return overrides, extra_dirs


def _search_path(extra_dirs: list[str]) -> list[str]:
    if not extra_dirs:
        return []
    for folder in extra_dirs:
        if not Path(folder).is_dir():
            raise ConfigError(f"--config-dir {folder}: no such folder; give the folder that holds your config groups "
                              "(e.g. a folder with detector/<name>.yaml)")
    return [f"hydra.searchpath=[{','.join('file://' + str(Path(d).resolve()) for d in extra_dirs)}]"]


def _free_keys(overrides: list[str]) -> list[str]:
    """``tags.owner=claims-team`` (the example in configs/config.yaml): tags are
    free-form, so a new tag is added (``++``) rather than refused as unknown."""
    return ["++" + o.lstrip("+") if o.lstrip("+").startswith("tags.") and "=" in o else o for o in overrides]


def _route_detector_name(overrides: list[str], extra_dirs: list[str]) -> list[str]:
    """``detector.name=<name>`` picks a detector by name, as DEVELOPERS.md says.

    Setting only the key would keep the default detector's other settings
    (isolation forest's ``n_estimators`` given to a plugin class). So, when no
    ``detector=`` option is given, a name with a yaml in the detector group
    becomes that option, and any other registered name (built-in or entry
    point) becomes the empty option ``by_name``, with the name and the
    command line's ``detector.*`` settings forced in (``++``)."""
    parsed = _parse(overrides)
    keys = [item.get_key_element().lstrip("+~") for item in parsed]
    if "detector" in keys or "detector.name" not in keys:
        return overrides
    index = len(keys) - 1 - keys[::-1].index("detector.name")
    item = parsed[index]
    if item.is_sweep_override():
        raise ConfigError("detector.name=a,b cannot sweep detectors; sweep the config group instead: detector=a,b "
                          "(a registered name without a yaml: add configs/detector/<name>.yaml with 'name: <name>')")
    name = str(item.value())
    if name in _options("detector", extra_dirs):
        return [f"detector={name}" if i == index else o for i, o in enumerate(overrides)
                if i == index or keys[i] != "detector.name"]
    from evenflag.detectors.base import resolve_detector_class

    resolve_detector_class(name)  # unknown names stop here, with the list of registered ones
    out = ["detector=by_name"]
    for key, original in zip(keys, overrides):
        if key == "detector.name":
            continue
        out.append("++" + original.lstrip("+") if key.startswith("detector.") else original)
    return out + [f"++detector.name={name}"]


def _force_keys_of_swept_groups(argv: list[str], overrides: list[str], extra_dirs: list[str]) -> list[str]:
    """``detector=deep_svdd,autoencoder detector.epochs=2``: Hydra's sweeper first
    composes the non-sweep overrides onto the default detector, which has no
    ``epochs``, and stops. Every combination was composed and checked above
    with the override as written, so it is passed on as ``++detector.epochs=2``
    (set whether or not the default has the key)."""
    swept = {item.get_key_element().lstrip("+~") for item in _parse(overrides)
             if item.is_sweep_override() and _is_group(item.get_key_element(), extra_dirs)}
    out = []
    for arg in argv:
        key = arg.split("=", 1)[0]
        if "=" in arg and not key.startswith(("+", "~")) and key.split(".", 1)[0] in swept and "." in key:
            arg = "++" + arg
        out.append(arg)
    return out


def _parse(overrides: list[str]):
    from hydra.core.override_parser.overrides_parser import OverridesParser
    from hydra.errors import OverrideParseException

    try:
        return OverridesParser.create().parse_overrides(overrides)
    except OverrideParseException as exc:
        raise ConfigError(f"cannot read override: {str(exc).splitlines()[0]}") from exc


def _is_group(key: str, extra_dirs: list[str]) -> bool:
    key = key.lstrip("+~")
    if key.startswith("hydra/") or key.startswith("hydra."):
        return key.startswith("hydra/")
    return any((Path(folder) / key).is_dir() for folder in [config_dir(), *extra_dirs])


def _check_search(cfg: DictConfig) -> None:
    from hydra_plugins.evenflag_search.search_sweeper import SearchError, check_settings

    sweeper = cfg.hydra.sweeper
    try:
        check_settings(sweeper.n_trials, sweeper.batch_size, sweeper.sampler,
                       OmegaConf.to_container(sweeper.objectives) if sweeper.objectives is not None else None)
    except SearchError as exc:
        raise ConfigError(str(exc)) from exc


def _with_checked_sweeper(argv: list[str], cfg: DictConfig) -> list[str]:
    """A grid sweep runs on Hydra's basic sweeper without its second composition
    of every job (configs/hydra/sweeper/checked.yaml): every value was checked
    above. Chosen here, not in config.yaml, so that an experiment's own sweeper
    (the search) is never replaced."""
    target = str(OmegaConf.select(cfg, "hydra.sweeper._target_") or "")
    if target == "hydra._internal.core_plugins.basic_sweeper.BasicSweeper":
        return [*argv, "hydra/sweeper=checked"]
    return argv


def _is_search(cfg: DictConfig) -> bool:
    return str(OmegaConf.select(cfg, "hydra.sweeper._target_") or "").endswith(".SearchSweeper")


def _single_value_combinations(overrides: list[str], extra_dirs: list[str]):
    """Configs to compose so that every value is checked without composing the
    whole grid: the first value of every sweep, then each other value of each
    config-group sweep on its own. Other values of plain sweeps (seed=0,1,2)
    are returned to be merged into the first config, which is much cheaper."""
    parsed = _parse(overrides)
    base, sweeps, plain = [], [], []
    for original, item in zip(overrides, parsed):
        if item.is_sweep_override() and not item.is_discrete_sweep():
            continue  # interval(...) of a search: its ranges are checked by the search sweeper
        if item.is_sweep_override():
            key = item.get_key_element()
            values = [f"{key}={v}" for v in item.sweep_string_iterator()]
            if _is_group(key, extra_dirs):
                sweeps.append((len(base), values))
            else:
                plain += values[1:]
            base.append(values[0])
        else:
            base.append(original)
    combos = [base]
    for index, values in sweeps:
        for value in values[1:]:
            combo = list(base)
            combo[index] = value
            combos.append(combo)
    return combos, plain


def _check_plain_values(cfg: DictConfig, plain_values: list[str], deferred: list | None = None) -> None:
    """Each further value of a plain sweep (seed=0,1,abc) set into a copy of the
    first config, where the schema checks its type (``deferred``: see check_values)."""
    from omegaconf.errors import OmegaConfBaseException

    from evenflag.runner.config import RunConfig

    if not plain_values:
        return
    from evenflag.runner.config import check_values

    # One schema-checked copy, updated value by value: every value of a key is
    # checked in turn (merging a fresh copy per value cost ~0.1 s each).
    run = OmegaConf.merge(OmegaConf.structured(RunConfig), {k: cfg[k] for k in cfg if k != "hydra"})
    for item, text in zip(_parse(plain_values), plain_values):
        try:
            OmegaConf.update(run, item.key_or_group.lstrip("+~"), item.value(), merge=True)
        except (OmegaConfBaseException, ValueError) as exc:
            raise ConfigError(_composition_message(exc, [text], [])) from exc
        try:
            check_values(run, deferred, label=text)
        except ConfigError as exc:
            raise ConfigError(f"{text}: {exc}") from exc


def _detector_plan(overrides: list[str], cfg: DictConfig, total: int) -> dict[str, int]:
    """Jobs per detector option in a sweep (each swept option gets an equal share)."""
    swept = next((list(item.sweep_string_iterator()) for item in _parse(overrides)
                  if item.is_sweep_override() and item.get_key_element().lstrip("+~") == "detector"), None)
    params = OmegaConf.select(cfg, "hydra.sweeper.params") or {}
    if swept is None and "detector" in params:
        parsed = _parse([f"detector={params['detector']}"])[0]
        swept = list(parsed.sweep_string_iterator()) if parsed.is_sweep_override() else None
    if not swept:
        choice = OmegaConf.select(cfg, "hydra.runtime.choices.detector")
        return {str(choice): total}
    return {name: total // len(swept) for name in swept}


def _count_jobs(overrides: list[str], cfg: DictConfig) -> int:
    if _is_search(cfg):  # what is left of the search (a relaunch after a kill runs the rest)
        from hydra_plugins.evenflag_search.search_sweeper import trials_left

        return trials_left(cfg)
    total = 1
    seen = set()
    for item in _parse(overrides):
        if item.is_sweep_override():
            total *= len(list(item.sweep_string_iterator()))
            seen.add(item.get_key_element())
    params = OmegaConf.select(cfg, "hydra.sweeper.params") or {}
    for key, value in params.items():
        if key in seen:
            continue
        parsed = _parse([f"{key}={value}"])[0]
        total *= len(list(parsed.sweep_string_iterator())) if parsed.is_sweep_override() else 1
    return max(total, 1)


def _compose(overrides: list[str], extra_dirs: list[str], check: bool = True,
             deferred: list | None = None) -> DictConfig:
    from hydra import compose, initialize_config_dir
    from hydra.errors import HydraException, MissingConfigException
    from omegaconf.errors import OmegaConfBaseException

    search = _search_path(extra_dirs)
    try:
        with initialize_config_dir(config_dir=str(config_dir()), version_base="1.3"):
            cfg = compose("config", overrides=search + overrides, return_hydra_config=True)
    except MissingConfigException as exc:
        raise ConfigError(_missing_option_message(exc, extra_dirs)) from exc
    except (HydraException, OmegaConfBaseException) as exc:
        raise ConfigError(_composition_message(exc, overrides, extra_dirs)) from exc
    missing = sorted(OmegaConf.missing_keys(OmegaConf.masked_copy(cfg, [k for k in cfg if k != "hydra"])))
    if missing:
        raise ConfigError(f"required value(s) not set: {', '.join(missing)}; set them on the command line, "
                          f"e.g. {missing[0]}=...")
    if check:
        from evenflag.runner.config import check_values

        check_values(cfg, deferred)
    return cfg


def compose_run_config(overrides: list[str], extra_dirs: list[str] = ()) -> DictConfig:
    """One run's config, composed and checked as ``evenflag run`` does (for
    commands such as ``datasets show`` that read configs without running)."""
    extra_dirs = list(extra_dirs)
    os.environ[PLUGIN_DIRS_ENV] = os.pathsep.join(str(Path(d).resolve()) for d in extra_dirs)
    return _compose(_route_detector_name(_free_keys(list(overrides)), extra_dirs), extra_dirs)


def _options(group: str, extra_dirs: list[str]) -> list[str]:
    names = set()
    for folder in [config_dir(), *map(Path, extra_dirs)]:
        names.update(p.stem for p in (folder / group).glob("*.yaml"))
    return sorted(names)


def _missing_option_message(exc, extra_dirs) -> str:
    text = str(exc)
    import re

    match = re.search(r"Could not find '([\w/]+)/([^']+)'", text) or re.search(r"In '[^']*': Could not find '([\w/]+)/([^']+)'", text)
    if match:
        group, name = match.group(1), match.group(2)
        return f"unknown {group} '{name}'; valid names: {', '.join(_options(group, extra_dirs))}"
    return text.splitlines()[0]


def _composition_message(exc, overrides: list[str], extra_dirs: list[str]) -> str:
    import dataclasses
    import re

    from evenflag.runner.config import GROUP_SCHEMAS

    text = " ".join(f"{exc} {exc.__cause__ or ''}".split())
    key = re.search(r"full_key: ([\w.]+)", text)
    unknown = re.search(r"Key '(\w+)' not in '(\w+)'", text) or re.search(r"Could not override '([\w.]+)'", text)
    if unknown:
        where = key.group(1) if key else unknown.group(1)
        group = where.split(".")[0]
        if where.startswith("detector.params."):
            return f"'{where}' is not in the yaml; add an estimator argument with a leading +: +{where}=..."
        if group == "detector":
            return f"unknown setting '{where}'; {_detector_settings(overrides, extra_dirs)}"
        schema = GROUP_SCHEMAS.get(group)
        allowed = [f.name for f in dataclasses.fields(schema)] if schema else []
        if not allowed:
            from evenflag.runner.config import RunConfig

            allowed = [f.name for f in dataclasses.fields(RunConfig)]
            return f"unknown setting '{where}'; top-level settings: {', '.join(allowed)}"
        return f"unknown setting '{where}'; allowed settings of {group}: {', '.join(allowed)}"
    wrong = re.search(r"Value '([^']*)' (?:of type '[\w.]+' )?could not be converted to (\w+)", text)
    if wrong:
        where = key.group(1) if key else "a setting"
        return f"{where}: '{wrong.group(1)}' is not a valid {wrong.group(2).lower()}"
    return text[:300]


def _detector_settings(overrides: list[str], extra_dirs: list[str]) -> str:
    """The settings the chosen detector class accepts, for an error message."""
    import inspect

    from evenflag.detectors.base import resolve_detector_class

    kept = [o for o in overrides if not o.lstrip("+~").startswith("detector.")]
    try:
        cfg = _compose(kept, extra_dirs)
        cls = resolve_detector_class(cfg.detector.get("_target_") or cfg.detector.get("name"))
    except EvenflagError:
        return "see configs/detector/ for each detector's settings"
    names = [p for p in inspect.signature(cls.__init__).parameters if p not in ("self", "seed")]
    return f"{cls.__name__} accepts: {', '.join(names)}"


def format_exception(exc: BaseException) -> str:
    """One line for the run's error tag: our messages as they are, others with their type."""
    if isinstance(exc, EvenflagError):
        return str(exc)
    where = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
    place = f" (at {Path(where.filename).name}:{where.lineno})" if where else ""
    return f"{type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}{place}"
