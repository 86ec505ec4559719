"""Validated metric inputs and the weighted counts every metric is built from.

All metrics are functions of a few count tables, computed once per call:

* ``flagged[b, g, l]`` and ``total[b, g, l]``: weighted number of flagged
  rows and of all rows in group ``g`` with label ``l``;
* ``blocks[b, g, l, k]``: weighted number of rows of group ``g`` and label
  ``l`` whose score equals the ``k``-th distinct score (ascending).

``b`` indexes weight vectors: one vector of ones for the point estimate, or
a batch of bootstrap weights. Writing every metric against these tables is
what lets the bootstrap evaluate hundreds of resamples without a Python loop
over them.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from evenflag.errors import MetricInputError


class MetricNaNWarning(UserWarning):
    """A metric is undefined for these inputs and was reported as NaN."""


def warn_undefined(key: str, reason: str) -> None:
    warnings.warn(f"{key} is undefined ({reason}); reported as NaN", MetricNaNWarning, stacklevel=3)


@dataclass
class MetricInput:
    """Label, score, flag and group of the test rows, validated and indexed.

    Parameters
    ----------
    label : array of {0, 1}
        1 = anomaly.
    score : array of float
        Higher = more anomalous.
    flag : array of bool
        Rows whose score passed the threshold.
    group : array
        Group value of each row (any hashable; shown as text).
    embedding : 2-d array, optional
        Per-row representation, for ``leakage_auroc``.
    """

    label: np.ndarray
    score: np.ndarray
    flag: np.ndarray
    group: np.ndarray
    group_names: list[str]
    embedding: np.ndarray | None = None
    reference: int = 0
    rule: "FlagRule | None" = None

    @classmethod
    def build(cls, label, score=None, flag=None, group=None, embedding=None, reference_group=None,
              rule: "FlagRule | None" = None) -> "MetricInput":
        label = np.asarray(label)
        n = len(label)
        if n == 0:
            raise MetricInputError("metric inputs are empty; there are no test rows to evaluate")
        if not np.isin(label, (0, 1)).all():
            raise MetricInputError("label must hold only 0 (normal) and 1 (anomaly)")
        score = np.zeros(n) if score is None else np.asarray(score, dtype=np.float64)
        flag = np.zeros(n, dtype=bool) if flag is None else np.asarray(flag).astype(bool)
        if group is None:
            raise MetricInputError("group is required: one group value per row")
        if isinstance(getattr(group, "dtype", None), pd.CategoricalDtype):
            names, codes = _categorical_codes(pd.Categorical(group))  # no text per row: fast on millions of rows
            group = codes
        else:
            group = np.asarray(group)
            names = None
        for name, values in (("score", score), ("flag", flag), ("group", group)):
            if values.ndim != 1 or len(values) != n:
                raise MetricInputError(f"{name} has shape {values.shape}; expected ({n},) like label")
        if not np.isfinite(score).all():
            raise MetricInputError(f"score has {int((~np.isfinite(score)).sum())} NaN or infinite values; the detector must return finite scores")
        if names is None:
            names, codes = np.unique(group.astype(str), return_inverse=True)
        if len(names) < 2:
            raise MetricInputError(f"group has a single value {list(names)}; fairness metrics need at least two groups")
        if embedding is not None:
            embedding = np.asarray(embedding, dtype=np.float64)
            if embedding.ndim != 2 or len(embedding) != n:
                raise MetricInputError(f"embedding has shape {embedding.shape}; expected ({n}, d)")
        names = [str(v) for v in names]
        sizes = np.bincount(codes, minlength=len(names))
        if reference_group is None:
            reference = int(np.argmax(sizes))  # the largest group; ties go to the first name
        elif str(reference_group) in names:
            reference = names.index(str(reference_group))
        else:
            raise MetricInputError(f"metrics.reference_group '{reference_group}' is not a group value here; "
                                   f"use one of {names} or null (the largest group)")
        return cls(label.astype(np.int8), score, flag, codes.astype(np.int64), names, embedding, reference, rule)

    @property
    def n_groups(self) -> int:
        return len(self.group_names)

    def __post_init__(self):
        self._order = None

    # Score order and distinct-score blocks, computed once and reused by every metric.
    def _index(self):
        if self._order is None:
            order = np.argsort(self.score, kind="stable")
            sorted_scores = self.score[order]
            starts = np.flatnonzero(np.r_[True, sorted_scores[1:] != sorted_scores[:-1]])
            self._order = order
            self._starts = starts
            self._values = sorted_scores[starts]
            block_of_sorted = np.cumsum(np.r_[False, sorted_scores[1:] != sorted_scores[:-1]])
            self._block = np.empty(len(order), dtype=np.int64)
            self._block[order] = block_of_sorted
        return self._order, self._starts, self._values, self._block

    def counts(self, weights: np.ndarray | None = None) -> "Counts":
        """Count tables for a batch of row weights (shape (B, n)); None = one vector of ones."""
        order, starts, values, block = self._index()
        G, nb = self.n_groups, len(starts)
        cell = self.group * 2 + self.label
        if weights is None:
            total = np.bincount(cell, minlength=2 * G).reshape(1, G, 2).astype(np.float64)
            flagged = np.bincount(cell[self.flag], minlength=2 * G).reshape(1, G, 2).astype(np.float64)
            blocks = np.bincount(cell * nb + block, minlength=2 * G * nb).reshape(1, G, 2, nb).astype(np.float64)
        else:
            weights = np.atleast_2d(weights)
            onehot = np.zeros((len(cell), 2 * G), dtype=weights.dtype)
            onehot[np.arange(len(cell)), cell] = 1
            total = (weights @ onehot).reshape(-1, G, 2).astype(np.float64)
            flagged = (weights[:, self.flag] @ onehot[self.flag]).reshape(-1, G, 2).astype(np.float64)
            w_sorted = weights[:, order]
            cell_sorted = cell[order]
            # float32 holds integer counts exactly up to 2**24 rows and halves memory traffic.
            blocks = np.empty((len(weights), G, 2, nb), dtype=np.float32)
            for c in range(2 * G):
                masked = np.where(cell_sorted == c, w_sorted, 0)
                summed = masked if nb == len(order) else np.add.reduceat(masked, starts, axis=1)
                blocks[:, c // 2, c % 2, :] = summed
        return Counts(total=total, flagged=flagged, blocks=blocks, values=values, group_names=self.group_names,
                      reference=self.reference)

    def binned_cells(self, n_bins: int):
        """Row counts per (group, label, score bin, flag), bins cut at pooled score
        quantiles (tied scores always share a bin), and each bin's mean score.

        Used by the bootstrap on large inputs: a resample inside a group x label
        stratum is then one multinomial draw over that stratum's cells.
        """
        order, starts, values, block = self._index()
        n = len(self.label)
        # A block (distinct score) goes to the bin of the sorted position where it starts.
        block_bin = np.minimum((starts * n_bins) // n, n_bins - 1)
        _, block_bin = np.unique(block_bin, return_inverse=True)
        bins = int(block_bin.max()) + 1
        row_bin = block_bin[block]
        cell = ((self.group * 2 + self.label) * bins + row_bin) * 2 + self.flag
        cells = np.bincount(cell, minlength=self.n_groups * 2 * bins * 2).reshape(self.n_groups, 2, bins, 2)
        bin_mean = np.bincount(row_bin, weights=self.score, minlength=bins) / np.bincount(row_bin, minlength=bins)
        return cells, bin_mean


def _categorical_codes(group: pd.Categorical) -> tuple[np.ndarray, np.ndarray]:
    """(names, codes) of a categorical as ``np.unique`` of its text would give
    them: the values present, sorted as text."""
    if (group.codes < 0).any():
        raise MetricInputError(f"group has {int((group.codes < 0).sum())} missing values; give every row a group")
    present = np.flatnonzero(np.bincount(group.codes, minlength=len(group.categories)))
    texts = np.array([str(group.categories[i]) for i in present])
    order = np.argsort(texts, kind="stable")
    rank = np.full(len(group.categories), -1, dtype=np.int64)
    rank[present[order]] = np.arange(len(present))
    return texts[order], rank[group.codes]


def counts_from_cells(cells: np.ndarray, bin_mean: np.ndarray, group_names: list[str], reference: int = 0) -> "Counts":
    """Counts for a batch of (B, G, 2, bins, 2) cell tables (last axis = flag)."""
    cells = cells.astype(np.float64)
    return Counts(
        total=cells.sum(axis=(3, 4)),
        flagged=cells[..., 1].sum(axis=3),
        blocks=cells.sum(axis=4),
        values=bin_mean,
        group_names=group_names,
        reference=reference,
    )


@dataclass
class Counts:
    """Weighted count tables; leading axis = weight vectors (resamples)."""

    total: np.ndarray     # (B, G, 2)
    flagged: np.ndarray   # (B, G, 2)
    blocks: np.ndarray    # (B, G, 2, n_blocks)
    values: np.ndarray    # (n_blocks,) distinct scores, ascending
    group_names: list[str]
    reference: int = 0    # index of the reference group of the signed per-group keys


@dataclass(frozen=True)
class FlagRule:
    """How the flags were set from the scores, so a resample can set them again.

    ``top_fraction``: the ``fraction`` of rows with the highest scores (rows tied
    with the last flagged score are flagged too); ``top_anomalies``: as many rows
    as there are anomalies. Flags set any other way (a threshold learned on
    other rows, per-group thresholds) have no rule and stay as they are.
    """

    kind: str
    fraction: float = 0.0


def rethreshold(counts: Counts, rule: FlagRule) -> Counts:
    """The same counts with ``flagged`` set again by ``rule`` in every weight vector.

    The threshold of a top-fraction policy is itself estimated from the test
    rows; keeping the original flags in a resample treats it as known and
    overstates the variance of a difference between groups (the fixed number of
    flags makes group rates move against each other).
    """
    pooled = counts.blocks.sum(axis=(1, 2))                     # (B, nb)
    if rule.kind == "top_fraction":
        k = np.round(rule.fraction * pooled.sum(axis=1))
    elif rule.kind == "top_anomalies":
        k = counts.total[:, :, 1].sum(axis=1)
    else:
        raise MetricInputError(f"unknown flag rule '{rule.kind}'; use top_fraction or top_anomalies")
    from_top = np.cumsum(pooled[:, ::-1], axis=1)
    cut = np.minimum((from_top < k[:, None]).sum(axis=1), pooled.shape[1] - 1)  # blocks above the cut, from the top
    suffix = np.cumsum(counts.blocks[..., ::-1], axis=-1, dtype=np.float64)
    flagged = np.take_along_axis(suffix, cut[:, None, None, None], axis=-1)[..., 0]
    flagged = np.where((k > 0)[:, None, None], flagged, 0.0)
    return Counts(total=counts.total, flagged=flagged, blocks=counts.blocks, values=counts.values,
                  group_names=counts.group_names, reference=counts.reference)


def spread(values: np.ndarray) -> np.ndarray:
    """Largest minus smallest defined value along the last axis; NaN unless at
    least two values are defined (the gap between groups that have the metric)."""
    with np.errstate(all="ignore"):
        defined = np.isfinite(values)
        hi = np.where(defined, values, -np.inf).max(axis=-1)
        lo = np.where(defined, values, np.inf).min(axis=-1)
    return np.where(defined.sum(axis=-1) >= 2, hi - lo, np.nan)


def safe_divide(numerator, denominator):
    numerator = np.asarray(numerator, dtype=np.float64)
    denominator = np.asarray(denominator, dtype=np.float64)
    out = np.full(np.broadcast(numerator, denominator).shape, np.nan)
    np.divide(numerator, denominator, out=out, where=denominator > 0)
    return out
