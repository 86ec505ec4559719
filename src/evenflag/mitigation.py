"""Mitigations that work with any detector.

* ``group_balanced`` (before the detector): resample the training rows so
  every group value has as many rows as the largest one (drawing with
  replacement). The naive pre-processing baseline.
* ``group_thresholds`` (after the detector): apply the threshold policy
  inside each group, so every group is flagged at the same rate. Group-
  specific thresholds treat people differently by group, which is unlawful
  in some jurisdictions (disparate treatment): get legal review before use.

With ``top_fraction`` and ``true_rate`` the overall number of flags is fixed
first (round(fraction x rows), or the number of anomalies) and shared out
between groups by largest remainder in proportion to group size, so the total
is kept and every group's share is within one flag of its exact quota. A group
smaller than 1 / fraction rows has a quota below one flag: it gets one only if
its remainder is among the largest, so such groups are flagged at 0 or at a
rate well above ``fraction``; their flag rates say little.
"""

from __future__ import annotations

import numpy as np

from evenflag.apportion import largest_remainder
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

    Examples
    --------
    >>> flags = flag_per_group(ThresholdSpec("top_fraction", 0.5), np.array([1., 2, 3, 4, 10, 20]),
    ...                        np.array(["a", "a", "b", "b", "b", "b"]))
    >>> flags.tolist()
    [False, True, False, False, True, True]
    >>> group = np.array(["small"] * 10 + ["large"] * 190)  # 6% of 200 = 12 flags: quotas 0.6 and 11.4
    >>> flags = flag_per_group(ThresholdSpec("top_fraction", 0.06), np.arange(200.0), group)
    >>> int(flags[:10].sum()), int(flags[10:].sum())
    (1, 11)
    """
    test_scores = np.asarray(test_scores, dtype=np.float64)
    test_group = np.asarray(test_group)
    flags = np.zeros(len(test_scores), dtype=bool)
    values, sizes = np.unique(test_group, return_counts=True)
    if spec.policy == "train_quantile":
        for value in values:
            members = test_group == value
            flags[members] = flag_scores(spec, test_scores[members], train_scores[np.asarray(train_group) == value])
        return flags
    total = int(np.sum(test_labels)) if spec.policy == "true_rate" else int(round(spec.fraction * len(test_scores)))
    for value, quota in zip(values, largest_remainder(sizes, total)):
        members = test_group == value
        flags[members] = _top_k(test_scores[members], int(quota))
    return flags
