"""A sweep spread over a real Ray cluster lands once, with artifacts, in one
MLflow server's store: a Ray head started on 127.0.0.1 with two worker CPUs
(attached to by address, not Ray's in-process local mode) and an MLflow server
on a free loopback port, backed by SQLite and by PostgreSQL."""

import glob
import os
import secrets
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from tests.runner_helpers import REPO, SMALL, free_port, runs_of, start_mlflow_server

pytestmark = pytest.mark.slow

RAY = shutil.which("ray", path=str(Path(sys.executable).parent))
RAY_MISSING = "Ray is not installed in this environment (scripts/setup.sh installs it: pip install ray)"


def _wait_for(check, what, seconds, process=None):
    deadline = time.time() + seconds
    while True:
        try:
            if check():
                return
        except Exception:
            pass
        if time.time() > deadline or (process is not None and process.poll() is not None):
            pytest.fail(f"{what} did not come up within {seconds} s")
        time.sleep(0.5)


def _stop_group(process, grace: float = 30):
    if process.poll() is None:
        os.killpg(process.pid, signal.SIGTERM)
        try:
            process.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout=30)


@pytest.fixture(scope="module")
def ray_head():
    if RAY is None:
        pytest.skip(RAY_MISSING)
    port = free_port()
    # Ray's socket paths must stay short: a folder directly under /tmp.
    temp = tempfile.mkdtemp(prefix="evf-ray-", dir="/tmp")
    # A token of the test's own (as a secured cluster has), so ~/.ray/auth_token plays no part.
    env = {**os.environ, "RAY_USAGE_STATS_ENABLED": "0", "RAY_AUTH_MODE": "token",
           "RAY_AUTH_TOKEN": secrets.token_hex(32)}
    head = subprocess.Popen([RAY, "start", "--head", "--block", "--node-ip-address=127.0.0.1", f"--port={port}",
                             "--num-cpus=2", "--include-dashboard=false", "--disable-usage-stats",
                             f"--temp-dir={temp}"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
                            start_new_session=True)
    address = f"127.0.0.1:{port}"
    try:
        _wait_for(lambda: subprocess.run([RAY, "status", f"--address={address}"], capture_output=True, env=env,
                                         timeout=30).returncode == 0, "the Ray head", 120, head)
        yield address, env
    finally:
        # `ray start --block` outlives SIGTERM (the 30 s wait always ran out and
        # the group was killed anyway), so the head gets a short grace only.
        _stop_group(head, grace=5)
        shutil.rmtree(temp, ignore_errors=True)


def _find_postgres_bin() -> Path | None:
    initdb = shutil.which("initdb") or next(iter(sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))[-1:]), None)
    return Path(initdb).resolve().parent if initdb else None  # Debian links only some tools onto PATH


@pytest.fixture
def postgres_uri(tmp_path):
    """A PostgreSQL server on a free loopback port, in a scratch folder, with trust auth."""
    bin_dir = _find_postgres_bin()
    if bin_dir is None:
        pytest.skip("PostgreSQL is not installed (Debian: apt-get install postgresql; .ci/run installs it)")
    pytest.importorskip("psycopg", reason="psycopg (SQLAlchemy's PostgreSQL driver) is not installed; scripts/setup.sh installs it")
    folder = Path(tempfile.mkdtemp(prefix="evf-pg-", dir="/tmp"))
    data, port = folder / "data", free_port()
    # initdb refuses to run as root: run the server as the postgres user then.
    as_user = ["runuser", "-u", "postgres", "--"] if os.geteuid() == 0 else []
    if as_user:
        shutil.chown(folder, "postgres")
    subprocess.run([*as_user, str(bin_dir / "initdb"), "-D", str(data), "-A", "trust", "-U", "evenflag"],
                   check=True, capture_output=True)
    subprocess.run([*as_user, str(bin_dir / "pg_ctl"), "-D", str(data), "-w", "-l", str(folder / "log"),
                    "-o", f"-p {port} -k {folder} -c listen_addresses=127.0.0.1", "start"], check=True,
                   capture_output=True)
    try:
        subprocess.run([*as_user, str(bin_dir / "createdb"), "-h", "127.0.0.1", "-p", str(port), "-U", "evenflag",
                        "mlflow"], check=True, capture_output=True)
        yield f"postgresql://evenflag@127.0.0.1:{port}/mlflow"
    finally:
        subprocess.run([*as_user, str(bin_dir / "pg_ctl"), "-D", str(data), "-m", "immediate", "stop"],
                       capture_output=True)
        shutil.rmtree(folder, ignore_errors=True)


