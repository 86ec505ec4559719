"""An installed wheel (not the editable checkout) runs from any directory."""

import os
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--quiet",
                    "-w", str(out), str(REPO)], check=True, capture_output=True, timeout=300)
    (built,) = out.glob("evenflag-*.whl")
    return built


def test_wheel_carries_every_module_and_config(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    modules = {f"evenflag/{p.relative_to(REPO / 'src' / 'evenflag').as_posix()}"
               for p in (REPO / "src" / "evenflag").rglob("*.py")}
    configs = {f"evenflag/configs/{p.relative_to(REPO / 'configs').as_posix()}"
               for p in (REPO / "configs").rglob("*.yaml")}
    assert modules - names == set(), "a package is missing from pyproject's [tool.setuptools] packages"
    assert configs - names == set()
    plugins = {f"hydra_plugins/{p.relative_to(REPO / 'src' / 'hydra_plugins').as_posix()}"
               for p in (REPO / "src" / "hydra_plugins").rglob("*.py")}
    assert plugins and plugins - names == set(), "the search sweeper is missing from the wheel"


def test_installed_wheel_runs_outside_the_checkout(wheel, tmp_path):
    site = tmp_path / "site"
    subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "--quiet", "--target", str(site), str(wheel)],
                   check=True, capture_output=True, timeout=300)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "EVENFLAG_CONFIG_DIR")}
    env["PYTHONPATH"] = str(site)  # ahead of the editable install in the test environment
    where = subprocess.run([sys.executable, "-c", "import evenflag, evenflag.paths as p; print(evenflag.__file__); "
                            "print(p.config_dir())"], cwd=elsewhere, env=env, capture_output=True, text=True, check=True)
    module_file, configs = where.stdout.split()
    assert Path(module_file).is_relative_to(site) and Path(configs) == site / "evenflag" / "configs"

    done = subprocess.run([str(site / "bin" / "evenflag"), "run", "dataset=german_credit", "detector=isolation_forest",
                           "metrics=quick"], cwd=elsewhere, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "1 done" in done.stdout
    assert (elsewhere / "outputs" / "tracking" / "mlflow.db").is_file()
