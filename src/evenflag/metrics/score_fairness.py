"""Threshold-free fairness: how differently scores fall on each group.

* ``score_distance``: Wasserstein-1 distance between two groups' scores after
  mapping every score s to its pooled empirical CDF value F(s) = share of all
  test rows (every group pooled) with a score <= s. Tied scores therefore share
  one value, the highest rank of the tie divided by n. Only the order of
  scores matters, so it is unchanged by any increasing transform and
  comparable across detectors. It lies in [0, 0.5]: 0 when the groups' scores
  are identically distributed, 0.5 when every score of one group lies above
  every score of the other (whatever the group sizes).
* ``score_distance_raw``: the same on raw scores (scipy's definition).
* ``score_ks``: two-sample Kolmogorov-Smirnov statistic.
* ``group_auroc_gap`` and ``cross_auroc/<a>_vs_<b>`` (anomalies of group a
  ranked against normal rows of group b).

With more than two groups each distance is the largest over pairs of groups
(every pair measured on the same pooled scale); the pair is named in
``<key>.pair``. Distances are never negative, so they get no interval. For
inference each group is compared with the reference group (see
flag_fairness.py) by signed keys whose intervals can cover 0:

* ``score_shift/<g>``: mean pooled quantile of g minus that of the reference
  (|score_shift| <= score_distance for the same pair);
* ``auroc_diff/<g>``: AUROC within g minus AUROC within the reference.
"""

from __future__ import annotations

from itertools import combinations, permutations

import numpy as np

from evenflag.metrics.detection import auroc_from_cumulative
from evenflag.metrics.inputs import Counts, MetricInput, spread
from evenflag.metrics.keys import group_key


def _distances(cdf_a, cdf_b, support):
    """W1 = sum of |F_a - F_b| over the gaps of the support; KS = max |F_a - F_b|."""
    diff = np.abs(cdf_a - cdf_b)
    return (diff[..., :-1] * np.diff(support, axis=-1)).sum(axis=-1), diff.max(axis=-1)


def score_fairness_from_counts(counts: Counts, with_pairs: bool = False):
    per_group = counts.blocks.sum(axis=2)                  # (B, G, nb)
    pooled = per_group.sum(axis=1)                          # (B, nb)
    pooled_cdf = np.cumsum(pooled, axis=-1) / pooled.sum(axis=-1, keepdims=True)
    group_cdf = np.cumsum(per_group, axis=-1) / np.maximum(per_group.sum(axis=-1, keepdims=True), 1e-300)
    raw_support = np.broadcast_to(counts.values, pooled.shape)
    names = counts.group_names
    out: dict[str, np.ndarray] = {}
    pairs: dict[str, str] = {}
    pair_index = list(combinations(range(len(names)), 2))
    by_key = {"score_distance": [], "score_distance_raw": [], "score_ks": []}
    for a, b in pair_index:
        rank_w1, ks = _distances(group_cdf[:, a], group_cdf[:, b], pooled_cdf)
        raw_w1, _ = _distances(group_cdf[:, a], group_cdf[:, b], raw_support)
        by_key["score_distance"].append(rank_w1)
        by_key["score_distance_raw"].append(raw_w1)
        by_key["score_ks"].append(ks)
    for key, values in by_key.items():
        stacked = np.stack(values, axis=1)                  # (B, pairs)
        out[key] = stacked.max(axis=1)                      # the largest pair in every weight vector
        a, b = pair_index[int(np.argmax(stacked[0]))]
        pairs[f"{key}.pair"] = f"{names[a]} vs {names[b]}"

    # Signed location shift on the pooled-quantile scale, against the reference group.
    sizes = per_group.sum(axis=-1)
    mean_quantile = np.einsum("bgk,bk->bg", per_group, pooled_cdf) / np.maximum(sizes, 1e-300)
    mean_quantile = np.where(sizes > 0, mean_quantile, np.nan)
    ref = counts.reference

    pos = counts.blocks[:, :, 1, :]
    neg = counts.blocks[:, :, 0, :]
    cum_neg = np.cumsum(neg, axis=-1)                       # once, shared by every AUROC below
    group_auc = auroc_from_cumulative(pos, neg, cum_neg)    # (B, G)
    keys = [group_key(n) for n in names]
    for g, name in enumerate(keys):
        out[f"auroc/{name}"] = group_auc[:, g]
        if g != ref:
            out[f"score_shift/{name}"] = mean_quantile[:, g] - mean_quantile[:, ref]
            out[f"auroc_diff/{name}"] = group_auc[:, g] - group_auc[:, ref]
    out["group_auroc_gap"] = spread(group_auc)
    cross = []
    for a, b in permutations(range(len(names)), 2):
        value = auroc_from_cumulative(pos[:, a], neg[:, b], cum_neg[:, b])
        out[f"cross_auroc/{keys[a]}_vs_{keys[b]}"] = value
        cross.append(value)
    out["cross_auroc_gap"] = spread(np.stack(cross, axis=1))
    return (out, pairs) if with_pairs else out


def wasserstein_raw(u_values, v_values, u_weights=None, v_weights=None) -> float:
    """Wasserstein-1 distance between two weighted samples (same definition as
    ``scipy.stats.wasserstein_distance``).

    Examples
    --------
    >>> wasserstein_raw([0, 1, 3], [5, 6, 8])
    5.0
    """
    u = np.asarray(u_values, dtype=float)
    v = np.asarray(v_values, dtype=float)
    uw = np.ones(len(u)) if u_weights is None else np.asarray(u_weights, dtype=float)
    vw = np.ones(len(v)) if v_weights is None else np.asarray(v_weights, dtype=float)
    support, inverse = np.unique(np.r_[u, v], return_inverse=True)
    mass_u = np.bincount(inverse[: len(u)], weights=uw, minlength=len(support))
    mass_v = np.bincount(inverse[len(u):], weights=vw, minlength=len(support))
    w1, _ = _distances(np.cumsum(mass_u) / uw.sum(), np.cumsum(mass_v) / vw.sum(), support)
    return float(w1)


def score_distance(score, group) -> float:
    """Rank-normalised Wasserstein-1 distance between group score distributions.

    Examples
    --------
    >>> score_distance([1, 2, 3, 4], ["a", "a", "b", "b"])
    0.5
    """
    return _one_value("score_distance", score, group)


def score_ks(score, group) -> float:
    """Largest two-sample KS statistic between groups.

    Examples
    --------
    >>> score_ks([1, 2, 3, 4], ["a", "a", "b", "b"])
    1.0
    """
    return _one_value("score_ks", score, group)


def _one_value(key: str, score, group) -> float:
    inputs = MetricInput.build(np.zeros(len(score), dtype=int), score, None, group)
    return float(score_fairness_from_counts(inputs.counts())[key][0])