@pytest.mark.parametrize("database", ["sqlite", "postgresql"])
def test_sweep_on_a_ray_cluster_lands_once_in_the_servers_store(tmp_path, ray_head, database, request):
    from mlflow.tracking import MlflowClient

    backend = (f"sqlite:///{tmp_path / 'server.db'}" if database == "sqlite"
               else request.getfixturevalue("postgres_uri"))
    address, ray_env = ray_head
    server, uri = start_mlflow_server(backend, "--artifacts-destination", str(tmp_path / "server-artifacts"))
    try:
        launch = subprocess.Popen(
            [sys.executable, "-m", "evenflag.cli", "run", "-m", "hydra/launcher=ray",
             f"hydra.launcher.address={address}", "tracking=server", f"tracking.uri={uri}", *SMALL, "study=on_ray",
             "seed=0,1,2,3,4,5"],
            cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
            env={**ray_env, "PYTHONPATH": str(REPO)})
        out, err = launch.communicate(timeout=600)
        assert launch.returncode == 0, err[-3000:] + out[-3000:]
        assert "6 done, 0 skipped (already finished), 0 failed, of 6" in out + err

        client = MlflowClient(tracking_uri=uri)
        runs = runs_of(client, "on_ray")
        assert len(runs) == 6 and {r.info.status for r in runs} == {"FINISHED"}
        assert sorted(r.data.params["seed"] for r in runs) == ["0", "1", "2", "3", "4", "5"]  # each once
        pids = {r.data.tags["evenflag.pid"] for r in runs}
        assert str(launch.pid) not in pids and len(pids) >= 2  # ran in the cluster's worker processes, side by side
        for run in runs:
            names = {a.path for a in client.list_artifacts(run.info.run_id)}
            assert {"scores.parquet", "config.yaml"} <= names, names
            assert "auroc" in run.data.metrics
        # The artifacts went through the server into its own folder, not the launch folder.
        assert list((tmp_path / "server-artifacts").rglob("scores.parquet"))
        assert not (tmp_path / "outputs" / "tracking").exists()
    finally:
        _stop_group(server)


def test_sigterm_cancels_the_jobs_on_the_cluster(tmp_path, ray_head):
    """SIGTERM of a launch on a Ray cluster ends it with 143, its running runs
    KILLED, and no job of it starts or runs on afterwards."""
    from tests.runner_helpers import client_for

    address, ray_env = ray_head
    slow = ["detector=deep_svdd", "detector.epochs=5000", "dataset=synthetic_claims", "metrics=quick"]
    launch = subprocess.Popen(
        [sys.executable, "-m", "evenflag.cli", "run", "-m", "hydra/launcher=ray", f"hydra.launcher.address={address}",
         *slow, "study=stopped", "seed=0,1,2,3"],
        cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        env={**ray_env, "PYTHONPATH": str(REPO)})
    store = tmp_path / "outputs" / "tracking" / "mlflow.db"
    _wait_for(lambda: store.exists() and sum(r.info.status == "RUNNING" for r in runs_of(client_for(tmp_path),
                                                                                         "stopped")) == 2,
              "two running jobs", 180, launch)
    launch.send_signal(signal.SIGTERM)
    out, err = launch.communicate(timeout=120)
    assert launch.returncode == 143, err[-3000:]
    time.sleep(5)  # a job that ran on would write its run within this
    runs = runs_of(client_for(tmp_path), "stopped")
    assert len(runs) == 2 and {r.info.status for r in runs} == {"KILLED"}, [(r.info.status, r.data.tags) for r in runs]


def test_a_dead_ray_address_fails_fast_in_one_line(tmp_path):
    if RAY is None:
        pytest.skip(RAY_MISSING)
    from tests.runner_helpers import evenflag

    started = time.time()
    result = evenflag(tmp_path, "run", "-m", "hydra/launcher=ray", f"hydra.launcher.address=127.0.0.1:{free_port()}",
                      *SMALL, "seed=0,1")
    assert result.returncode == 2 and time.time() - started < 60
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "no Ray head answers there" in lines[0], result.stderr
    assert not (tmp_path / "outputs").exists()
