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


@functools.lru_cache(maxsize=1)
def package_source_sha256() -> str:
    """sha256 over every Python file of the installed evenflag package: an
    uncommitted edit, or an install from another version, changes it (a git
    commit alone does not see a dirty tree or a wheel)."""
    root = Path(evenflag.__file__).resolve().parent
    digest = hashlib.sha256()
    for path in sorted(root.rglob("*.py")):
        digest.update(str(path.relative_to(root)).encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()


@functools.lru_cache(maxsize=64)
def module_source_sha256(module_name: str) -> str:
    """sha256 of the source file of a module outside evenflag (a plugin detector,
    a ``module:function`` data reader); '' for evenflag's own modules or when the
    source cannot be found (then only its name is fingerprinted)."""
    import inspect

    from evenflag.plugins import import_module

    if not module_name or module_name.split(".")[0] == "evenflag":
        return ""
    try:
        source = inspect.getsourcefile(import_module(module_name))
        return hashlib.sha256(Path(source).read_bytes()).hexdigest() if source else ""
    except (ImportError, OSError, TypeError):
        return ""


def code_version() -> str:
    commit, _ = git_state()
    return f"{evenflag.__version__}+{commit[:12]}+src{package_source_sha256()[:12]}"


def plugin_modules(resolved: dict) -> list[str]:
    """Modules outside evenflag whose code shapes the run: the detector's (by
    ``_target_`` or a registered entry-point name, also as a wrapper's base) and
    a ``module:function`` data reader's."""
    from evenflag.detectors.base import detector_module

    modules = []
    detector = resolved.get("detector") or {}
    for config in (detector, detector.get("base") if isinstance(detector.get("base"), dict) else None):
        if config:
            modules.append(detector_module(config))
    kind = str(((resolved.get("dataset") or {}).get("source") or {}).get("kind", ""))
    if ":" in kind:
        modules.append(kind.split(":", 1)[0])
    return [m for m in modules if m]


def fingerprint(resolved: dict, data_sha256: str, table_sha256: str = "") -> str:
    """Hash of what determines a run's numbers: the resolved config (without
    where-to-run keys), the data bytes and the parsed table, evenflag's source
    and the source of any plugin detector or data reader it uses."""
    what = {k: v for k, v in resolved.items() if k not in NOT_FINGERPRINTED}
    plugins = {m: module_source_sha256(m) for m in plugin_modules(resolved)}
    text = json.dumps({"config": what, "data": data_sha256, "table": table_sha256, "code": code_version(),
                       "plugins": plugins}, sort_keys=True, default=str)
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
