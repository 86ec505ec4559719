"""Fairness of flags: who gets flagged, and who is flagged wrongly.

Definitions (weighted counts per group g; l = label):

* flag rate of g = flagged rows of g / rows of g
* ``flag_rate_ratio`` = lowest flag rate / highest flag rate (the p%-rule
  value); below 0.8 fails the four-fifths rule, exactly 0.8 passes
* ``flag_rate_gap`` = highest minus lowest flag rate
* ``hit_rate_gap``: gap in the share of true anomalies flagged (recall)
* ``false_flag_gap``: gap in the share of normal rows flagged

These summaries take the lowest and the highest group, so they can never fall
below parity and get no interval. For inference each group is compared with a
stated reference group (the largest by default, ``metrics.reference_group``):

* ``flag_rate_diff/<g>`` = flag rate of g minus that of the reference;
* ``flag_rate_vs_reference/<g>`` = flag rate of g over that of the reference;
* ``hit_rate_diff/<g>``, ``false_flag_diff/<g>`` likewise.

Their intervals can cover parity (0, or 1 for the ratio).
"""

from __future__ import annotations

import math

import numpy as np

from evenflag.metrics.facts import FOUR_FIFTHS
from evenflag.metrics.inputs import Counts, MetricInput, safe_divide, spread, warn_undefined
from evenflag.metrics.keys import group_key


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
    hit = safe_divide(counts.flagged[:, :, 1], counts.total[:, :, 1])
    false_flag = safe_divide(counts.flagged[:, :, 0], counts.total[:, :, 0])
    ref = counts.reference
    for g, name in enumerate(map(group_key, counts.group_names)):
        out[f"base_rate/{name}"] = safe_divide(counts.total[:, g, 1], rows[:, g])
        out[f"flag_rate/{name}"] = rate[:, g]
        out[f"hit_rate/{name}"] = hit[:, g]
        out[f"false_flag_rate/{name}"] = false_flag[:, g]
        out[f"precision/{name}"] = safe_divide(counts.flagged[:, g, 1], flagged[:, g])
        if g != ref:
            out[f"flag_rate_diff/{name}"] = rate[:, g] - rate[:, ref]
            out[f"flag_rate_vs_reference/{name}"] = safe_divide(rate[:, g], rate[:, ref])
            out[f"hit_rate_diff/{name}"] = hit[:, g] - hit[:, ref]
            out[f"false_flag_diff/{name}"] = false_flag[:, g] - false_flag[:, ref]
    return out


def rate_counts(counts: Counts, key: str) -> list[tuple[float, float]]:
    """The (successes, trials) behind a per-group rate key or a signed key
    (the group's pair first, then the reference group's), from point counts.

    Examples
    --------
    >>> inputs = MetricInput.build([0, 1, 0, 0], None, [1, 1, 0, 0], ["a", "a", "b", "b"])
    >>> rate_counts(inputs.counts(), "flag_rate_diff/b")
    [(0.0, 2.0), (2.0, 2.0)]
    """
    base, _, name = key.partition("/")
    flagged, total = counts.flagged[0], counts.total[0]
    pick = {
        "flag_rate": lambda g: (flagged[g].sum(), total[g].sum()),
        "hit_rate": lambda g: (flagged[g, 1], total[g, 1]),
        "false_flag_rate": lambda g: (flagged[g, 0], total[g, 0]),
        "precision": lambda g: (flagged[g, 1], flagged[g].sum()),
        "base_rate": lambda g: (total[g, 1], total[g].sum()),
    }
    signed = {"flag_rate_diff": "flag_rate", "flag_rate_vs_reference": "flag_rate", "hit_rate_diff": "hit_rate",
              "false_flag_diff": "false_flag_rate"}
    if base in ("flag_precision", "flag_recall"):
        true_flags = flagged[:, 1].sum()
        return [(true_flags, flagged.sum() if base == "flag_precision" else total[:, 1].sum())]
    g = [group_key(n) for n in counts.group_names].index(name)
    if base in signed:
        return [tuple(map(float, pick[signed[base]](g))), tuple(map(float, pick[signed[base]](counts.reference)))]
    return [tuple(map(float, pick[base](g)))]


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


