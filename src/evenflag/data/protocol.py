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


def _allocate(sizes: np.ndarray, total: int) -> np.ndarray:
    """Largest-remainder allocation of ``total`` in proportion to ``sizes``,
    so every stratum gets its share to within one row."""
    if total <= 0 or sizes.sum() == 0:
        return np.zeros_like(sizes)
    exact = sizes * (total / sizes.sum())
    counts = np.floor(exact).astype(int)
    remainder = total - counts.sum()
    order = np.argsort(-(exact - counts), kind="stable")
    counts[order[:remainder]] += 1
    return np.minimum(counts, sizes)


def _subsample_by_group(rows: np.ndarray, group_codes: np.ndarray, keep: int, rng) -> np.ndarray:
    if keep >= len(rows):
        return rows
    codes = group_codes[rows]
    values = np.unique(codes)
    sizes = np.array([(codes == v).sum() for v in values])
    quota = _allocate(sizes, keep)
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
    _validate(spec)
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
    if rate is None:
        return rows
    normal = rows[label[rows] == 0]
    anomalous = rows[label[rows] == 1]
    wanted = _target_anomalies(len(normal), rate)
    if wanted <= len(anomalous):
        anomalous = _subsample_by_group(anomalous, group_codes, wanted, rng)
    elif rate > 0:
        # Not enough anomalies: keep them all and thin the normal rows instead.
        keep_normal = int(round(len(anomalous) * (1.0 - rate) / rate))
        normal = _subsample_by_group(normal, group_codes, keep_normal, rng)
    return np.concatenate([normal, anomalous])


def _validate(spec: ProtocolSpec) -> None:
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
