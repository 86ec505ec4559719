"""Fairness of flags: who gets flagged, and who is flagged wrongly.

Definitions (weighted counts per group g; l = label):

* flag rate of g = flagged rows of g / rows of g
* ``flag_rate_ratio`` = lowest flag rate / highest flag rate (the p%-rule
  value); below 0.8 fails the four-fifths rule, exactly 0.8 passes
* ``flag_rate_gap`` = highest minus lowest flag rate
* ``hit_rate_gap``: gap in the share of true anomalies flagged (recall)
* ``false_flag_gap``: gap in the share of normal rows flagged
"""

from __future__ import annotations

import math

import numpy as np

from evenflag.metrics.inputs import Counts, MetricInput, safe_divide, spread, warn_undefined

FOUR_FIFTHS = 0.8


def flag_fairness_from_counts(counts: Counts) -> dict[str, np.ndarray]:
    flagged = counts.flagged.sum(axis=2)           # (B, G)
    rows = counts.total.sum(axis=2)
    rate = safe_divide(flagged, rows)
    hi, lo = rate.max(axis=1), rate.min(axis=1)
    ratio = safe_divide(lo, hi)
    # Four-fifths verdict on exact counts, so a ratio of exactly 0.8 passes.
    i_lo, i_hi = rate.argmin(axis=1), rate.argmax(axis=1)
    take = np.arange(len(rate))
    passes = 5 * flagged[take, i_lo] * rows[take, i_hi] >= 4 * flagged[take, i_hi] * rows[take, i_lo]
    out = {
        "flag_rate_ratio": ratio,
        "flag_rate_gap": hi - lo,
        "four_fifths_pass": np.where(np.isfinite(ratio), passes.astype(float), np.nan),
        "hit_rate_gap": spread(safe_divide(counts.flagged[:, :, 1], counts.total[:, :, 1])),
        "false_flag_gap": spread(safe_divide(counts.flagged[:, :, 0], counts.total[:, :, 0])),
        "group_precision_gap": spread(safe_divide(counts.flagged[:, :, 1], flagged)),
    }
    for g, name in enumerate(counts.group_names):
        out[f"flag_rate/{name}"] = rate[:, g]
        out[f"hit_rate/{name}"] = safe_divide(counts.flagged[:, g, 1], counts.total[:, g, 1])
        out[f"false_flag_rate/{name}"] = safe_divide(counts.flagged[:, g, 0], counts.total[:, g, 0])
        out[f"precision/{name}"] = safe_divide(counts.flagged[:, g, 1], flagged[:, g])
    return out


def worst_pair(counts: Counts) -> tuple[int, int]:
    """Indices of the groups with the lowest and the highest flag rate (point estimate)."""
    rate = safe_divide(counts.flagged.sum(axis=2)[0], counts.total.sum(axis=2)[0])
    return int(np.nanargmin(rate)), int(np.nanargmax(rate))


def two_proportion_z(x1: int, n1: int, x2: int, n2: int) -> tuple[float, float]:
    """Pooled two-proportion z statistic and its two-sided p-value.

    Examples
    --------
    >>> z, p = two_proportion_z(48, 80, 12, 40)
    >>> round(z, 3), round(p, 5)
    (3.098, 0.00195)
    """
    pooled = (x1 + x2) / (n1 + n2)
    se = math.sqrt(pooled * (1 - pooled) * (1 / n1 + 1 / n2))
    if se == 0:
        return float("nan"), float("nan")
    z = (x1 / n1 - x2 / n2) / se
    return z, float(math.erfc(abs(z) / math.sqrt(2)))  # two-sided normal tail, = 2 * norm.sf(|z|)


def flips_to_parity(flagged: np.ndarray, rows: np.ndarray, line: float = FOUR_FIFTHS) -> float:
    """Fewest flags to move from the highest-rate group to the lowest-rate group
    (the worst pair; other groups held fixed) so that the pair's flag-rate ratio
    reaches ``line``. The number of flags stays the same: this is the practical
    size of a gap under a fixed review budget. NaN if no such move exists.

    Examples
    --------
    >>> flips_to_parity(np.array([10, 30]), np.array([100, 100]))
    8.0
    """
    flagged = np.asarray(flagged, dtype=np.int64)
    rows = np.asarray(rows, dtype=np.int64)
    if flagged.sum() == 0:
        return 0.0
    rate = flagged / rows
    lo, hi = int(rate.argmin()), int(rate.argmax())
    f_lo, n_lo, f_hi, n_hi = flagged[lo], rows[lo], flagged[hi], rows[hi]
    if f_lo * n_hi >= line * f_hi * n_lo - 1e-9:
        return 0.0
    # Smallest m with (f_lo + m) / n_lo >= line * (f_hi - m) / n_hi, i.e.
    # m >= (line * f_hi * n_lo - f_lo * n_hi) / (n_hi + line * n_lo).
    m = int(math.ceil((line * f_hi * n_lo - f_lo * n_hi) / (n_hi + line * n_lo) - 1e-9))
    if m > f_hi or f_lo + m > n_lo:
        return float("nan")
    return float(m)


def flag_tests(counts: Counts) -> dict[str, float | str]:
    """Significance of the worst pair and the flips to parity (point estimate only,
    from the unweighted counts of ``MetricInput.counts()``)."""
    from scipy import stats  # imported here: scipy.stats costs ~0.7 s to import in every worker

    flagged = counts.flagged.sum(axis=2)[0].astype(int)
    rows = counts.total.sum(axis=2)[0].astype(int)
    if flagged.sum() == 0:
        warn_undefined("flag_rate_ratio", "no row is flagged")
    lo, hi = worst_pair(counts) if flagged.sum() else (0, 1)
    z, p = two_proportion_z(flagged[hi], rows[hi], flagged[lo], rows[lo])
    table = [[flagged[hi], rows[hi] - flagged[hi]], [flagged[lo], rows[lo] - flagged[lo]]]
    return {
        "worst_pair_z": z,
        "worst_pair_z_p": p,
        "worst_pair_fisher_p": float(stats.fisher_exact(table).pvalue),
        "flips_to_parity": flips_to_parity(flagged, rows),
        "flag_rate_ratio.pair": f"{counts.group_names[lo]} vs {counts.group_names[hi]}",
    }


def flag_rates(flag, group) -> dict[str, float]:
    """Share of each group that is flagged.

    Examples
    --------
    >>> flag_rates([1, 0, 1, 1], ["a", "a", "b", "b"])
    {'a': 0.5, 'b': 1.0}
    """
    flag = np.asarray(flag)
    inputs = MetricInput.build(np.zeros(len(flag), dtype=int), None, flag, group)
    out = flag_fairness_from_counts(inputs.counts())
    return {name: float(out[f"flag_rate/{name}"][0]) for name in inputs.group_names}


def flag_rate_ratio(flag, group) -> float:
    """Lowest over highest group flag rate (the p%-rule value).

    Examples
    --------
    >>> flag_rate_ratio([1, 0, 1, 1], ["a", "a", "b", "b"])
    0.5
    """
    flag = np.asarray(flag)
    inputs = MetricInput.build(np.zeros(len(flag), dtype=int), None, flag, group)
    return float(flag_fairness_from_counts(inputs.counts())["flag_rate_ratio"][0])
