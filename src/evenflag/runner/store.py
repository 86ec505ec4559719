"""The local SQLite tracking store: created whole or not at all, checked before use.

MLflow creates a new SQLite store by running its schema migrations in place,
table by table. A process killed halfway, or two processes creating the same
store at once, leave a file that every later open fails on. Here a new store
is built in a temporary file next to the target and renamed into place, under
an exclusive file lock, so a store either does not exist or is complete; an
existing store is checked first and a problem is reported in one line with
its fix (a half-created store that holds no runs is moved aside and rebuilt).
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import sqlite3
import time
from pathlib import Path

from evenflag.errors import EvenflagError, warn_line


class StoreError(EvenflagError):
    """The tracking store cannot be used as it is."""


@contextlib.contextmanager
def file_lock(path: Path, what: str = "the tracking store"):
    """An exclusive lock on ``path`` (created if missing), held for the block.
    The operating system releases it when the holder dies, so a killed process
    never leaves it locked."""
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle = open(path, "a+")
    except OSError as exc:
        raise StoreError(f"cannot create {path} for {what} ({exc.strerror}); make {path.parent} writable "
                         "or point tracking.uri elsewhere") from exc
    try:
        fcntl.flock(handle, fcntl.LOCK_EX)
        yield
    finally:
        fcntl.flock(handle, fcntl.LOCK_UN)
        handle.close()


def sqlite_path(uri: str) -> Path | None:
    """The file behind a ``sqlite:///`` URI, or None for any other store."""
    return Path(uri[len("sqlite:///"):]) if uri.startswith("sqlite:///") else None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def inspect_store(path: Path) -> tuple[str, str]:
    """(state, detail) of an existing SQLite file: ``ok``, ``empty`` (0 bytes),
    ``half`` (some MLflow tables missing: creation was interrupted), ``old``
    (an older MLflow schema), ``damaged`` (not a readable SQLite database)."""
    if path.stat().st_size == 0:
        return "empty", "0 bytes"
    try:
        connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)
        try:
            tables = {row[0] for row in connection.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            version = None
            if "alembic_version" in tables:
                row = connection.execute("SELECT version_num FROM alembic_version").fetchone()
                version = row[0] if row else None
            runs = connection.execute("SELECT count(*) FROM runs").fetchone()[0] if "runs" in tables else 0
        finally:
            connection.close()
    except sqlite3.DatabaseError as exc:
        return "damaged", str(exc)
    import mlflow.store.tracking.sqlalchemy_store  # noqa: F401  (registers every table MLflow checks on open)
    from mlflow.store.db.base_sql_model import Base
    from mlflow.store.db.utils import _get_latest_schema_revision

    expected = set(Base.metadata.tables)
    missing = sorted(expected - tables)
    if missing or version is None:
        return "half", f"{len(missing)} of {len(expected)} tables missing, {runs} run(s) recorded"
    if version != _get_latest_schema_revision():
        return "old", f"schema {version}"
    return "ok", f"{runs} run(s)"


def _create(path: Path) -> None:
    """Build a complete store in a temporary file beside ``path``, then rename it into place."""
    import logging

    from mlflow.store.tracking.sqlalchemy_store import SqlAlchemyStore

    for noisy in ("mlflow", "alembic"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
    temporary = path.with_name(f".{path.name}.creating-{os.getpid()}")
    temporary.unlink(missing_ok=True)
    try:
        store = SqlAlchemyStore(f"sqlite:///{temporary}", (path.parent / "artifacts").as_uri())
        store.engine.dispose()
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise


def _remove_leftovers(path: Path) -> None:
    """Temporary files of creations whose process is gone."""
    for leftover in path.parent.glob(f".{path.name}.creating-*"):
        pid = leftover.name.rsplit("-", 1)[-1]
        if not pid.isdigit() or not _pid_alive(int(pid)):
            leftover.unlink(missing_ok=True)


def prepare_sqlite_store(path: Path) -> None:
    """Make ``path`` a complete MLflow store, or stop with one line saying why and what to do."""
    path = path.resolve()
    uri = f"sqlite:///{path}"
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot create the folder {path.parent} of the tracking store ({exc.strerror}); "
                         "make it writable or set tracking.uri elsewhere") from exc
    if not os.access(path.parent, os.W_OK):
        raise StoreError(f"the folder {path.parent} of the tracking store is not writable; make it writable "
                         "or set tracking.uri elsewhere")
    if path.exists() and not os.access(path, os.W_OK):
        raise StoreError(f"the tracking store {path} is read-only; make it writable (chmod u+w) or set "
                         "tracking.uri elsewhere")
    with file_lock(path.with_name(path.name + ".lock")):
        _remove_leftovers(path)
        if path.exists():
            state, detail = inspect_store(path)
            if state == "ok":
                return
            if state == "empty":
                warn_line(f"the tracking store {path} is an empty file (0 bytes); creating a new store in it")
                path.unlink()
            elif state == "half" and detail.endswith(" 0 run(s) recorded"):
                aside = path.with_name(f"{path.name}.incomplete-{time.strftime('%Y%m%d-%H%M%S')}")
                os.replace(path, aside)
                warn_line(f"the tracking store {path} was left half-created ({detail}) by an interrupted "
                          f"launch; moved it to {aside.name} and created a new one")
            elif state == "half":
                raise StoreError(f"the tracking store {path} is incomplete ({detail}); back it up, then run "
                                 f"'mlflow db upgrade {uri}', or move it aside and launch again")
            elif state == "old":
                raise StoreError(f"the tracking store {path} has an older MLflow schema ({detail}); back it up, "
                                 f"then run 'mlflow db upgrade {uri}'")
            else:
                raise StoreError(f"{path} is not a readable tracking store ({detail}); move it aside "
                                 f"(mv {path} {path}.bad) and launch again, or set tracking.uri elsewhere")
        _create(path)


def check_readable_store(path: Path) -> None:
    """For readers (the report): the store exists and is complete; never creates or repairs."""
    if not path.exists():
        raise StoreError(f"no tracking store at sqlite:///{path}; run a sweep first (evenflag run -m ...) or "
                         "pass --tracking-uri")
    state, detail = inspect_store(path)
    if state == "ok":
        return
    if state in ("empty", "half"):
        raise StoreError(f"the tracking store {path} holds no complete record ({detail}); launch a run to "
                         "create it, or pass --tracking-uri")
    if state == "old":
        raise StoreError(f"the tracking store {path} has an older MLflow schema ({detail}); back it up, then run "
                         f"'mlflow db upgrade sqlite:///{path}'")
    raise StoreError(f"{path} is not a readable tracking store ({detail}); check the path or restore the file "
                     "from a backup")
