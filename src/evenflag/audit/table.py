"""Read and check an exported score file, a chunk at a time.

The file is streamed (Parquet by record batches, CSV by chunks of
``chunk_rows``) and only the named columns are kept, as compact arrays: a
float score, integer codes for groups and periods, a label of 1 / 0 / -1
(unknown), a flag. A file of 10 million rows then needs a few hundred MB,
whatever its other columns hold. Every problem is collected over the whole
file and reported as one line with its count and the first data row it was
seen on (data rows count from 1, after the header).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from evenflag.audit.spec import AuditSpec
from evenflag.data.cache import sha256_file
from evenflag.errors import DatasetError

FLAG_TRUE = {"1", "true", "yes", "y", "t"}
FLAG_FALSE = {"0", "false", "no", "n", "f"}
ENDINGS = {"csv": ".csv", "csv.gz": ".csv.gz", "parquet": ".parquet"}


class AuditInputError(DatasetError):
    """The exported score file does not fit the audit's settings."""


@dataclass
class AuditTable:
    """The checked contents of an audit file (one entry per row, in file order)."""

    name: str
    path: Path
    fmt: str
    sha256: str
    score: np.ndarray                     # float64, higher = more suspicious
    group: np.ndarray                     # int codes into group_names
    group_names: list[str]
    label: np.ndarray | None = None       # int8: 1 anomaly, 0 normal, -1 not reviewed; None without a label column
    flag: np.ndarray | None = None        # bool; None without a flag column
    period: np.ndarray | None = None      # int codes into period_names (in time order)
    period_names: list[str] = field(default_factory=list)
    weight: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        return len(self.score)

    def group_sizes(self) -> dict[str, int]:
        counts = np.bincount(self.group, minlength=len(self.group_names))
        return {name: int(c) for name, c in zip(self.group_names, counts)}


def detect_format(path: Path, fmt: str) -> str:
    if fmt != "auto":
        return fmt
    lowered = path.name.lower()
    for name, ending in sorted(ENDINGS.items(), key=lambda item: -len(item[1])):
        if lowered.endswith(ending):
            return name
    raise AuditInputError(f"cannot tell the format of '{path.name}' from its name; use a file ending in "
                          f"{', '.join(ENDINGS.values())} or set audit.format to one of {', '.join(ENDINGS)}")


def as_text(value):
    """A cell as text for matching against settings: None when empty; whole
    floats lose their '.0' (a 0/1 column with empty cells is read as floats);
    booleans become 'true' / 'false'."""
    if value is None or value is pd.NaT or (isinstance(value, (float, np.floating)) and np.isnan(value)):
        return None
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value).strip()


def text_codes(values: pd.Series) -> tuple[np.ndarray, list]:
    """(codes, text of each distinct value): missing values get code -1. The
    text conversion runs on the distinct values only, which keeps a chunk of a
    million rows fast."""
    codes, uniques = pd.factorize(values, use_na_sentinel=True)
    return codes, [as_text(v) for v in np.asarray(uniques, dtype=object)]


class _Codes:
    """A growing dictionary from text values to integer codes (first seen = 0)."""

    def __init__(self):
        self.names: list[str] = []
        self.index: dict[str, int] = {}

    def encode(self, values: pd.Series) -> tuple[np.ndarray, np.ndarray]:
        """(global codes, missing mask) of a chunk."""
        codes, texts = text_codes(values)
        lookup = np.array([self.index.setdefault(t, len(self.index)) for t in texts] + [0], dtype=np.int32)
        self.names = list(self.index)
        return lookup[codes], codes < 0


def value_map(values: pd.Series, mapping: dict[str, int], missing: int, invalid: int) -> np.ndarray:
    """Each value's mapped number: ``mapping`` of its lower-case text, ``missing``
    for an empty cell, ``invalid`` for any other text."""
    codes, texts = text_codes(values)
    lookup = np.array([mapping.get(str(t).lower(), invalid) for t in texts] + [missing], dtype=np.int64)
    return lookup[codes]


