"""Sharing a whole number of rows (or flags) out in proportion to sizes."""

from __future__ import annotations

import numpy as np


def largest_remainder(sizes, total: int) -> np.ndarray:
    """Largest-remainder (Hamilton) apportionment of ``total`` in proportion to
    ``sizes``: every share is within one of its exact quota, the shares add up to
    ``total`` (as long as no share is capped by its size) and none exceeds its
    size. Equal remainders go to the earlier entry.

    Examples
    --------
    >>> largest_remainder(np.array([10, 190]), 10).tolist()
    [1, 9]
    >>> largest_remainder(np.array([5, 5, 5]), 2).tolist()
    [1, 1, 0]
    """
    sizes = np.asarray(sizes, dtype=np.int64)
    if total <= 0 or sizes.sum() == 0:
        return np.zeros_like(sizes)
    exact = sizes * (total / sizes.sum())
    counts = np.floor(exact).astype(np.int64)
    remainder = int(total - counts.sum())
    order = np.argsort(-(exact - counts), kind="stable")
    counts[order[:remainder]] += 1
    return np.minimum(counts, sizes)
