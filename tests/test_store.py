"""The tracking store under kills, concurrent launches and code changes: real
processes, a real SQLite store, real signals."""

import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time

import numpy as np
import pytest

from tests.runner_helpers import REPO, SMALL, client_for, evenflag, runs_of

DB = ("outputs", "tracking", "mlflow.db")


def _start(cwd, *args, env=None):
    """`evenflag ...` as its own process group (so a kill reaches its workers too)."""
    environment = {**os.environ, "PYTHONPATH": str(REPO), **(env or {})}
    return subprocess.Popen([sys.executable, "-m", "evenflag.cli", *args], cwd=cwd, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=environment, start_new_session=True)


def _status_by_cell(cwd, study):
    """{seed: [statuses]} of the study's runs (deleted runs are not listed by MLflow)."""
    out = {}
    for run in runs_of(client_for(cwd), study):
        out.setdefault(run.data.params.get("seed"), []).append(run.info.status)
    return out


def _wait_for(condition, timeout, step=0.05):
    deadline = time.time() + timeout
    while time.time() < deadline:
        if condition():
            return True
        time.sleep(step)
    return False


# ---------------------------------------------------------------- store creation
@pytest.mark.slow
def test_kill_during_store_creation_never_breaks_the_store(tmp_path):
    # kill -9 of the whole launch at 10 moments spread over the creation of a new
    # store (from the moment its folder appears), then the same launch again.
    # Two trials at a time (one per core), each in its own folder.
    from concurrent.futures import ThreadPoolExecutor

    sweep = ["run", "-m", *SMALL, "study=kc", "seed=0"]

    def trial(number, delay):
        cwd = tmp_path / f"trial{number}"
        cwd.mkdir()
        process = _start(cwd, *sweep)
        folder = cwd / "outputs" / "tracking"
        assert _wait_for(lambda: folder.exists() or process.poll() is not None, 60)
        time.sleep(delay)
        os.killpg(process.pid, signal.SIGKILL)
        process.wait()
        again = evenflag(cwd, *sweep)
        assert again.returncode == 0, (delay, again.stdout[-2000:], again.stderr[-2000:])
        assert len(again.stderr.strip().splitlines()) <= 1, again.stderr  # at most one warning line
        assert _status_by_cell(cwd, "kc") == {"0": ["FINISHED"]}, delay
        assert not list(folder.glob(".mlflow.db.creating-*"))

    with ThreadPoolExecutor(max_workers=2) as pool:
        for done in [pool.submit(trial, i, d) for i, d in enumerate(np.linspace(0.0, 2.7, 10))]:
            done.result()


LAUNCHERS = {"basic": [], "parallel": ["hydra/launcher=parallel"]}  # the parallel one prepares the store in a worker


@pytest.mark.slow
@pytest.mark.parametrize("launcher", list(LAUNCHERS))
def test_three_launches_at_once_on_a_new_store(tmp_path, launcher):
    sweep = ["run", "-m", *LAUNCHERS[launcher], *SMALL, "study=race", "seed=0,1,2,3"]
    processes = [_start(tmp_path, *sweep) for _ in range(3)]
    results = [(p.wait(timeout=600), p.stdout.read(), p.stderr.read()) for p in processes]
    for code, stdout, stderr in results:
        assert code == 0, stdout[-2000:] + stderr[-2000:]
        assert "Traceback" not in stderr
    assert _status_by_cell(tmp_path, "race") == {s: ["FINISHED"] for s in "0123"}
    done = sum(int(stdout.split(" done,")[0].rsplit(" ", 1)[-1]) for _, stdout, _ in results)
    assert done == 4  # every cell computed once over the three launches


@pytest.mark.slow
def test_overlapping_sweeps_run_each_cell_once(tmp_path):
    first = _start(tmp_path, "run", "-m", *SMALL, "study=overlap", "seed=0,1,2,3")
    second = _start(tmp_path, "run", "-m", *SMALL, "study=overlap", "seed=2,3,4,5")
    for process in (first, second):
        assert process.wait(timeout=600) == 0, process.stderr.read()[-2000:]
    assert _status_by_cell(tmp_path, "overlap") == {s: ["FINISHED"] for s in "012345"}