class _Problems:
    """Counts of each kind of problem and the first data row it was seen on."""

    def __init__(self):
        self.found: dict[str, list] = {}

    def add(self, kind: str, mask: np.ndarray, offset: int, example=None) -> None:
        count = int(mask.sum())
        if not count:
            return
        entry = self.found.setdefault(kind, [0, None, None])
        entry[0] += count
        if entry[1] is None:
            first = int(np.flatnonzero(mask)[0])
            entry[1] = offset + first + 1
            entry[2] = example(first) if example else None

    def raise_first(self, messages: dict[str, str]) -> None:
        for kind, template in messages.items():
            if kind in self.found:
                count, row, example = self.found[kind]
                raise AuditInputError(template.format(count=f"{count:,}", row=f"{row:,}", example=example))


def _columns_in(path: Path, fmt: str, encoding: str) -> list[str]:
    try:
        if fmt == "parquet":
            import pyarrow.parquet as pq

            return list(pq.ParquetFile(path).schema_arrow.names)
        return list(pd.read_csv(path, nrows=0, encoding=encoding, compression="infer").columns.str.strip())
    except pd.errors.EmptyDataError as exc:
        raise AuditInputError(f"'{path.name}' is empty (no header, no rows); export the scores again") from exc
    except UnicodeDecodeError as exc:
        raise AuditInputError(f"'{path.name}' is not {exc.encoding} text; set audit.encoding to the file's "
                              "encoding, e.g. latin-1 or cp1252") from exc
    except Exception as exc:  # pyarrow and the CSV parser raise many types for a damaged file
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise AuditInputError(f"'{path.name}' could not be read as {fmt} ({reason}); check the file or set "
                              "audit.format") from exc


def _chunks(path: Path, fmt: str, columns: list[str], spec: AuditSpec):
    """DataFrames of the wanted columns, ``chunk_rows`` rows (or one Parquet batch) at a time."""
    if fmt == "parquet":
        import pyarrow.parquet as pq

        for batch in pq.ParquetFile(path).iter_batches(batch_size=spec.chunk_rows, columns=columns):
            yield batch.to_pandas()
        return
    text_columns = {c: str for c in columns if c != spec.score and c != spec.weight}
    reader = pd.read_csv(path, usecols=lambda c: c.strip() in columns, chunksize=spec.chunk_rows,
                         encoding=spec.encoding, dtype=text_columns, skipinitialspace=True, compression="infer",
                         keep_default_na=True)
    for chunk in reader:
        chunk.columns = chunk.columns.str.strip()
        yield chunk


