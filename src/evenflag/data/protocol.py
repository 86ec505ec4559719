"""Evaluation protocols: a dataset and a seed become train and test rows.

``one_class`` trains on normal rows only (the classic anomaly-detection
setting); ``contaminated`` trains on normal rows mixed with anomalies at a
given rate (what a deployment sees). Both split every label x group stratum
separately so that group shares carry over to train and test.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

import numpy as np

from evenflag.apportion import largest_remainder
from evenflag.data.dataset import Dataset
from evenflag.errors import ProtocolError

PROTOCOL_KINDS = ("one_class", "contaminated")


@dataclass
class ProtocolSpec:
    """Structured config of configs/protocol/*.yaml."""

    kind: str = "one_class"
    test_fraction: float = 0.3
    test_anomaly_rate: Optional[float] = None   # None keeps the natural rate
    train_anomaly_rate: float = 0.0             # used by 'contaminated' only
    min_group_size: int = 10                    # least test rows per group value
    group_as_feature: bool = False


@dataclass
class Split:
    train: np.ndarray   # row indices into the dataset, sorted
    test: np.ndarray


def _subsample_by_group(rows: np.ndarray, group_codes: np.ndarray, keep: int, rng) -> np.ndarray:
    if keep >= len(rows):
        return rows
    codes = group_codes[rows]
    values = np.unique(codes)
    sizes = np.array([(codes == v).sum() for v in values])
    quota = largest_remainder(sizes, keep)
    chosen = [rng.permutation(rows[codes == v])[:q] for v, q in zip(values, quota)]
    return np.concatenate(chosen)


def _target_anomalies(n_normal: int, rate: float) -> int:
    return int(round(rate / (1.0 - rate) * n_normal))


def make_split(dataset: Dataset, spec: ProtocolSpec, seed: int) -> Split:
    """Train and test row indices for one seed.

    Examples
    --------
    >>> from evenflag.data.registry import load_dataset
    >>> split = make_split(load_dataset("german_credit"), ProtocolSpec(), seed=0)
    >>> len(set(split.train) & set(split.test))
    0
    """
    check_spec(spec)
    rng = np.random.default_rng(seed)
    label = dataset.label
    group_codes = dataset.group.cat.codes.to_numpy()
    n_groups = len(dataset.group.cat.categories)

    test_pool, train_pool = [], []
    for lab in (0, 1):
        for g in range(n_groups):
            stratum = np.flatnonzero((label == lab) & (group_codes == g))
            stratum = rng.permutation(stratum)
            n_test = int(round(len(stratum) * spec.test_fraction))
            test_pool.append(stratum[:n_test])
            train_pool.append(stratum[n_test:])
    test_pool = np.concatenate(test_pool)
    train_pool = np.concatenate(train_pool)

    test = _set_anomaly_rate(test_pool, label, group_codes, spec.test_anomaly_rate, rng, "test")
    if spec.kind == "one_class":
        train = train_pool[label[train_pool] == 0]
    else:
        train = _set_anomaly_rate(train_pool, label, group_codes, spec.train_anomaly_rate, rng, "train")

    _check(dataset, spec, train, test)
    return Split(train=np.sort(train), test=np.sort(test))


def _set_anomaly_rate(rows, label, group_codes, rate, rng, part):
    """Rows with an overall anomaly rate of ``rate`` whose groups keep the
    ratios between their natural anomaly rates (each group's rate is scaled by
    the same factor c). Below the natural rate anomalies are subsampled; above
    it normal rows are. Each group's count is rounded to the nearest row, so
    the ratios hold to within one row per group."""
    if rate is None:
        return rows
    codes = group_codes[rows]
    is_anomaly = label[rows] == 1
    values = np.unique(codes)
    anomalies = np.array([(is_anomaly & (codes == v)).sum() for v in values], dtype=np.float64)
    normals = np.array([(~is_anomaly & (codes == v)).sum() for v in values], dtype=np.float64)
    natural = anomalies / np.maximum(anomalies + normals, 1)
    overall = anomalies.sum() / max(anomalies.sum() + normals.sum(), 1)
    if anomalies.sum() == 0 or rate == overall:
        return rows

    def counts_at(c):
        """(anomalies, normals) per group when every group's rate is c times its natural rate."""
        scaled = np.minimum(c * natural, 1 - 1e-12)
        if c <= 1:  # keep the normal rows, keep fewer anomalies
            kept = np.where(normals > 0, normals * scaled / (1 - scaled), c * anomalies)
            return np.minimum(kept, anomalies), normals
        kept = np.where(anomalies > 0, anomalies * (1 - scaled) / np.maximum(scaled, 1e-300), normals)
        return anomalies, np.minimum(kept, normals)

    def overall_at(c):
        a, n = counts_at(c)
        return a.sum() / (a.sum() + n.sum())

    low, high = (0.0, 1.0) if rate < overall else (1.0, 1.0 / natural.max())
    if rate > overall and overall_at(high * (1 - 1e-9)) < rate:
        raise ProtocolError(
            f"protocol.{part}_anomaly_rate={rate} cannot be reached while keeping the groups' anomaly rates in "
            f"proportion (at most {overall_at(high * (1 - 1e-9)):.3f} here); lower the rate or set it to null")
    for _ in range(100):  # bisection on the common factor c; overall_at is increasing in c
        middle = (low + high) / 2
        low, high = (middle, high) if overall_at(middle) < rate else (low, middle)
    keep_a, keep_n = (np.rint(x).astype(int) for x in counts_at((low + high) / 2))
    chosen = []
    for v, n_a, n_n in zip(values, keep_a, keep_n):
        chosen.append(rng.permutation(rows[is_anomaly & (codes == v)])[:n_a])
        chosen.append(rng.permutation(rows[~is_anomaly & (codes == v)])[:n_n])
    return np.concatenate(chosen)


def base_rates(label: np.ndarray, group: np.ndarray) -> dict[str, float]:
    """Share of anomalies in each group value.

    Examples
    --------
    >>> base_rates(np.array([1, 0, 0, 0]), np.array(["a", "a", "b", "b"]))
    {'a': 0.5, 'b': 0.0}
    """
    group = np.asarray(group).astype(str)
    return {str(v): float(label[group == v].mean()) for v in np.unique(group)}


def hold_out(group: np.ndarray, fraction: float, seed: int) -> np.ndarray:
    """Boolean mask of about ``fraction`` of the rows, the same share of every
    group value (rounded per group, at least one row and one left over where a
    group has two or more rows). Used to set a threshold on rows the detector
    was not fitted on.

    Examples
    --------
    >>> mask = hold_out(np.array(["a"] * 10 + ["b"] * 20), 0.2, seed=0)
    >>> int(mask[:10].sum()), int(mask[10:].sum())
    (2, 4)
    """
    rng = np.random.default_rng(seed)
    group = np.asarray(group).astype(str)
    mask = np.zeros(len(group), dtype=bool)
    for value in np.unique(group):
        members = np.flatnonzero(group == value)
        take = int(round(len(members) * fraction))
        if len(members) >= 2:
            take = min(max(take, 1), len(members) - 1)
        mask[rng.permutation(members)[:take]] = True
    return mask


def check_spec(spec: ProtocolSpec) -> None:
    """Refuse values out of range, before any work."""
    if spec.kind not in PROTOCOL_KINDS:
        raise ProtocolError(f"protocol.kind '{spec.kind}' is unknown; use one of {list(PROTOCOL_KINDS)}")
    if not 0.0 < spec.test_fraction < 1.0:
        raise ProtocolError(f"protocol.test_fraction must be between 0 and 1 (exclusive), got {spec.test_fraction}")
    if spec.test_anomaly_rate is not None and not 0.0 < spec.test_anomaly_rate < 1.0:
        raise ProtocolError(f"protocol.test_anomaly_rate must be between 0 and 1 (exclusive) or null, got {spec.test_anomaly_rate}")
    if not 0.0 <= spec.train_anomaly_rate < 1.0:
        raise ProtocolError(f"protocol.train_anomaly_rate must be in [0, 1), got {spec.train_anomaly_rate}")


def _check(dataset: Dataset, spec: ProtocolSpec, train: np.ndarray, test: np.ndarray) -> None:
    name = dataset.name
    if len(train) == 0:
        raise ProtocolError(f"dataset '{name}': the training set is empty; lower protocol.test_fraction")
    n_anomalies = int(dataset.label[test].sum())
    if n_anomalies == 0:
        raise ProtocolError(
            f"dataset '{name}': the test set has no anomalies after subsampling; "
            "raise protocol.test_anomaly_rate or protocol.test_fraction"
        )
    if n_anomalies == len(test):
        raise ProtocolError(f"dataset '{name}': the test set has no normal rows; lower protocol.test_anomaly_rate")
    groups = dataset.group.to_numpy()[test]
    values, counts = np.unique(groups.astype(str), return_counts=True)
    small = {v: int(c) for v, c in zip(values, counts) if c < spec.min_group_size}
    missing = sorted(set(map(str, dataset.group.cat.categories)) - set(values))
    if missing or small:
        detail = {**small, **{m: 0 for m in missing}}
        raise ProtocolError(
            f"dataset '{name}': test rows per group below protocol.min_group_size={spec.min_group_size}: {detail}; "
            "raise protocol.test_fraction, merge small groups (dataset.small_groups=merge) or lower protocol.min_group_size"
        )
