"""The runner end to end: real Hydra multiruns, a real MLflow store, real launchers."""

import os
import socket
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from tests.runner_helpers import REPO, SMALL, client_for, evenflag, runs_of, start_mlflow_server


@pytest.fixture(scope="module")
def sweep(tmp_path_factory):
    """One 2 detectors x 2 seeds sweep, shared by the read-back tests."""
    cwd = tmp_path_factory.mktemp("sweep")
    result = evenflag(cwd, "run", "-m", *SMALL, "study=grid", "seed=0,1",
                      "detector=isolation_forest,local_outlier_factor")
    assert result.returncode == 0, result.stderr + result.stdout
    return cwd, result


def test_sweep_records_every_run(sweep):
    cwd, result = sweep
    client = client_for(cwd)
    runs = runs_of(client, "grid")
    assert len(runs) == 4 and {r.info.status for r in runs} == {"FINISHED"}
    assert "4 done, 0 skipped" in result.stdout and "mlflow ui --backend-store-uri sqlite:///" in result.stdout
    run = runs[0]
    for key in ("auroc", "average_precision", "flag_rate_ratio", "flag_rate_gap", "false_flag_gap", "hit_rate_gap",
                "score_distance", "score_ks", "flag_rate/coast", "flag_rate/inland"):
        assert key in run.data.metrics, key
    assert run.data.params["dataset.name"] == "synthetic_claims"
    assert run.data.params["protocol.kind"] == "one_class"
    tags = run.data.tags
    for tag in ("fingerprint", "data_sha256", "git_commit", "git_dirty", "version.python", "version.numpy",
                "version.torch", "version.scikit-learn", "version.evenflag"):
        assert tags.get(f"evenflag.{tag}"), tag
    assert tags["evenflag.status"] == "finished"
    assert {r.data.tags["evenflag.fingerprint"] for r in runs}.__len__() == 4


def test_sweep_artifacts_hold_scores_and_config(sweep):
    cwd, _ = sweep
    client = client_for(cwd)
    run = runs_of(client, "grid")[0]
    names = {a.path for a in client.list_artifacts(run.info.run_id)}
    assert names == {"config.yaml", "scores.parquet"}
    # Stored once: in the store's artifact root, not also in the job's output folder.
    stored = list((cwd / "outputs").rglob("scores.parquet"))
    assert len(stored) == len(runs_of(client, "grid")) and all("tracking" in p.parts for p in stored)
    local = client.download_artifacts(run.info.run_id, "scores.parquet", str(cwd))
    scores = pd.read_parquet(local)
    assert list(scores.columns) == ["row_id", "label", "group", "score", "flag"]
    assert scores["row_id"].is_unique and set(scores["group"]) == {"coast", "inland"}
    # The logged metrics are the metrics of these very rows.
    from sklearn.metrics import roc_auc_score  # reference library
    assert run.data.metrics["auroc"] == pytest.approx(roc_auc_score(scores["label"], scores["score"]))


def test_relaunch_skips_finished_runs(sweep):
    cwd, _ = sweep
    folders = set((cwd / "outputs" / "sweeps" / "grid").iterdir())
    result = evenflag(cwd, "run", "-m", *SMALL, "study=grid", "seed=0,1", "detector=isolation_forest,local_outlier_factor")
    assert result.returncode == 0
    assert "0 done, 4 skipped" in result.stdout
    assert len(runs_of(client_for(cwd), "grid")) == 4
    assert set((cwd / "outputs" / "sweeps" / "grid").iterdir()) == folders  # no new folder when nothing ran
    assert "[HYDRA]" not in result.stdout + result.stderr  # one progress line per job, evenflag's own


