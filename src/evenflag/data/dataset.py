"""The dataset contract and the one function that builds it from a raw table.

Every adapter (bundled, package-mirrored, OpenML, file, synthetic) ends by
calling :func:`build_dataset`, so the rules for labels, group columns and
small groups live in one place.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
import pandas as pd

from evenflag.errors import DatasetError

GROUP_SEPARATOR = "|"
OTHER_GROUP = "other"


@dataclass
class Dataset:
    """A table ready for an anomaly-detection fairness study.

    Attributes
    ----------
    name : str
        Our key for the dataset (``adult``, ``my_claims``...).
    features : pandas.DataFrame
        Feature columns; group and label columns are removed.
    label : numpy.ndarray of int8
        1 = anomaly (the rare outcome), 0 = normal.
    group : pandas.Series (categorical)
        One value per row; several protected columns are joined with ``|``.
    protected : pandas.DataFrame
        The raw protected columns, kept so that ``group_as_feature`` can put
        them back among the features.
    source, sha256, licence, citation : str
        Provenance: where the bytes came from and their sha256.
    table_sha256 : str
        Content hash of the parsed table: two runs that read the same bytes with
        different parse options (``na_values``) differ here.
    merged_groups : list of str
        Group values folded into ``other`` because they were below
        ``min_group_size``.
    missing_values : dict
        Missing cells per feature column (filled when the data are prepared).
    """

    name: str
    features: pd.DataFrame
    label: np.ndarray
    group: pd.Series
    protected: pd.DataFrame
    source: str
    sha256: str
    licence: str = ""
    citation: str = ""
    group_columns: tuple[str, ...] = ()
    label_column: str = ""
    anomaly_values: tuple[str, ...] = ()
    merged_groups: list[str] = field(default_factory=list)
    table_sha256: str = ""   # content hash of the parsed table (set by load_dataset)
    missing_values: dict[str, int] = field(default_factory=dict)  # missing cells per feature column

    @property
    def n_rows(self) -> int:
        return len(self.label)

    @property
    def base_rate(self) -> float:
        return float(self.label.mean())

    def group_counts(self) -> dict[str, int]:
        return {str(k): int(v) for k, v in self.group.value_counts(sort=False).items()}

    def summary(self) -> dict:
        """Plain dict used by ``evenflag datasets`` and the run's provenance."""
        return {
            "name": self.name,
            "rows": self.n_rows,
            "features": self.features.shape[1],
            "group_columns": list(self.group_columns),
            "groups": self.group_counts(),
            "label": f"{self.label_column} in {list(self.anomaly_values)}",
            "base_rate": round(self.base_rate, 4),
            "source": self.source,
            "sha256": self.sha256,
        }


def _as_text(values: pd.Series) -> pd.Series:
    """Normalise raw values to stripped strings so configs can name them."""
    text = values.astype("string").str.strip()
    # UCI's Adult test file writes the label as '>50K.'; treat the dot as noise.
    return text.str.rstrip(".")