def test_rerun_replaces_and_the_older_run_is_marked_superseded(tmp_path):
    assert evenflag(tmp_path, "run", *SMALL, "study=re", "seed=0").returncode == 0
    assert evenflag(tmp_path, "run", *SMALL, "study=re", "seed=0", "rerun=true").returncode == 0
    runs = sorted(runs_of(client_for(tmp_path), "re"), key=lambda r: r.info.start_time)
    assert [r.info.status for r in runs] == ["FINISHED", "FINISHED"]
    assert runs[0].data.tags["evenflag.superseded_by"] == runs[1].info.run_id
    assert "evenflag.superseded_by" not in runs[1].data.tags


# ---------------------------------------------------------------- interrupted launches
def _slow_sweep(study, *launcher):
    # Deep SVDD with enough epochs that a run is in progress when the signal comes.
    return ["run", "-m", *launcher, *SMALL, f"study={study}", "detector=deep_svdd", "detector.epochs=400",
            "detector.hidden=[16]", "seed=0,1"]


@pytest.mark.slow
@pytest.mark.parametrize("launcher", list(LAUNCHERS))
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_interrupt_leaves_no_running_run(tmp_path, signum, launcher):
    process = _start(tmp_path, *_slow_sweep("stop", *LAUNCHERS[launcher]))
    assert _wait_for(lambda: (tmp_path / "outputs" / "tracking" / "mlflow.db").exists(), 60)
    assert _wait_for(lambda: any(s == "RUNNING" for v in _status_by_cell(tmp_path, "stop").values() for s in v),
                     120, step=0.5)
    process.send_signal(signum)  # to the launcher only, as a terminal or a scheduler would
    out, err = process.communicate(timeout=60)
    assert process.returncode != 0, err[-3000:]
    runs = runs_of(client_for(tmp_path), "stop")
    assert runs and all(r.info.status != "RUNNING" for r in runs)
    killed = [r for r in runs if r.info.status == "KILLED"]
    assert killed and all(("SIGINT" if signum == signal.SIGINT else "SIGTERM") in r.data.tags["evenflag.error"]
                          or "stopped" in r.data.tags["evenflag.error"] for r in killed)


@pytest.mark.slow
def test_ctrl_c_dropped_by_a_finaliser_still_ends_the_launch(tmp_path):
    """Python drops a KeyboardInterrupt raised inside __del__ (Python data model,
    object.__del__). The detector here spends its fit inside finalisers, so
    Ctrl-C almost surely lands there; the launch must still end (exit 130), its
    run KILLED, and the second cell never start."""
    process = _start(tmp_path, "run", "-m", "--config-dir", str(REPO / "tests" / "configs"), *SMALL,
                     "study=dropped", "detector=fits_in_finalisers", "seed=0,1")
    assert _wait_for(lambda: (tmp_path / "outputs" / "tracking" / "mlflow.db").exists(), 60)
    assert _wait_for(lambda: any(s == "RUNNING" for v in _status_by_cell(tmp_path, "dropped").values() for s in v),
                     120, step=0.5)
    time.sleep(1)  # inside the fit
    process.send_signal(signal.SIGINT)
    out, err = process.communicate(timeout=60)
    assert process.returncode == 130, err[-2000:]
    runs = runs_of(client_for(tmp_path), "dropped")
    assert len(runs) == 1 and runs[0].info.status == "KILLED", [(r.info.status, r.data.tags) for r in runs]
    assert "SIGINT" in runs[0].data.tags["evenflag.error"]


