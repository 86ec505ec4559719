"""The trade-off search: an Optuna multi-objective search as a Hydra sweeper,
with real processes, a real MLflow store and a real Optuna study on SQLite."""

import os
import signal
import subprocess
import sys
import time

import optuna
import pytest

from tests.runner_helpers import REPO, client_for, evenflag, runs_of

SEARCH = ["run", "-m", "experiment=tradeoff_search", "dataset=synthetic_claims", "dataset.source.rows=800",
          "metrics=quick", "detector.base.hidden=[16]", "hydra/launcher=basic", "hydra.sweeper.batch_size=1"]


def _trials(tmp_path, study):
    storage = f"sqlite:///{tmp_path / 'outputs' / 'tracking' / 'search.db'}"
    return optuna.load_study(study_name=study, storage=storage).get_trials(deepcopy=False)


def _key(params: dict) -> tuple:
    """A trial's parameters as the run's params spell them."""
    return tuple(sorted((k, str(v)) for k, v in params.items()))


def _run_key(run, names) -> tuple:
    return tuple(sorted((k, run.data.params[k]) for k in names))


def test_search_objectives_equal_the_logged_metrics(tmp_path):
    result = evenflag(tmp_path, *SEARCH, "study=objectives", "hydra.sweeper.n_trials=3",
                      "detector.base.epochs=2", timeout=600)
    assert result.returncode == 0, result.stderr[-2000:]
    trials = _trials(tmp_path, "objectives")
    assert sorted(t.state.name for t in trials) == ["COMPLETE"] * 3
    runs = {_run_key(r, trials[0].params): r for r in runs_of(client_for(tmp_path), "objectives")}
    assert len(runs) == 3
    for trial in trials:
        run = runs[_key(trial.params)]
        assert trial.values == [run.data.metrics["auroc"], run.data.metrics["flag_rate_ratio"]]
        assert run.data.tags["search_trial"] == str(trial.number)

    # The report's Pareto-optimal configurations are Optuna's own Pareto front
    # (optuna.Study.best_trials: the trials no other trial dominates).
    report = evenflag(tmp_path, "report", "--study", "objectives", "--no-figures", "--out", str(tmp_path / "r"))
    assert report.returncode == 0, report.stderr
    import pandas as pd

    front = pd.read_csv(tmp_path / "r" / "pareto.csv")
    best = optuna.load_study(study_name="objectives",
                             storage=f"sqlite:///{tmp_path / 'outputs' / 'tracking' / 'search.db'}").best_trials
    assert sorted(round(w, 9) for w in front["detector.weight"]) == sorted(round(t.params["detector.weight"], 9)
                                                                          for t in best)


@pytest.mark.slow
def test_a_killed_search_resumes_without_losing_or_repeating_a_trial(tmp_path):
    environment = {**os.environ, "PYTHONPATH": str(REPO)}
    args = [*SEARCH, "study=resume", "hydra.sweeper.n_trials=5", "detector.base.epochs=60"]
    process = subprocess.Popen([sys.executable, "-m", "evenflag.cli", *args], cwd=tmp_path, env=environment,
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    deadline = time.time() + 300
    # Kill the whole process group once two trials completed and a third is training.
    while time.time() < deadline:
        try:
            states = [t.state.name for t in _trials(tmp_path, "resume")]
        except (KeyError, Exception):
            states = []
        if states.count("COMPLETE") >= 2 and "RUNNING" in states:
            break
        time.sleep(0.5)
    else:
        process.kill()
        pytest.fail("the search did not reach its third trial in time")
    os.killpg(process.pid, signal.SIGKILL)
    process.wait()
    assert any(t.state.name == "RUNNING" for t in _trials(tmp_path, "resume"))

    relaunch = evenflag(tmp_path, *args[:-1], "detector.base.epochs=60", timeout=900)
    assert relaunch.returncode == 0, relaunch.stderr[-2000:]
    trials = _trials(tmp_path, "resume")
    complete = [t for t in trials if t.state.name == "COMPLETE"]
    requeued = [t for t in trials if t.user_attrs.get("requeued")]
    assert len(complete) == 5                                  # n_trials, none lost
    assert len(requeued) == 1 and requeued[0].state.name == "FAIL"
    # The trial the kill interrupted ran again with its own parameters.
    assert _key(requeued[0].params) in {_key(t.params) for t in complete}
    finished = [r for r in runs_of(client_for(tmp_path), "resume") if r.info.status == "FINISHED"]
    names = complete[0].params
    assert len(finished) == 5                                  # one finished MLflow run per trial
    assert {_run_key(r, names) for r in finished} == {_key(t.params) for t in complete}  # none repeated
    assert "RUNNING" not in {r.info.status for r in runs_of(client_for(tmp_path), "resume")}
    again = evenflag(tmp_path, *args, timeout=300)
    assert again.returncode == 0 and "trials are done" in again.stdout


def test_bad_search_settings_are_one_line(tmp_path):
    result = evenflag(tmp_path, *SEARCH, "study=bad", "hydra.sweeper.n_trials=2", "detector.base.epochs=1",
                      "hydra.sweeper.objectives=[auroc:upward]", timeout=300)
    assert result.returncode != 0
    assert "auroc:upward" in result.stdout + result.stderr
