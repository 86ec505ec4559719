"""Mitigations that work with any detector.

* ``group_balanced`` (before the detector): resample the training rows so
  every group value has as many rows as the largest one (drawing with
  replacement). The naive pre-processing baseline.
* ``group_thresholds`` (after the detector): apply the threshold policy
  inside each group, so every group is flagged at the same rate. Group-
  specific thresholds treat people differently by group, which is unlawful
  in some jurisdictions (disparate treatment): get legal review before use.
"""

from __future__ import annotations

import numpy as np

from evenflag.errors import ConfigError
from evenflag.thresholds import ThresholdSpec, _top_k, flag_scores

KINDS = ("none", "group_balanced", "group_thresholds")


def check_kind(kind: str) -> None:
    if kind not in KINDS:
        raise ConfigError(f"mitigation.kind '{kind}' is unknown; use one of {list(KINDS)}")


def balanced_rows(group: np.ndarray, seed: int) -> np.ndarray:
    """Indices into the training rows, every group drawn up to the largest group's size.

    Examples
    --------
    >>> rows = balanced_rows(np.array(["a", "a", "a", "b"]), seed=0)
    >>> sorted(np.array(["a", "a", "a", "b"])[rows].tolist())
    ['a', 'a', 'a', 'b', 'b', 'b']
    """
    rng = np.random.default_rng(seed)
    values, counts = np.unique(group, return_counts=True)
    target = counts.max()
    parts = []
    for value, count in zip(values, counts):
        members = np.flatnonzero(group == value)
        extra = rng.choice(members, size=target - count, replace=True) if target > count else np.empty(0, int)
        parts.append(np.concatenate([members, extra]))
    return np.sort(np.concatenate(parts))


def flag_per_group(spec: ThresholdSpec, test_scores, test_group, train_scores=None, train_group=None,
                   test_labels=None) -> np.ndarray:
    """The threshold policy applied inside each group value.

    For ``true_rate`` the overall number of flags (the number of true
    anomalies) is shared out in proportion to group size.

    Examples
    --------
    >>> flags = flag_per_group(ThresholdSpec("top_fraction", 0.5), np.array([1., 2, 3, 4, 10, 20]),
    ...                        np.array(["a", "a", "b", "b", "b", "b"]))
    >>> flags.tolist()
    [False, True, False, False, True, True]
    """
    test_scores = np.asarray(test_scores, dtype=np.float64)
    test_group = np.asarray(test_group)
    flags = np.zeros(len(test_scores), dtype=bool)
    total = int(np.sum(test_labels)) if spec.policy == "true_rate" else 0
    for value in np.unique(test_group):
        members = test_group == value
        if spec.policy == "true_rate":
            flags[members] = _top_k(test_scores[members], int(round(total * members.mean())))
        elif spec.policy == "train_quantile":
            flags[members] = flag_scores(spec, test_scores[members], train_scores[np.asarray(train_group) == value])
        else:
            flags[members] = flag_scores(spec, test_scores[members])
    return flags