@pytest.mark.slow
def test_workers_die_with_their_launcher(tmp_path):
    # kill -9 of the parallel launcher's parent only: its workers notice within
    # seconds, end their runs as KILLED and exit; a relaunch runs each cell once.
    sweep = ["run", "-m", "hydra/launcher=parallel", *SMALL, "study=orphans", "detector=deep_svdd",
             "detector.epochs=400", "detector.hidden=[16]", "seed=0,1"]
    process = _start(tmp_path, *sweep)
    assert _wait_for(lambda: sum(s == "RUNNING" for v in _status_by_cell(tmp_path, "orphans").values() for s in v) >= 1
                     if (tmp_path / "outputs" / "tracking" / "mlflow.db").exists() else False, 180, step=0.5)
    process.kill()  # the parent only; the workers stay in the process group
    process.wait()
    def alive_workers():
        result = subprocess.run(["pgrep", "-g", str(process.pid)], capture_output=True, text=True)
        return [p for p in result.stdout.split() if p != str(process.pid)]
    assert _wait_for(lambda: not alive_workers(), 30, step=0.5), alive_workers()
    statuses = [s for v in _status_by_cell(tmp_path, "orphans").values() for s in v]
    assert "RUNNING" not in statuses and "KILLED" in statuses
    relaunch = evenflag(tmp_path, "run", "-m", *SMALL, "study=orphans", "detector=deep_svdd", "detector.epochs=2",
                        "detector.hidden=[16]", "seed=0,1")
    assert relaunch.returncode == 0, relaunch.stderr
    finished = [r for r in runs_of(client_for(tmp_path), "orphans") if r.info.status == "FINISHED"]
    assert sorted(r.data.params["seed"] for r in finished) == ["0", "1"]


def test_dead_runs_are_closed_whatever_host_and_process_id_they_had(tmp_path):
    from mlflow.tracking import MlflowClient

    from evenflag.runner.lease import process_start

    assert evenflag(tmp_path, "run", *SMALL, "study=lease", "seed=0").returncode == 0
    client = MlflowClient(tracking_uri=f"sqlite:///{tmp_path.joinpath(*DB)}")
    experiment = client.get_experiment_by_name("lease").experiment_id
    # A run left by a container that no longer exists: another host, an old heartbeat,
    # and a process id that happens to be alive here (this test's own), which must not matter.
    elsewhere = client.create_run(experiment, tags={"evenflag.host": "node-that-died", "evenflag.pid": str(os.getpid()),
                                                    "evenflag.heartbeat": f"{time.time() - 3600:.0f}"})
    # Same host, a fresh heartbeat, a live process id, but that process started at
    # another time than the one recorded: the id was reused by another process.
    wrong_start = str(int(process_start(os.getpid()) or 0) + 12345)
    reused = client.create_run(experiment, tags={"evenflag.host": socket.gethostname(), "evenflag.pid": str(os.getpid()),
                                                 "evenflag.pid_start": wrong_start,
                                                 "evenflag.heartbeat": f"{time.time():.0f}"})
    # A live one (this process, its true start time, a fresh heartbeat) is left alone.
    alive = client.create_run(experiment, tags={"evenflag.host": socket.gethostname(), "evenflag.pid": str(os.getpid()),
                                                "evenflag.pid_start": process_start(os.getpid()),
                                                "evenflag.heartbeat": f"{time.time() + 600:.0f}"})
    result = evenflag(tmp_path, "run", *SMALL, "study=lease", "seed=1")
    assert result.returncode == 0 and "marked 2 run(s)" in result.stdout, result.stdout
    closed = client.get_run(elsewhere.info.run_id)
    assert closed.info.status == "KILLED" and "no heartbeat" in closed.data.tags["evenflag.error"]
    closed = client.get_run(reused.info.run_id)
    assert closed.info.status == "KILLED" and "is gone" in closed.data.tags["evenflag.error"]
    assert client.get_run(alive.info.run_id).info.status == "RUNNING"


