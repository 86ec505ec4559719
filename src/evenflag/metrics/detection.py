"""Detection quality: how well scores rank anomalies and how good the flags are.

Each ``*_from_counts`` function takes :class:`Counts` and returns arrays with
one value per weight vector; the plain functions are the public, validated
entry points for one set of rows.
"""

from __future__ import annotations

import numpy as np

from evenflag.metrics.inputs import Counts, MetricInput, safe_divide


def auroc_from_blocks(pos: np.ndarray, neg: np.ndarray) -> np.ndarray:
    """AUROC from weighted positive/negative counts per distinct score (ascending).

    Ties count one half, as in the Mann-Whitney statistic.
    """
    return auroc_from_cumulative(pos, neg, np.cumsum(neg, axis=-1))


def auroc_from_cumulative(pos, neg, cum_neg) -> np.ndarray:
    """As :func:`auroc_from_blocks`, reusing ``cum_neg = cumsum(neg)`` computed once."""
    wins = (pos * (cum_neg - 0.5 * neg)).sum(axis=-1, dtype=np.float64)
    return safe_divide(wins, pos.sum(axis=-1, dtype=np.float64) * cum_neg[..., -1].astype(np.float64))


def average_precision_from_blocks(pos: np.ndarray, neg: np.ndarray) -> np.ndarray:
    """Average precision: sum over distinct thresholds of recall step x precision
    (the definition scikit-learn's ``average_precision_score`` uses)."""
    pos_desc = pos[..., ::-1]
    all_desc = pos_desc + neg[..., ::-1]
    precision = safe_divide(np.cumsum(pos_desc, axis=-1), np.cumsum(all_desc, axis=-1))
    precision = np.nan_to_num(precision)
    return safe_divide((pos_desc * precision).sum(axis=-1), pos.sum(axis=-1))


def detection_from_counts(counts: Counts) -> dict[str, np.ndarray]:
    pos = counts.blocks[:, :, 1, :].sum(axis=1)
    neg = counts.blocks[:, :, 0, :].sum(axis=1)
    true_flags = counts.flagged[:, :, 1].sum(axis=1)
    all_flags = counts.flagged.sum(axis=(1, 2))
    anomalies = counts.total[:, :, 1].sum(axis=1)
    precision = safe_divide(true_flags, all_flags)
    recall = safe_divide(true_flags, anomalies)
    return {
        "auroc": auroc_from_blocks(pos, neg),
        "average_precision": average_precision_from_blocks(pos, neg),
        "flag_precision": precision,
        "flag_recall": recall,
        "flag_f1": safe_divide(2 * true_flags, all_flags + anomalies),
        "r_precision": r_precision_from_blocks(pos, neg, anomalies),
    }


def r_precision_from_blocks(pos, neg, k) -> np.ndarray:
    """R-precision: the share of anomalies among the ``k`` highest scores, ``k``
    = the number of true anomalies. A tie block that straddles the cut counts
    in proportion."""
    pos_desc, all_desc = pos[..., ::-1], (pos + neg)[..., ::-1]
    cum_all = np.cumsum(all_desc, axis=-1)
    cum_pos = np.cumsum(pos_desc, axis=-1)
    k = np.asarray(k, dtype=np.float64).reshape(-1)
    out = np.full(len(k), np.nan)
    for row in range(len(k)):  # one searchsorted per weight vector: O(B log n)
        if k[row] <= 0:
            continue
        cut = int(np.searchsorted(cum_all[row], k[row], side="left"))
        cut = min(cut, cum_all.shape[-1] - 1)
        before_all = cum_all[row, cut - 1] if cut > 0 else 0.0
        before_pos = cum_pos[row, cut - 1] if cut > 0 else 0.0
        take = k[row] - before_all
        share = pos_desc[row, cut] / all_desc[row, cut] if all_desc[row, cut] > 0 else 0.0
        out[row] = (before_pos + take * share) / k[row]
    return out


def _one(key: str, label, score, flag=None, group=None) -> float:
    group = np.zeros(len(label), dtype=int) if group is None else group
    # Detection metrics ignore groups; give a dummy second group so validation passes.
    group = np.where(np.arange(len(label)) == 0, "a", "b") if len(np.unique(group)) < 2 else group
    counts = MetricInput.build(label, score, flag, group).counts()
    return float(detection_from_counts(counts)[key][0])


def auroc(label, score) -> float:
    """Area under the ROC curve.

    Examples
    --------
    >>> auroc([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8])
    0.75
    """
    return _one("auroc", label, score)


def average_precision(label, score) -> float:
    """Average precision of the ranking.

    Examples
    --------
    >>> round(average_precision([0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8]), 6)
    0.833333
    """
    return _one("average_precision", label, score)