def build_dataset(
    frame: pd.DataFrame,
    *,
    name: str,
    label_column: str,
    anomaly_values: Sequence,
    group_columns: Sequence[str],
    source: str,
    sha256: str,
    drop_columns: Sequence[str] = (),
    min_group_size: int = 0,
    small_groups: str = "refuse",
    group_value_names: dict | None = None,
    licence: str = "",
    citation: str = "",
) -> Dataset:
    """Split a raw table into features, anomaly label and group.

    Parameters
    ----------
    frame : DataFrame
        The raw table, one row per person or case.
    label_column : str
        Column that holds the outcome.
    anomaly_values : sequence
        Values of ``label_column`` that count as anomalies (compared as
        stripped strings, so ``1`` and ``"1"`` both match an integer 1).
    group_columns : sequence of str
        One or more protected columns; several make intersectional values
        such as ``Female|Black``.
    min_group_size : int
        Group values with fewer rows are merged into ``other``
        (``small_groups="merge"``) or refused (``"refuse"``).
    group_value_names : dict, optional
        Names for coded group values per column, as the data's documentation
        gives them (``{"race": {"1": "black", "0": "other"}}``); every value
        present must be named.

    Returns
    -------
    Dataset

    Examples
    --------
    >>> import pandas as pd
    >>> raw = pd.DataFrame({"x": [1.0, 2.0, 3.0, 4.0], "region": ["a", "b", "a", "b"],
    ...                     "outcome": ["ok", "ok", "bad", "ok"]})
    >>> ds = build_dataset(raw, name="toy", label_column="outcome", anomaly_values=["bad"],
    ...                    group_columns=["region"], source="inline", sha256="-")
    >>> ds.label.tolist(), ds.group.tolist()
    ([0, 0, 1, 0], ['a', 'b', 'a', 'b'])
    """
    if len(frame) == 0:
        raise DatasetError(f"dataset '{name}' has no rows; check the file or filter that produced it")
    group_columns = [group_columns] if isinstance(group_columns, str) else list(group_columns)
    if not group_columns:
        raise DatasetError(f"dataset '{name}': no group column given; set dataset.group to one or more of {list(frame.columns)}")
    available = list(frame.columns)
    for column in [label_column, *group_columns]:
        if column not in frame.columns:
            role = "label" if column == label_column else "group"
            raise DatasetError(
                f"dataset '{name}': {role} column '{column}' not found; available columns: {available}"
            )
    if label_column in group_columns:
        raise DatasetError(f"dataset '{name}': '{label_column}' is both the label and a group column; pick different columns")

    wanted = {str(v).strip() for v in anomaly_values}
    if not wanted:
        raise DatasetError(f"dataset '{name}': no anomaly values given for label column '{label_column}'")
    label_text = _as_text(frame[label_column])
    if label_text.isna().any():
        raise DatasetError(
            f"dataset '{name}': label column '{label_column}' has {int(label_text.isna().sum())} missing values; "
            "drop those rows or fill them before loading"
        )
    present = set(label_text.unique())
    missing = wanted - present
    if missing == wanted:
        raise DatasetError(
            f"dataset '{name}': none of the anomaly values {sorted(wanted)} occur in column '{label_column}'; "
            f"values present: {sorted(present)[:20]}"
        )
    label = label_text.isin(wanted).to_numpy(dtype=np.int8)
    if label.sum() == len(label):
        raise DatasetError(
            f"dataset '{name}': every row matches the anomaly values {sorted(wanted)}; "
            "the anomaly label must mark the rare outcome"
        )

    protected = frame[group_columns].copy()
    for column in group_columns:
        if protected[column].isna().any():
            n_missing = int(protected[column].isna().sum())
            raise DatasetError(
                f"dataset '{name}': group column '{column}' has {n_missing} missing values; "
                "drop or fill those rows (for example with an explicit 'unknown' value) before loading"
            )
    parts = [_named_values(_as_text(protected[c]), c, (group_value_names or {}).get(c), name) for c in group_columns]
    unknown_named = sorted(set(group_value_names or {}) - set(group_columns))
    if unknown_named:
        raise DatasetError(f"dataset '{name}': group_value_names names column(s) {unknown_named}, which are not group "
                           f"columns {group_columns}")
    group_text = parts[0]
    for part in parts[1:]:
        group_text = group_text + GROUP_SEPARATOR + part

    group_text, merged = _apply_min_group_size(group_text, name, min_group_size, small_groups)
    values = sorted(group_text.unique())
    if len(values) < 2:
        raise DatasetError(
            f"dataset '{name}': group column(s) {group_columns} hold a single value {values}; "
            "a fairness comparison needs at least two groups"
        )
    group = pd.Series(pd.Categorical(group_text.to_numpy(dtype=object), categories=values), name="group")

    to_drop = [label_column, *group_columns, *[c for c in drop_columns if c in frame.columns]]
    unknown_drop = [c for c in drop_columns if c not in frame.columns]
    if unknown_drop:
        raise DatasetError(f"dataset '{name}': columns to drop {unknown_drop} not found; available columns: {available}")
    features = frame.drop(columns=to_drop).reset_index(drop=True)
    if features.shape[1] == 0:
        raise DatasetError(f"dataset '{name}': no feature columns are left after removing label, group and dropped columns")
    missing = check_features(features, protected.reset_index(drop=True), name)

    return Dataset(
        name=name,
        features=features,
        label=label,
        group=group,
        protected=protected.reset_index(drop=True),
        source=source,
        sha256=sha256,
        licence=licence,
        citation=citation,
        group_columns=tuple(group_columns),
        label_column=label_column,
        anomaly_values=tuple(sorted(wanted)),
        merged_groups=merged,
        missing_values=missing,
    )


# A text column is taken for a numeric column with stray text when at least
# this share of its non-missing cells read as numbers (common practice, no source).
NUMERIC_SHARE = 0.9