# ---------------------------------------------------------------- what a fingerprint must see
def test_an_edited_plugin_is_not_reused(tmp_path):
    plugin = tmp_path / "plugin_pkg"
    plugin.mkdir()
    source = (REPO / "tests" / "plugins" / "covariance_distance.py").read_text()
    (plugin / "__init__.py").write_text("")
    (plugin / "mine.py").write_text(source)
    configs = tmp_path / "configs" / "detector"
    configs.mkdir(parents=True)
    (configs / "mine.yaml").write_text("_target_: plugin_pkg.mine.CovarianceDistanceDetector\nshrinkage: 0.1\n")
    env = {"PYTHONPATH": f"{REPO}:{tmp_path}"}
    args = ["run", "--config-dir", str(tmp_path / "configs"), *SMALL, "study=edit", "detector=mine"]
    first = evenflag(tmp_path, *args, env=env)
    assert first.returncode == 0 and "1 done" in first.stdout, first.stdout + first.stderr
    (plugin / "mine.py").write_text(source.replace("return np.einsum", "return -np.einsum"))
    second = evenflag(tmp_path, *args, env=env)
    assert second.returncode == 0 and "1 done" in second.stdout, second.stdout  # not "skipped"
    aurocs = sorted(r.data.metrics["auroc"] for r in runs_of(client_for(tmp_path), "edit"))
    assert aurocs[0] == pytest.approx(1 - aurocs[1], abs=1e-9)  # the edit reversed the ranking


def test_an_uncommitted_edit_of_evenflag_changes_the_code_version(tmp_path):
    import shutil

    copy = tmp_path / "src"
    shutil.copytree(REPO / "src" / "evenflag", copy / "evenflag", ignore=shutil.ignore_patterns("__pycache__"))
    probe = "from evenflag.runner.provenance import code_version; print(code_version())"
    version = lambda: subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True,  # noqa: E731
                                     env={**os.environ, "PYTHONPATH": str(copy)}, cwd=tmp_path).stdout.strip()
    before = version()
    target = copy / "evenflag" / "metrics" / "detection.py"
    target.write_text(target.read_text() + "\n# an uncommitted edit\n")
    assert version() != before and before


def test_parse_options_key_the_cache_and_the_fingerprint(private_cache):
    from evenflag.data.registry import forget_loaded, get_spec, load_dataset

    plain = load_dataset("german_credit")
    spec = get_spec("german_credit")
    spec.na_values = ["none"]  # 'none' is a real category of this dataset's 'other_parties' column
    forget_loaded()
    with_na = load_dataset(spec)
    forget_loaded()
    again = load_dataset("german_credit")  # a fresh process would read the cache filled above
    assert plain.sha256 == with_na.sha256  # same bytes
    assert with_na.table_sha256 != plain.table_sha256  # different parsed table
    assert again.table_sha256 == plain.table_sha256
    assert again.features.equals(plain.features)
    assert len(list((private_cache / "parsed").glob("german_credit-*.parquet"))) == 2


# ---------------------------------------------------------------- one line, store untouched
def test_unreachable_tracking_server_fails_fast(tmp_path):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]  # closed once the block ends: nothing listens there
    started = time.time()
    result = evenflag(tmp_path, "run", *SMALL, "tracking=server", f"tracking.uri=http://127.0.0.1:{port}")
    assert time.time() - started < 15
    assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1, result.stderr
    assert f"http://127.0.0.1:{port} did not answer" in result.stderr
    started = time.time()
    report = evenflag(tmp_path, "report", "--study", "x", "--tracking-uri", f"http://127.0.0.1:{port}")
    assert time.time() - started < 15
    assert report.returncode == 2 and len(report.stderr.strip().splitlines()) == 1, report.stderr