def test_an_all_skipped_relaunch_keeps_the_folders_of_a_launch_beside_it(sweep):
    """A folder another launch creates while an all-skipped relaunch runs (same
    directory, same study) must survive: only the relaunch's own folder goes."""
    cwd, _ = sweep
    ledgers = cwd / "outputs" / ".ledgers"
    relaunch = subprocess.Popen([sys.executable, "-m", "evenflag.cli", "run", "-m", *SMALL, "study=grid", "seed=0,1",
                                 "detector=isolation_forest,local_outlier_factor"], cwd=cwd, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": str(REPO)})
    deadline = time.time() + 120
    while not list(ledgers.glob("*.jsonl")) and time.time() < deadline and relaunch.poll() is None:
        time.sleep(0.01)  # the relaunch has recorded its first job
    beside = cwd / "outputs" / "sweeps" / "grid" / "another-launch"
    beside.mkdir()
    out, err = relaunch.communicate(timeout=300)
    assert relaunch.returncode == 0 and "0 done, 4 skipped" in out, out + err
    assert beside.is_dir()
    beside.rmdir()


def test_rerun_forces_and_scores_are_deterministic(sweep):
    cwd, _ = sweep
    result = evenflag(cwd, "run", *SMALL, "study=grid", "seed=0", "detector=isolation_forest", "rerun=true")
    assert result.returncode == 0 and "1 done" in result.stdout
    client = client_for(cwd)
    runs = [r for r in runs_of(client, "grid") if r.data.params["seed"] == "0"
            and r.data.params["detector.name"] == "isolation_forest"]
    assert len(runs) == 2
    frames = [pd.read_parquet(client.download_artifacts(r.info.run_id, "scores.parquet", str(cwd / r.info.run_id)))
              for r in runs]
    pd.testing.assert_frame_equal(frames[0], frames[1])


def test_failing_cell_is_isolated(tmp_path):
    result = evenflag(tmp_path, "run", "-m", "--config-dir", str(REPO / "tests" / "configs"), *SMALL, "study=failing",
                      "detector=fails_on_odd_seed", "seed=0,1,2")
    assert result.returncode == 1
    assert "2 done, 0 skipped (already finished), 1 failed" in result.stdout
    assert "deliberate failure for seed 1" in result.stdout
    runs = runs_of(client_for(tmp_path), "failing")
    status = {r.data.params["seed"]: r.info.status for r in runs}
    assert status == {"0": "FINISHED", "1": "FAILED", "2": "FINISHED"}
    failed = next(r for r in runs if r.info.status == "FAILED")
    assert "RuntimeError: deliberate failure for seed 1" in failed.data.tags["evenflag.error"]
    # A relaunch runs only what is missing: the failed cell.
    again = evenflag(tmp_path, "run", "-m", "--config-dir", str(REPO / "tests" / "configs"), *SMALL, "study=failing",
                     "detector=fails_on_odd_seed", "seed=0,1,2")
    assert "0 done, 2 skipped (already finished), 1 failed" in again.stdout


def test_stale_running_run_is_closed_on_next_launch(tmp_path):
    from mlflow.tracking import MlflowClient

    db = tmp_path / "outputs" / "tracking"
    db.mkdir(parents=True)
    client = MlflowClient(tracking_uri=f"sqlite:///{db / 'mlflow.db'}")
    # artifacts beside the store, as evenflag does (MLflow's default is ./mlruns of the test's cwd)
    experiment = client.create_experiment("stale", artifact_location=(db / "artifacts" / "stale").as_uri())
    finished = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead_pid = finished.stdout.strip()  # that process has exited
    run = client.create_run(experiment, tags={"evenflag.host": socket.gethostname(), "evenflag.pid": dead_pid})
    result = evenflag(tmp_path, "run", *SMALL, "study=stale")
    assert result.returncode == 0 and "as KILLED" in result.stdout
    assert client.get_run(run.info.run_id).info.status == "KILLED"


def test_parallel_joblib_launcher(tmp_path):
    """Jobs run in worker processes; a worker checks the detector's settings
    and prepares the store (and ends a dead launch's run), so the launching
    process itself never imports MLflow or scikit-learn."""
    from mlflow.tracking import MlflowClient

    db = tmp_path / "outputs" / "tracking"
    db.mkdir(parents=True)
    client = MlflowClient(tracking_uri=f"sqlite:///{db / 'mlflow.db'}")
    experiment = client.create_experiment("par", artifact_location=(db / "artifacts" / "par").as_uri())
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    stale = client.create_run(experiment, tags={"evenflag.host": socket.gethostname(),
                                                "evenflag.pid": gone.stdout.strip()})
    launch = ("import sys; from evenflag.cli import main; code = main(sys.argv[1:]); "
              "print('launcher imported:', [m for m in ('mlflow', 'sklearn') if m in sys.modules]); sys.exit(code)")
    result = subprocess.run([sys.executable, "-c", launch, "run", "-m", "hydra/launcher=parallel", *SMALL,
                             "study=par", "seed=0,1,2"], cwd=tmp_path, capture_output=True, text=True, timeout=300,
                            env={**os.environ, "PYTHONPATH": str(REPO)})
    assert result.returncode == 0, result.stderr
    assert "launcher imported: []" in result.stdout
    assert "marked 1 run(s) left RUNNING by an interrupted launch as KILLED" in result.stdout
    assert client.get_run(stale.info.run_id).info.status == "KILLED"
    runs = [r for r in runs_of(client_for(tmp_path), "par") if r.info.run_id != stale.info.run_id]
    assert len(runs) == 3 and {r.info.status for r in runs} == {"FINISHED"}
    assert len({r.data.tags["evenflag.pid"] for r in runs}) >= 2  # really ran in worker processes


def test_submitit_local_launcher_runs_two_jobs(tmp_path):
    result = evenflag(tmp_path, "run", "-m", "hydra/launcher=local_processes", *SMALL, "study=sub", "seed=0,1")
    assert result.returncode == 0, result.stderr
    runs = runs_of(client_for(tmp_path), "sub")
    assert len(runs) == 2 and {r.info.status for r in runs} == {"FINISHED"}


def test_sweep_to_an_mlflow_server_on_loopback(tmp_path):
    server, uri = start_mlflow_server(f"sqlite:///{tmp_path / 'server.db'}",
                                      "--default-artifact-root", (tmp_path / "server-artifacts").as_uri())
    try:
        result = evenflag(tmp_path / "..", "run", "-m", *SMALL, "study=remote", "tracking=server",
                          f"tracking.uri={uri}", "seed=0,1")
        assert result.returncode == 0, result.stderr + result.stdout
        from mlflow.tracking import MlflowClient

        runs = runs_of(MlflowClient(tracking_uri=uri), "remote")
        assert len(runs) == 2 and {r.info.status for r in runs} == {"FINISHED"}
        assert "auroc" in runs[0].data.metrics
        # Two overlapping sweeps at once: no file lock reaches a server, the claim
        # rule (first claim wins, the others withdraw) must still run each cell once.
        environment = {**os.environ, "PYTHONPATH": str(REPO)}
        launches = [subprocess.Popen([sys.executable, "-m", "evenflag.cli", "run", "-m", *SMALL, "study=remote",
                                      "tracking=server", f"tracking.uri={uri}", f"seed={seeds}"],
                                     cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                     env=environment) for seeds in ("2,3,4", "3,4,5")]
        for launch in launches:
            assert launch.wait(timeout=600) == 0, launch.stderr.read()[-2000:]
        finished = [r for r in runs_of(MlflowClient(tracking_uri=uri), "remote") if r.info.status == "FINISHED"]
        assert sorted(r.data.params["seed"] for r in finished) == ["0", "1", "2", "3", "4", "5"]
    finally:
        server.terminate()
        server.wait(timeout=30)


@pytest.mark.parametrize("args, expected", [
    (["dataset=adlt"], "unknown dataset 'adlt'; valid names: adult, "),
    (["detector=isolation_forst"], "unknown detector 'isolation_forst'; valid names: "),
    (["protocol.test_fractoin=0.2"], "unknown setting 'protocol.test_fractoin'; allowed settings of protocol: kind, test_fraction"),
    (["protocol.test_fraction=abc"], "protocol.test_fraction: 'abc' is not a valid float"),
    (["detector.n_estimatorz=5"], "IsolationForestDetector accepts: n_estimators, max_samples, max_features"),
    (["threshold.policy=top"], "threshold.policy 'top' is unknown"),
    (["-m", "seed=0,1", "metrics=quik"], "unknown metrics 'quik'; valid names: default, quick"),
    (["seed=0,1"], "add -m"),
    # Values checked at launch, before any job trains (ranges from the settings' own docs).
    (["threshold.fraction=1.5"], "threshold.fraction must be between 0 and 1 (exclusive), got 1.5"),
    # The parallel launcher starts its workers before these checks; a failed check ends them.
    (["-m", "hydra/launcher=parallel", "seed=0,1", "threshold.fraction=1.5"],
     "threshold.fraction must be between 0 and 1 (exclusive), got 1.5"),
    (["-m", "hydra/launcher=parallel", "seed=0,x"], "seed: 'x' is not a valid integer"),
    # ... and a worker builds the detectors to check them (the launch defers it).
    (["-m", "hydra/launcher=parallel", "seed=0,1", "detector.n_estimators=abc"],
     "The 'n_estimators' parameter of IsolationForest must be an int in the range [1, inf). Got 'abc'"),
    (["-m", "hydra/launcher=parallel", "detector.n_estimators=10,-5"],
     "detector.n_estimators=-5: sklearn.ensemble.IsolationForest: The 'n_estimators' parameter"),
    (["-m", "hydra/launcher=parallel", "seed=0,1", "detector=deep_svdd", "detector.epochs=0"],
     "detector.epochs must be a whole number of at least 1, got 0"),
    (["detector=deep_svdd", "threshold.fraction=0"], "threshold.fraction must be between 0 and 1"),
    (["protocol.test_fraction=1"], "protocol.test_fraction must be between 0 and 1 (exclusive)"),
    (["protocol.test_anomaly_rate=2"], "protocol.test_anomaly_rate must be between 0 and 1 (exclusive) or null"),
    (["dataset.small_groups=maybe"], "dataset.small_groups must be 'merge' or 'refuse', got 'maybe'"),
    (["threads=-1"], "threads=-1 is invalid; use a positive number"),
    # scikit-learn's own parameter constraints (IsolationForest: n_estimators an int >= 1)
    (["detector.n_estimators=abc"], "The 'n_estimators' parameter of IsolationForest must be an int in the range [1, inf). Got 'abc'"),
    (["-m", "detector.n_estimators=10,-5"], "detector.n_estimators=-5: sklearn.ensemble.IsolationForest: The 'n_estimators' parameter"),
    (["detector=deep_svdd", "detector.epochs=0"], "detector.epochs must be a whole number of at least 1, got 0"),
    (["-sc", "install=bash"], "-sc is not supported by evenflag run; see evenflag run --hydra-help"),
    (["--config-dir", "no/such/dir", "seed=0"], "--config-dir no/such/dir: no such folder"),
    (["detector=deep_svdd", "detector.foo=1"],
     "DeepSVDDDetector accepts: objective, nu, eps, warmup_epochs, pretrain_epochs, hidden, embedding_dim, activation, "
     "dropout, epochs, batch_size, lr"),
])
def test_bad_overrides_give_one_line(tmp_path, args, expected):
    result = evenflag(tmp_path, "run", *args)
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and expected in lines[0], result.stderr
    assert not (tmp_path / "outputs").exists()  # nothing half-written


def test_neural_detectors_and_mitigations_run_in_a_sweep(tmp_path):
    small_net = ["detector.epochs=3", "detector.hidden=[16]", "detector.embedding_dim=4"]
    result = evenflag(tmp_path, "run", "-m", *SMALL, "study=neural", "detector=deep_svdd", *small_net,
                      "mitigation=none,group_balanced,group_thresholds")
    assert result.returncode == 0, result.stderr + result.stdout
    adversarial = evenflag(tmp_path, "run", *SMALL, "study=neural", "detector=adversarial", "detector.weight=0.5",
                           "detector.base.epochs=3", "detector.base.hidden=[16]", "detector.base.embedding_dim=4")
    assert adversarial.returncode == 0, adversarial.stderr + adversarial.stdout
    client = client_for(tmp_path)
    runs = runs_of(client, "neural")
    assert len(runs) == 4 and {r.info.status for r in runs} == {"FINISHED"}
    for run in runs:
        assert 0.0 <= run.data.metrics["leakage_auroc"] <= 1.0
    adv = next(r for r in runs if r.data.params["detector.name"] == "adversarial")
    curve = client.get_metric_history(adv.info.run_id, "train.probe_accuracy")
    assert [m.step for m in curve] == [0, 1, 2]
    assert "train.probe_baseline" in adv.data.metrics and "train.adversary_trace" in adv.data.metrics
    # group_thresholds: every group flagged at the same rate, within one row per group.
    equalised = next(r for r in runs if r.data.params["mitigation.kind"] == "group_thresholds")
    scores = pd.read_parquet(client.download_artifacts(equalised.info.run_id, "scores.parquet", str(tmp_path)))
    for _, rows in scores.groupby("group"):
        assert abs(rows["flag"].sum() - 0.05 * len(rows)) <= 1


def test_a_setting_shared_by_swept_detectors(tmp_path):
    # Both detectors have `epochs`; the default detector (isolation forest) does not.
    result = evenflag(tmp_path, "run", "-m", *SMALL, "study=shared", "detector=deep_svdd,autoencoder",
                      "detector.epochs=1", "detector.hidden=[8]")
    assert result.returncode == 0, result.stderr + result.stdout
    runs = runs_of(client_for(tmp_path), "shared")
    assert sorted(r.data.params["detector.name"] for r in runs) == ["autoencoder", "deep_svdd"]
    assert {r.data.params["detector.epochs"] for r in runs} == {"1"}
    # A detector without the setting is still refused before any job starts.
    refused = evenflag(tmp_path, "run", "-m", *SMALL, "study=shared", "detector=deep_svdd,isolation_forest",
                       "detector.epochs=1")
    assert refused.returncode == 2 and "unknown setting 'detector.epochs'" in refused.stderr
    assert len(runs_of(client_for(tmp_path), "shared")) == 2


@pytest.mark.parametrize("experiment, jobs", [("demo", 12), ("reference", 200), ("weight_tradeoff", 54),
                                             ("fair_methods", 375)])
def test_study_configs_compose_and_count(experiment, jobs):
    from evenflag.runner.app import _compose, _count_jobs

    cfg = _compose([f"experiment={experiment}"], [])
    assert cfg.study == experiment
    assert _count_jobs([f"experiment={experiment}"], cfg) == jobs
    assert cfg.hydra.launcher.n_jobs == 2 and "Joblib" in cfg.hydra.launcher._target_


def test_hydra_help_lists_only_what_run_supports(tmp_path):
    result = evenflag(tmp_path, "run", "--hydra-help")
    assert result.returncode == 0
    assert "--config-dir" in result.stdout and "parallel" in result.stdout
    for unsupported in ("--shell-completion", "--config-path", "--config-name", "install=bash"):
        assert unsupported not in result.stdout