def check_features(features: pd.DataFrame, protected: pd.DataFrame, name: str) -> dict[str, int]:
    """Refuse feature columns that would mislead a detector; report missing cells.

    Rules, each with the count it found:

    * a text column whose non-missing cells are at least 90% numbers but not
      all (``12.5``, ``n/a``, ``7``) is refused: one-hot encoding it would turn
      every amount into its own feature. List the stray text in
      ``dataset.na_values`` or drop the column.
    * infinite numbers are refused (no scaling is defined for them).
    * a feature column equal to a group column (a duplicated header such as
      ``region.1``) is refused: it would hand the detector the group.
    * missing cells are allowed and filled when the data are prepared
      (numbers with the training median, text as its own category); the
      counts per column are returned and printed as one warning line.

    >>> import pandas as pd
    >>> feats = pd.DataFrame({"amount": [str(v) for v in range(19)] + ["n/a"]})
    >>> check_features(feats, pd.DataFrame({"region": ["a", "b"] * 10}), "toy")
    Traceback (most recent call last):
    ...
    evenflag.errors.DatasetError: dataset 'toy': column 'amount' holds numbers but also text in 1 row(s) (values: 'n/a'); list that text in dataset.na_values to read it as missing, or drop the column (dataset.drop)
    """
    for column in features.columns:
        series = features[column]
        if pd.api.types.is_numeric_dtype(series) and not pd.api.types.is_bool_dtype(series):
            values = series.to_numpy(dtype=np.float64, na_value=np.nan)
            n_inf = int(np.isinf(values).sum())
            if n_inf:
                raise DatasetError(f"dataset '{name}': column '{column}' has {n_inf} infinite value(s); replace them "
                                   "in the data, list their text (e.g. inf) in dataset.na_values to read them as "
                                   "missing, or drop the column (dataset.drop)")
            continue
        text = series.dropna().astype(str).str.strip()
        if text.nunique() < 2:
            continue
        numeric = pd.to_numeric(text, errors="coerce").notna()
        if NUMERIC_SHARE <= numeric.mean() < 1.0:
            stray = sorted(text[~numeric].unique())
            rows = int((~numeric).sum())
            shown = ", ".join(repr(v) for v in stray[:5]) + (" ..." if len(stray) > 5 else "")
            raise DatasetError(f"dataset '{name}': column '{column}' holds numbers but also text in {rows} row(s) "
                               f"(values: {shown}); list that text in dataset.na_values to read it as missing, "
                               "or drop the column (dataset.drop)")
    for group_column in protected.columns:
        group_text = protected[group_column].astype("string")
        for column in features.columns:
            if features[column].nunique(dropna=False) == group_text.nunique(dropna=False) and \
                    features[column].astype("string").equals(group_text.rename(column)):
                raise DatasetError(f"dataset '{name}': feature column '{column}' repeats group column "
                                   f"'{group_column}' (a duplicated header?) and would give the detector the group; "
                                   f"remove it or drop it with dataset.drop=[{column}]")
    counts = features.isna().sum()
    missing = {str(c): int(n) for c, n in counts.items() if n}
    if missing:
        from evenflag.errors import warn_line

        detail = ", ".join(f"{c}: {n}" for c, n in list(missing.items())[:6]) + (" ..." if len(missing) > 6 else "")
        warn_line(f"dataset '{name}': {sum(missing.values())} missing value(s) in {len(missing)} feature column(s) "
                  f"({detail}) are filled (numbers: the training median; text: a '(missing)' category)")
    return missing


def _named_values(text: pd.Series, column: str, names: dict | None, dataset: str) -> pd.Series:
    if not names:
        return text
    names = {str(k).strip(): str(v) for k, v in names.items()}
    unnamed = sorted(set(text.unique()) - set(names))
    if unnamed:
        raise DatasetError(f"dataset '{dataset}': group column '{column}' has values {unnamed[:10]} without a name in "
                           f"group_value_names.{column}; add them")
    return text.map(names).astype("string")


def _apply_min_group_size(group_text: pd.Series, name: str, min_size: int, policy: str):
    if policy not in ("merge", "refuse"):
        raise DatasetError(f"dataset '{name}': small_groups must be 'merge' or 'refuse', got '{policy}'")
    if min_size <= 0:
        return group_text, []
    counts = group_text.value_counts()
    small = sorted(str(v) for v in counts[counts < min_size].index)
    if not small:
        return group_text, []
    if policy == "refuse":
        sizes = {v: int(counts[v]) for v in small}
        raise DatasetError(
            f"dataset '{name}': group values below min_group_size={min_size}: {sizes}; "
            "set dataset.small_groups=merge to fold them into 'other', or lower dataset.min_group_size"
        )
    merged = group_text.where(~group_text.isin(small), OTHER_GROUP)
    warnings.warn(f"dataset '{name}': merged small group values {small} into '{OTHER_GROUP}'", stacklevel=3)
    return merged, small