def read_audit_file(spec: AuditSpec) -> AuditTable:
    """Read ``spec.file`` and check it against ``spec``; one AuditInputError per problem."""
    path = Path(spec.file).expanduser()
    if path.is_dir():
        raise AuditInputError(f"'{path}' is a folder; give the exported file itself (.csv or .parquet)")
    if not path.is_file():
        raise AuditInputError(f"file '{path}' does not exist; check the path given to evenflag audit")
    if path.stat().st_size == 0:
        raise AuditInputError(f"'{path.name}' is empty (0 bytes); export the scores again")
    fmt = detect_format(path, spec.format)
    present = _columns_in(path, fmt, spec.encoding)
    roles = {"score": [spec.score], "group": list(spec.group), "label": [spec.label], "flag": [spec.flag],
             "period": [spec.period], "weight": [spec.weight], "id": [spec.id]}
    for role, names in roles.items():
        for column in names:
            if column and column not in present:
                setting = f"audit.{role}" if role != "group" else "audit.group"
                raise AuditInputError(f"{role} column '{column}' is not in '{path.name}'; its columns are "
                                      f"{', '.join(present[:30])}{' ...' if len(present) > 30 else ''} "
                                      f"(set {setting})")
    wanted = [c for names in roles.values() for c in names if c]

    problems = _Problems()
    group_codes = [_Codes() for _ in spec.group]
    period_codes = _Codes()
    parts: dict[str, list[np.ndarray]] = {k: [] for k in ("score", "label", "flag", "period", "weight", "id")}
    group_parts: list[list[np.ndarray]] = [[] for _ in spec.group]
    label_map = {**{as_text(v).lower(): 0 for v in spec.normal_values},
                 **{as_text(v).lower(): 1 for v in spec.anomaly_values}}
    flag_map = {**{t: 1 for t in FLAG_TRUE}, **{t: 0 for t in FLAG_FALSE}}
    offset = 0
    period_is_time = False
    for chunk in _chunks(path, fmt, wanted, spec):
        n = len(chunk)
        raw = chunk[spec.score]
        score = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=np.float64)
        not_numeric = np.isnan(score) & raw.notna().to_numpy()
        problems.add("score_text", not_numeric, offset, lambda i, raw=raw: raw.iloc[i])
        problems.add("score_nan", ~np.isfinite(score) & ~not_numeric, offset)
        parts["score"].append(-score if spec.lower_is_suspicious else score)
        for k, column in enumerate(spec.group):
            codes, missing = group_codes[k].encode(chunk[column])
            problems.add(f"group_missing:{column}", missing, offset)
            group_parts[k].append(codes)
        if spec.label:
            label = value_map(chunk[spec.label], label_map, missing=-1, invalid=-2)
            problems.add("label_value", label == -2, offset, lambda i, t=chunk[spec.label]: t.iloc[i])
            parts["label"].append(label.astype(np.int8))
        if spec.flag:
            flag = value_map(chunk[spec.flag], flag_map, missing=-2, invalid=-2)
            problems.add("flag_value", flag < 0, offset, lambda i, t=chunk[spec.flag]: t.iloc[i])
            parts["flag"].append(flag == 1)
        if spec.period:
            values = chunk[spec.period]
            if pd.api.types.is_datetime64_any_dtype(values):
                period_is_time = True
                values = values.dt.strftime("%Y-%m-%d %H:%M:%S")
            codes, missing = period_codes.encode(values)
            problems.add("period_missing", missing, offset)
            parts["period"].append(codes)
        if spec.weight:
            weight = pd.to_numeric(chunk[spec.weight], errors="coerce").to_numpy(dtype=np.float64)
            problems.add("weight_value", ~(np.isfinite(weight) & (weight >= 0)), offset,
                         lambda i, t=chunk[spec.weight]: t.iloc[i])
            parts["weight"].append(weight)
        if spec.id:
            parts["id"].append(id_keys(chunk[spec.id]))
        offset += n
    _release_arrow_memory()
    if offset == 0:
        raise AuditInputError(f"'{path.name}' has a header but no rows; export the scores again")

    problems.raise_first({
        "score_text": f"score column '{spec.score}' is not numeric: {{count}} value(s) such as '{{example}}' "
                      f"(first at data row {{row}}); export numbers only, or set audit.score to the score column",
        "score_nan": f"score column '{spec.score}' has {{count}} empty, NaN or infinite value(s) (first at data row "
                     "{row}); every audited row needs a finite score: fix or drop those rows",
        **{f"group_missing:{c}": f"group column '{c}' has {{count}} empty value(s) (first at data row {{row}}); "
                                 "fill them with a value such as 'unknown' or drop those rows" for c in spec.group},
        "label_value": f"label column '{spec.label}' has {{count}} value(s) outside audit.anomaly_values "
                       f"{list(spec.anomaly_values)} and audit.normal_values {list(spec.normal_values)}, such as "
                       "'{example}' (first at data row {row}); list it in one of them (an empty cell means not reviewed)",
        "flag_value": f"flag column '{spec.flag}' has {{count}} value(s) that are not 1/0 or true/false, such as "
                      "'{example}' (first at data row {row}); export who was flagged as 1 or 0",
        "period_missing": f"period column '{spec.period}' has {{count}} empty value(s) (first at data row {{row}}); "
                          "fill them or drop those rows",
        "weight_value": f"weight column '{spec.weight}' has {{count}} value(s) that are not finite numbers >= 0, "
                        "such as '{example}' (first at data row {row}); fix them or drop audit.weight",
    })
    if spec.id:
        check_unique_ids(np.concatenate(parts["id"]), spec.id)
    group, group_names = combine_groups([np.concatenate(p) for p in group_parts], [c.names for c in group_codes],
                                        spec.group)
    table = AuditTable(
        name=spec.name or path.name, path=path.resolve(), fmt=fmt, sha256=sha256_file(path),
        score=np.concatenate(parts["score"]), group=group, group_names=group_names,
        label=np.concatenate(parts["label"]) if spec.label else None,
        flag=np.concatenate(parts["flag"]) if spec.flag else None,
        weight=np.concatenate(parts["weight"]) if spec.weight else None)
    if spec.period:
        order, table.period_names = order_periods(period_codes.names, spec.period, period_is_time)
        table.period = order.astype(np.int32)[np.concatenate(parts["period"])]
    check_groups(table, spec)
    if spec.label and spec.labels_known == "all" and (table.label < 0).any():
        raise AuditInputError(f"label column '{spec.label}' is empty on {int((table.label < 0).sum()):,} rows but "
                              "audit.labels_known=all; fill them, or set audit.labels_known=auto")
    return table


