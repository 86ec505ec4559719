"""The two documented plugin routes (DEVELOPERS.md, "Add a detector"), run as
a user would: a real sweep into a real store, from a directory that is not the
checkout, with no PYTHONPATH.

1. An entry point: a temporary package declaring ``evenflag.detectors`` is
   installed with pip into a fresh environment, then ``detector.name=<name>``.
2. A yaml with ``_target_`` in a folder passed with ``--config-dir``.
"""

import os
import shutil
import subprocess
import sys
import sysconfig
import textwrap
from pathlib import Path

import pytest
from mlflow.tracking import MlflowClient

REPO = Path(__file__).resolve().parents[1]
PLUGIN_SOURCE = REPO / "tests" / "plugins" / "covariance_distance.py"
SMALL = ["dataset=synthetic_claims", "dataset.source.rows=600", "metrics=quick"]


def _clean_env():
    return {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "EVENFLAG_CONFIG_DIR")}


def _runs(folder: Path):
    client = MlflowClient(tracking_uri=f"sqlite:///{folder / 'outputs' / 'tracking' / 'mlflow.db'}")
    experiment = client.get_experiment_by_name("default")
    return client.search_runs([experiment.experiment_id])


@pytest.fixture(scope="module")
def plugin_env(tmp_path_factory):
    """A new virtual environment that sees the test environment's packages and
    has a pip-installed package registering ``covariance_distance``."""
    root = tmp_path_factory.mktemp("plugin-env")
    package = root / "spread-detectors"
    (package / "src" / "spread_detectors").mkdir(parents=True)
    (package / "src" / "spread_detectors" / "__init__.py").write_text("")
    shutil.copy(PLUGIN_SOURCE, package / "src" / "spread_detectors" / "covariance.py")
    (package / "pyproject.toml").write_text(textwrap.dedent("""\
        [build-system]
        requires = ["setuptools>=77"]
        build-backend = "setuptools.build_meta"

        [project]
        name = "spread-detectors"
        version = "0.0.1"

        [project.entry-points."evenflag.detectors"]
        covariance_distance = "spread_detectors.covariance:CovarianceDistanceDetector"
        """))
    venv = root / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    python = venv / "bin" / "python"
    child_site = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                                capture_output=True, text=True, check=True).stdout.strip()
    # addsitedir (not a plain path line) so the test environment's own .pth
    # files, among them evenflag's editable install, are processed too.
    Path(child_site, "parent_environment.pth").write_text(
        f"import site; site.addsitedir({sysconfig.get_paths()['purelib']!r})\n")
    subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "--quiet", "--no-deps",
                    "--no-build-isolation", str(package)], check=True, capture_output=True, timeout=300)
    return python


def test_entry_point_name_route(plugin_env, tmp_path):
    done = subprocess.run([str(plugin_env), "-m", "evenflag.cli", "run", "-m", *SMALL,
                           "detector.name=covariance_distance", "detector.shrinkage=0.2", "seed=0,1"],
                          cwd=tmp_path, env=_clean_env(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stdout[-1500:] + done.stderr[-1500:]
    assert "2 done" in done.stdout
    runs = _runs(tmp_path)
    assert sorted(r.data.params["seed"] for r in runs) == ["0", "1"]
    for run in runs:
        assert run.info.status == "FINISHED"
        # The plugin's own settings, none of the default isolation forest's.
        assert run.data.params["detector.shrinkage"] == "0.2"
        assert not any(k.startswith("detector.n_estimators") for k in run.data.params)
        assert run.data.tags["evenflag.detector"] == "covariance_distance"


def test_unknown_registered_name_lists_the_names(plugin_env, tmp_path):
    done = subprocess.run([str(plugin_env), "-m", "evenflag.cli", "run", *SMALL, "detector.name=covariance_distanse"],
                          cwd=tmp_path, env=_clean_env(), capture_output=True, text=True, timeout=300)
    assert done.returncode != 0
    assert "unknown detector 'covariance_distanse'" in done.stderr and "covariance_distance" in done.stderr
    assert "Traceback" not in done.stderr


def test_config_dir_route_without_pythonpath(tmp_path):
    """The documented example, `evenflag run --config-dir tests/configs
    detector=covariance_distance`, from a copy of the checkout's layout, with
    the console script (which, unlike `python -m`, does not put the current
    directory on the import path); and --config-dir after the overrides."""
    project = tmp_path / "project"
    shutil.copytree(REPO / "tests" / "configs", project / "tests" / "configs")
    (project / "tests" / "plugins").mkdir()
    shutil.copy(PLUGIN_SOURCE, project / "tests" / "plugins" / "covariance_distance.py")
    script = Path(sys.executable).parent / "evenflag"
    first = subprocess.run([str(script), "run", "--config-dir", "tests/configs", "detector=covariance_distance",
                            *SMALL], cwd=project, env=_clean_env(), capture_output=True, text=True, timeout=300)
    assert first.returncode == 0, first.stdout[-1500:] + first.stderr[-1500:]
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    second = subprocess.run([str(script), "run", *SMALL, "detector=covariance_distance", "detector.shrinkage=0.3",
                             "--config-dir", str(project / "tests" / "configs")],
                            cwd=elsewhere, env=_clean_env(), capture_output=True, text=True, timeout=300)
    assert second.returncode == 0, second.stdout[-1500:] + second.stderr[-1500:]
    for folder, shrinkage in ((project, "0.1"), (elsewhere, "0.3")):
        (run,) = _runs(folder)
        assert run.info.status == "FINISHED"
        assert run.data.params["detector.shrinkage"] == shrinkage
        assert run.data.tags["evenflag.detector"] == "covariance_distance"


def test_missing_config_dir_is_named(tmp_path):
    script = Path(sys.executable).parent / "evenflag"
    done = subprocess.run([str(script), "run", "--config-dir", "no/such/folder", "detector=covariance_distance"],
                          cwd=tmp_path, env=_clean_env(), capture_output=True, text=True, timeout=120)
    assert done.returncode != 0 and "--config-dir no/such/folder: no such folder" in done.stderr