@pytest.mark.parametrize("launcher", list(LAUNCHERS))
@pytest.mark.parametrize("content", [b"this is not a database" * 50, "truncated"])
def test_damaged_store_is_one_line_and_left_untouched(tmp_path, content, launcher):
    db = tmp_path.joinpath(*DB)
    if content == "truncated":
        assert evenflag(tmp_path, "run", *SMALL, "study=t").returncode == 0
        content = db.read_bytes()[: db.stat().st_size // 3]
    db.parent.mkdir(parents=True, exist_ok=True)
    db.write_bytes(content)
    # On the parallel launcher a worker opens the store.
    run = ("run", *SMALL, "study=t") if launcher == "basic" else ("run", "-m", *LAUNCHERS[launcher], *SMALL,
                                                                  "study=t", "seed=0,1")
    for args, fix in ((run, "move it aside"), (("report", "--study", "t"), "restore")):
        result = evenflag(tmp_path, *args)
        assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1, result.stderr
        assert "not a readable tracking store" in result.stderr and fix in result.stderr, result.stderr
        assert db.read_bytes() == content


def test_half_created_store_without_runs_is_rebuilt(tmp_path):
    db = tmp_path.joinpath(*DB)
    db.parent.mkdir(parents=True)
    with sqlite3.connect(db) as connection:  # what an interrupted migration leaves: some tables, no version
        connection.execute("CREATE TABLE experiments (experiment_id INTEGER PRIMARY KEY, name TEXT)")
    result = evenflag(tmp_path, "run", *SMALL, "study=half")
    assert result.returncode == 0, result.stderr
    assert "half-created" in result.stderr and len(result.stderr.strip().splitlines()) == 1
    assert list(db.parent.glob("mlflow.db.incomplete-*"))
    assert _status_by_cell(tmp_path, "half") == {"0": ["FINISHED"]}


def test_empty_store_file_is_a_warning_not_silence(tmp_path):
    db = tmp_path.joinpath(*DB)
    db.parent.mkdir(parents=True)
    db.write_bytes(b"")
    result = evenflag(tmp_path, "run", *SMALL, "study=empty")
    assert result.returncode == 0 and "empty file (0 bytes)" in result.stderr


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes to read-only folders; the check cannot fail here")
def test_read_only_store_folder_is_one_line(tmp_path):
    folder = tmp_path.joinpath(*DB).parent
    folder.mkdir(parents=True)
    folder.chmod(0o555)
    try:
        result = evenflag(tmp_path, "run", *SMALL, "study=ro")
        assert result.returncode == 2 and "is not writable" in result.stderr
    finally:
        folder.chmod(0o755)


@pytest.mark.parametrize("args, expected", [
    (["study="], "study is empty"),
    (["-m", "hydra/launcher=parallel", "study=", "seed=0,1"], "study is empty"),  # raised in a worker
    (["tracking.uri=foo://bar"], "tracking.uri 'foo://bar' is not supported"),
    (["-m", "hydra/launcher=parallel", "hydra.launcher.n_jobs=0", "seed=0,1"], "hydra.launcher.n_jobs=0 is invalid"),
])
def test_store_settings_give_one_line(tmp_path, args, expected):
    result = evenflag(tmp_path, "run", *SMALL, *args)
    assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1, result.stderr
    assert expected in result.stderr


def test_stale_ledgers_of_killed_launches_are_removed(tmp_path):
    ledgers = tmp_path / "outputs" / ".ledgers"
    ledgers.mkdir(parents=True)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = ledgers / f"20260101-000000-{dead.stdout.strip()}.jsonl"
    stale.write_text('{"status": "done"}\n')
    assert evenflag(tmp_path, "run", *SMALL, "study=ledger").returncode == 0
    assert not stale.exists() and not list(ledgers.glob("*.jsonl"))


def test_detector_module_with_a_syntax_error_is_one_line(tmp_path):
    package = tmp_path / "broken_pkg"
    package.mkdir()
    (package / "__init__.py").write_text("")
    (package / "bad.py").write_text("def broken(:\n")
    configs = tmp_path / "configs" / "detector"
    configs.mkdir(parents=True)
    (configs / "bad.yaml").write_text("_target_: broken_pkg.bad.Thing\n")
    env = {"PYTHONPATH": f"{REPO}:{tmp_path}"}
    for args in (["run", "--config-dir", str(tmp_path / "configs"), *SMALL, "detector=bad"],
                 ["check-detector", "broken_pkg.bad:Thing"]):
        result = evenflag(tmp_path, *args, env=env)
        assert result.returncode == 2 and len(result.stderr.strip().splitlines()) == 1, result.stderr
        assert "syntax error at" in result.stderr and "bad.py:1" in result.stderr


def test_bundled_data_needs_no_writable_cache(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("")  # a cache folder below a file can never be created, even by root
    result = evenflag(tmp_path, "run", "dataset=german_credit", "metrics=quick", "study=nocache",
                      env={"EVENFLAG_CACHE_DIR": str(blocker / "cache")})
    assert result.returncode == 0, result.stderr
    assert "cannot be written" in result.stderr and len(result.stderr.strip().splitlines()) == 1
