"""Importing user code named in configs (detector classes, data readers).

A ``_target_`` such as ``myproject.detectors.Mine`` in a yaml of a folder given
with ``--config-dir`` should import without the user setting ``PYTHONPATH``:
when the top-level package is not importable as installed, it is looked for in
the current directory, then in each config folder and the folders above it
(so ``--config-dir ~/work/tests/configs`` finds ``tests/plugins/x.py`` in
``~/work``).
"""

from __future__ import annotations

import importlib
import os
import sys
from pathlib import Path

from evenflag.errors import UnknownNameError

PLUGIN_DIRS_ENV = "EVENFLAG_PLUGIN_DIRS"


def _candidate_roots() -> list[Path]:
    roots = [Path.cwd()]
    for folder in filter(None, os.environ.get(PLUGIN_DIRS_ENV, "").split(os.pathsep)):
        folder = Path(folder).resolve()
        roots += [folder, *folder.parents]
    return list(dict.fromkeys(roots))


def _holds(root: Path, name: str) -> bool:
    """Whether ``root`` holds module ``name`` (``a/b/c.py`` or ``a/b/c/__init__.py``;
    the packages above it may be namespace folders)."""
    path = root.joinpath(*name.split("."))
    return path.with_suffix(".py").is_file() or (path / "__init__.py").is_file()


def import_module(name: str):
    """``importlib.import_module``, falling back to the plugin folders above."""
    try:
        return importlib.import_module(name)
    except ModuleNotFoundError as exc:
        top = name.split(".")[0]
        if exc.name != top:
            raise
        root = next((r for r in _candidate_roots() if _holds(r, name)), None)
        if root is None:
            raise
        sys.path.append(str(root))
        importlib.invalidate_caches()
        return importlib.import_module(name)


def import_object(path: str, what: str = "detector"):
    """Import ``pkg.mod.Name`` or ``pkg.mod:Name``, with one-line errors."""
    module_name, sep, attr = path.partition(":")
    if not sep:
        module_name, _, attr = path.rpartition(".")
    try:
        return getattr(import_module(module_name), attr)
    except SyntaxError as exc:
        raise UnknownNameError(f"{what} '{path}': its module has a syntax error at {exc.filename}:{exc.lineno} "
                               f"({exc.msg}); fix the file") from exc
    except (ImportError, AttributeError, ValueError) as exc:
        raise UnknownNameError(f"{what} '{path}' could not be imported ({exc}); check the import path, or run from "
                               "the folder that holds the package") from exc
    except Exception as exc:  # the module raised while it was imported
        raise UnknownNameError(f"{what} '{path}': importing its module raised {exc.__class__.__name__}: "
                               f"{str(exc).splitlines()[0] if str(exc) else ''}; fix the module") from exc