def flips_to_parity(flagged, rows, line: float = FOUR_FIFTHS) -> float:
    """Fewest flags to move from some rows to others (the total number of flags
    fixed, each row flagged at most once) so that every group's flag rate is at
    least ``line`` times the highest group rate. This is the practical size of a
    gap under a fixed review budget. NaN if no such move exists; 0 if nothing is
    flagged or the rule already passes.

    Exact: for every possible highest rate M (some count over some group size)
    each group's count must lie in [ceil(line M n_g), floor(M n_g)]; the
    cheapest counts there are the original ones clipped into that range, plus
    one move per flag still to be placed or removed to keep the total. The
    answer is the minimum over M. Integer arithmetic (line = 4/5) keeps the
    boundary exact.

    Examples
    --------
    >>> flips_to_parity([10, 30], [100, 100])
    8.0
    >>> flips_to_parity([2, 6], [50, 50])
    2.0
    >>> flips_to_parity([2, 2], [59, 34])  # 4 flags cannot be shared within the line
    nan
    """
    from fractions import Fraction

    flagged = np.asarray(flagged, dtype=np.int64)
    rows = np.asarray(rows, dtype=np.int64)
    total = int(flagged.sum())
    if total == 0:
        return 0.0
    ratio = Fraction(line).limit_denominator(1000)
    a, b = ratio.numerator, ratio.denominator            # line = a / b
    lo, hi = int(np.argmin(flagged / rows)), int(np.argmax(flagged / rows))
    if b * int(flagged[lo]) * int(rows[hi]) >= a * int(flagged[hi]) * int(rows[lo]):
        return 0.0                                       # the rule already passes
    best = None
    n_all = int(rows.sum())
    for h, n_h in enumerate(rows):                       # the highest rate is k / n_h
        # Only k with sum(upper) >= total (upper <= k n_g / n_h) and sum(lower) <= total
        # (lower >= line k n_g / n_h) can be feasible: a range of about a quarter
        # of the flags instead of every count up to n_h.
        k_min = max(1, (total * int(n_h)) // n_all)
        k_max = min(int(n_h), (total * b * int(n_h)) // (a * n_all))
        if k_min > k_max:
            continue
        k = np.arange(k_min, k_max + 1, dtype=np.int64)[:, None]
        upper = np.minimum((k * rows) // n_h, rows)                    # floor(M n_g)
        lower = (a * k * rows + b * n_h - 1) // (b * n_h)              # ceil(line M n_g)
        feasible = (lower <= upper).all(axis=1) & (lower.sum(axis=1) <= total) & (upper.sum(axis=1) >= total)
        if not feasible.any():
            continue
        clipped = np.clip(flagged, lower, upper)
        cost = np.abs(clipped - flagged).sum(axis=1) + np.abs(clipped.sum(axis=1) - total)
        cheapest = int(cost[feasible].min())
        best = cheapest if best is None else min(best, cheapest)
    return float("nan") if best is None else float(best // 2)


def flag_tests(counts: Counts) -> dict[str, float | str]:
    """Significance of the worst pair and the flips to parity (point estimate only,
    from the unweighted counts of ``MetricInput.counts()``)."""
    from scipy import stats  # imported here: scipy.stats costs ~0.7 s to import in every worker

    flagged = counts.flagged.sum(axis=2)[0].astype(int)
    rows = counts.total.sum(axis=2)[0].astype(int)
    if flagged.sum() == 0:
        warn_undefined("flag_rate_ratio", "no row is flagged")
    lo, hi = worst_pair(counts) if flagged.sum() else (0, 1)
    if lo == hi:  # every group has the same rate: compare the first two, say so
        lo, hi = 0, 1
        pair = "all groups equal"
    else:
        pair = f"{counts.group_names[lo]} vs {counts.group_names[hi]}"
    z, p = two_proportion_z(flagged[hi], rows[hi], flagged[lo], rows[lo])
    table = [[flagged[hi], rows[hi] - flagged[hi]], [flagged[lo], rows[lo] - flagged[lo]]]
    return {
        "worst_pair_z": z,
        "worst_pair_z_p": p,
        "worst_pair_fisher_p": float(stats.fisher_exact(table).pvalue),
        "flips_to_parity": flips_to_parity(flagged, rows),
        "flag_rate_ratio.pair": pair,
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
    return {name: float(out[f"flag_rate/{group_key(name)}"][0]) for name in inputs.group_names}


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
