"""What a run was made from: code version, library versions, fingerprint."""

from __future__ import annotations

import functools
import hashlib
import json
import platform
import subprocess
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path

import evenflag

# Keys that say where and how to run, not what to compute: not fingerprinted.
NOT_FINGERPRINTED = ("tracking", "rerun", "tags", "threads", "study")


@functools.lru_cache(maxsize=1)
def git_state() -> tuple[str, bool]:
    """(commit, dirty) of the checkout evenflag runs from; ('unknown', False) outside git."""
    here = Path(evenflag.__file__).resolve().parent
    try:
        commit = subprocess.run(["git", "-C", str(here), "rev-parse", "HEAD"], capture_output=True, text=True,
                                timeout=10).stdout.strip()
        status = subprocess.run(["git", "-C", str(here), "status", "--porcelain", "--untracked-files=no"],
                                capture_output=True, text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "unknown", False
    return (commit or "unknown"), bool(status)


@functools.lru_cache(maxsize=1)
def library_versions() -> dict[str, str]:
    out = {"python": platform.python_version(), "evenflag": evenflag.__version__}
    for package in ("numpy", "pandas", "scikit-learn", "torch", "mlflow", "hydra-core"):
        try:
            out[package] = version(package)
        except PackageNotFoundError:
            out[package] = "not installed"
    return out


def code_version() -> str:
    commit, _ = git_state()
    return f"{evenflag.__version__}+{commit[:12]}"


def fingerprint(resolved: dict, data_sha256: str) -> str:
    """Hash of what determines a run's numbers: the resolved config (without
    where-to-run keys), the data bytes and the code version."""
    what = {k: v for k, v in resolved.items() if k not in NOT_FINGERPRINTED}
    text = json.dumps({"config": what, "data": data_sha256, "code": code_version()}, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def flatten(tree: dict, prefix: str = "") -> dict[str, str]:
    """{'a': {'b': 1}} -> {'a.b': '1'}; lists become their JSON text."""
    out: dict[str, str] = {}
    for key, value in tree.items():
        name = f"{prefix}{key}"
        if isinstance(value, dict):
            out.update(flatten(value, name + "."))
        else:
            out[name] = json.dumps(value) if isinstance(value, (list, tuple)) else str(value)
    return out