def id_keys(ids: pd.Series) -> np.ndarray:
    """A 64-bit key per id: integer ids as they are, others by a hash of their
    text (two different ids share a hash with probability about n^2 / 2^65)."""
    if pd.api.types.is_integer_dtype(ids) and not ids.isna().any():
        return ids.to_numpy(dtype=np.int64).view(np.uint64)
    return pd.util.hash_pandas_object(ids.astype(object).map(as_text), index=False).to_numpy()


def _release_arrow_memory() -> None:
    """Give the batches' buffers back to the system (Arrow's pool keeps them for reuse)."""
    try:
        import pyarrow as pa

        pa.default_memory_pool().release_unused()
    except (ImportError, AttributeError):
        pass


def check_unique_ids(keys: np.ndarray, column: str) -> None:
    ordered = np.sort(keys)
    if not (ordered[1:] == ordered[:-1]).any():
        return
    order = np.argsort(keys, kind="stable")  # only to name the first repeat
    repeat = keys[order][1:] == keys[order][:-1]
    if repeat.any():
        first = int(order[1:][repeat].min()) + 1
        raise AuditInputError(f"id column '{column}' has {int(repeat.sum()):,} repeated value(s) (first repeat at "
                              f"data row {first:,}); each case must appear once: remove the duplicates")


def combine_groups(codes: list[np.ndarray], names: list[list[str]], columns: list[str]):
    """One group per row; several columns make intersectional values 'a|b'."""
    for column, values in zip(columns, names):
        if len(values) < 2:
            raise AuditInputError(f"group column '{column}' has a single value '{values[0] if values else ''}'; an "
                                  "audit compares at least two groups: choose another column")
    combined = codes[0].astype(np.int64)
    for code, values in zip(codes[1:], names[1:]):
        combined = combined * len(values) + code
    span = int(np.prod([len(v) for v in names], dtype=float))
    if span <= 1 << 24:  # a lookup table instead of a sort of every row
        present = np.flatnonzero(np.bincount(combined, minlength=span))
        position = np.zeros(span, dtype=np.int64)
        position[present] = np.arange(len(present))
        compact = position[combined]
    else:
        present, compact = np.unique(combined, return_inverse=True)
    labels = []
    for value in present:
        parts = []
        for values in reversed(names):
            parts.append(values[value % len(values)])
            value //= len(values)
        labels.append("|".join(reversed(parts)))
    # Name order, so that tables list groups the same way in every audit of a source.
    order = np.argsort(labels, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    return rank[compact].astype(np.int32), [labels[i] for i in order]  # int32: 40 MB per 10 million rows


def check_groups(table: AuditTable, spec: AuditSpec) -> None:
    sizes = table.group_sizes()
    small = {g: n for g, n in sizes.items() if n < spec.min_group_size}
    if small:
        shown = ", ".join(f"'{g}' has {n:,}" for g, n in sorted(small.items(), key=lambda kv: kv[1])[:5])
        raise AuditInputError(f"{len(small)} group(s) have fewer than audit.min_group_size={spec.min_group_size} rows "
                              f"({shown}); merge small values in the file, or lower audit.min_group_size knowing "
                              "their rates will be very uncertain")


def order_periods(values: list[str], column: str, is_time: bool) -> tuple[np.ndarray, list[str]]:
    """Time order of the distinct period values: numbers by value, otherwise
    dates or periods such as 2026-03, 2026Q1 or 2026-03-31 as pandas parses them.
    Returns (rank of each first-seen code, names in order)."""
    numeric = pd.to_numeric(pd.Series(values), errors="coerce")
    if numeric.notna().all() and not is_time:
        keys = list(numeric)
    else:
        keys = []
        for value in values:
            try:
                keys.append(pd.Period(value, freq="D").start_time if is_time else pd.Period(value).start_time)
            except (ValueError, TypeError) as exc:
                raise AuditInputError(f"period column '{column}' has the value '{value}', which is not a date, a "
                                      "month (2026-03), a quarter (2026Q1) or a number; export periods in one of "
                                      "these forms") from exc
    order = np.argsort(np.array(keys, dtype=object if not numeric.notna().all() else float), kind="stable")
    rank = np.empty(len(values), dtype=np.int64)
    rank[order] = np.arange(len(values))
    return rank, [values[i] for i in order]
