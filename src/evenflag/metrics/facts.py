"""One table of facts about every metric key, used by the suites, the report
tables, the figures and the memo: its label, which direction is better, its
range, its value at parity and how its interval is made.

Per-group keys (``flag_rate/<group>``) share the facts of their prefix.

Interval methods:

=============  =================================================================
``bootstrap``  percentile bootstrap over test rows (flags re-derived from the
               threshold rule in every resample when the rule is a rank rule)
``wilson``     Wilson score interval for a proportion
``newcombe``   Newcombe's hybrid score interval for a difference of proportions
``katz``       Katz log interval for a ratio of proportions
``delong``     DeLong's variance: a normal interval on the logit scale for an
               AUROC, on the plain scale for a difference of AUROCs
``rate``       ``bootstrap`` when flags come from a rank rule and every count
               compared is at least ``MIN_BOOTSTRAP_COUNT``, else the closed
               form named after the slash (``rate/wilson`` ...)
``cv``         interval of the out-of-fold probe predictions (leakage)
``change``     audits: Wald interval on the log of a ratio of two independent
               periods' Katz ratios (audit/compute.py)
``none``       point estimate only: a largest-minus-smallest or lowest-over-
               highest summary over groups, or a test statistic; such a value
               cannot fall below parity, so a percentile interval of it never
               covers parity. Use the signed per-group keys for intervals.
=============  =================================================================
"""

from __future__ import annotations

from dataclasses import dataclass

FOUR_FIFTHS = 0.8  # the four-fifths line of the flag-rate ratio (a rule of thumb, not a legal test)
MIN_BOOTSTRAP_COUNT = 5  # fewer flagged or unflagged rows than this in a group: closed-form intervals


@dataclass(frozen=True)
class MetricFact:
    label: str              # table header
    better: str             # "higher", "lower", or "parity" (closer to the parity value)
    low: float              # range of the value
    high: float
    parity: float | None    # value when groups are treated alike (None: not a disparity)
    interval: str           # see the module docstring
    meaning: str


INF = float("inf")

FACTS: dict[str, MetricFact] = {
    # detection quality
    "auroc": MetricFact("AUROC", "higher", 0, 1, None, "delong", "area under the ROC curve"),
    "average_precision": MetricFact("avg. precision", "higher", 0, 1, None, "bootstrap", "average precision"),
    "r_precision": MetricFact("R-precision", "higher", 0, 1, None, "bootstrap",
                              "share of anomalies among as many top scores as there are anomalies"),
    "flag_precision": MetricFact("flag precision", "higher", 0, 1, None, "rate/wilson", "share of flags that are anomalies"),
    "flag_recall": MetricFact("flag recall", "higher", 0, 1, None, "rate/wilson", "share of anomalies flagged"),
    "flag_f1": MetricFact("flag F1", "higher", 0, 1, None, "bootstrap", "F1 of the flags"),
    # who gets flagged
    "flag_rate": MetricFact("flag rate", "parity", 0, 1, None, "rate/wilson", "share of a group that is flagged"),
    "base_rate": MetricFact("base rate", "parity", 0, 1, None, "wilson", "share of a group's test rows that are anomalies"),
    "flag_rate_ratio": MetricFact("flag-rate ratio", "higher", 0, 1, 1.0, "none",
                                  "lowest over highest group flag rate (the four-fifths line is 0.8)"),
    "flag_rate_gap": MetricFact("flag-rate gap", "lower", 0, 1, 0.0, "none", "highest minus lowest group flag rate"),
    "four_fifths_pass": MetricFact("passes 4/5", "higher", 0, 1, 1.0, "none",
                                   "1 if every group's flag rate is at least 0.8 of the highest"),
    "flag_rate_diff": MetricFact("flag-rate difference", "parity", -1, 1, 0.0, "rate/newcombe",
                                 "a group's flag rate minus the reference group's"),
    "flag_rate_vs_reference": MetricFact("flag-rate ratio to reference", "parity", 0, INF, 1.0, "rate/katz",
                                         "a group's flag rate over the reference group's"),
    "worst_pair_z": MetricFact("worst-pair z", "parity", -INF, INF, 0.0, "none",
                               "pooled two-proportion z of the highest against the lowest flag rate"),
    "worst_pair_z_p": MetricFact("worst-pair z p", "higher", 0, 1, None, "none", "two-sided p of worst_pair_z"),
    "worst_pair_fisher_p": MetricFact("worst-pair Fisher p", "higher", 0, 1, None, "none",
                                      "Fisher's exact p of the highest against the lowest flag rate"),
    "flips_to_parity": MetricFact("flips to parity", "lower", 0, INF, 0.0, "none",
                                  "fewest flags to move between groups so the four-fifths rule passes"),
    "weighted_flag_rate": MetricFact("weighted flag rate", "parity", 0, 1, None, "none",
                                     "a group's flagged weight over its total weight (audits with a weight column)"),
    "weighted_flag_rate_ratio": MetricFact("weighted flag-rate ratio", "higher", 0, 1, 1.0, "none",
                                           "lowest over highest weighted group flag rate"),
    "ratio_change": MetricFact("ratio change", "parity", 0, INF, 1.0, "change",
                               "a group's flag-rate ratio to the reference in the last period over that in the first"),
    "ratio_change_p": MetricFact("ratio change p", "higher", 0, 1, None, "none",
                                 "two-sided Wald p of ratio_change (no change in the ratio)"),
    "ratio_change_p_holm": MetricFact("ratio change p (Holm)", "higher", 0, 1, None, "none",
                                      "ratio_change_p adjusted by Holm's method over the groups"),
    # error fairness
    "hit_rate": MetricFact("hit rate", "parity", 0, 1, None, "rate/wilson", "share of a group's anomalies flagged"),
    "false_flag_rate": MetricFact("false-flag rate", "lower", 0, 1, None, "rate/wilson",
                                  "share of a group's normal rows flagged"),
    "precision": MetricFact("precision", "parity", 0, 1, None, "rate/wilson", "share of a group's flags that are anomalies"),
    "hit_rate_gap": MetricFact("hit-rate gap", "lower", 0, 1, 0.0, "none", "largest minus smallest group hit rate"),
    "false_flag_gap": MetricFact("false-flag gap", "lower", 0, 1, 0.0, "none",
                                 "largest minus smallest group false-flag rate"),
    "group_precision_gap": MetricFact("precision gap", "lower", 0, 1, 0.0, "none",
                                      "largest minus smallest group precision"),
    "precision_diff": MetricFact("precision difference", "parity", -1, 1, 0.0, "newcombe",
                                 "a group's precision minus the reference group's (audits: reviewed flags only)"),
    "hit_rate_diff": MetricFact("hit-rate difference", "parity", -1, 1, 0.0, "rate/newcombe",
                                "a group's hit rate minus the reference group's"),
    "false_flag_diff": MetricFact("false-flag difference", "parity", -1, 1, 0.0, "rate/newcombe",
                                  "a group's false-flag rate minus the reference group's"),
    # scores
    "score_distance": MetricFact("score distance", "lower", 0, 0.5, 0.0, "none",
                                 "Wasserstein-1 between group scores on the pooled-quantile scale (max 0.5)"),
    "score_distance_raw": MetricFact("raw score distance", "lower", 0, INF, 0.0, "none",
                                     "Wasserstein-1 between group scores on the raw scale"),
    "score_ks": MetricFact("score KS", "lower", 0, 1, 0.0, "none", "two-sample Kolmogorov-Smirnov statistic"),
    "score_shift": MetricFact("score shift", "parity", -1, 1, 0.0, "bootstrap",
                              "a group's mean pooled score quantile minus the reference group's"),
    "auroc_diff": MetricFact("AUROC difference", "parity", -1, 1, 0.0, "delong",
                             "a group's AUROC minus the reference group's"),
    "group_auroc_gap": MetricFact("group AUROC gap", "lower", 0, 1, 0.0, "none", "largest minus smallest group AUROC"),
    "cross_auroc": MetricFact("cross AUROC", "higher", 0, 1, None, "delong",
                              "anomalies of one group ranked against normal rows of another"),
    "cross_auroc_gap": MetricFact("cross AUROC gap", "lower", 0, 1, 0.0, "none",
                                  "largest minus smallest cross-group AUROC"),
    # representation
    "leakage_auroc": MetricFact("leakage AUROC", "parity", 0, 1, 0.5, "cv",
                                "the stronger of a linear and a boosted-tree probe predicting the group"),
}


def fact(key: str) -> MetricFact | None:
    """Facts of a key, a per-group key (``flag_rate/F``) or a probe key
    (``leakage_auroc/linear``); None for keys outside the table (timings).

    Examples
    --------
    >>> fact("flag_rate/Female").interval
    'rate/wilson'
    >>> fact("time.fit") is None
    True
    """
    if key in FACTS:
        return FACTS[key]
    return FACTS.get(key.split("/", 1)[0])


def label(key: str) -> str:
    found = fact(key)
    if found is None:
        return key
    suffix = key.split("/", 1)[1] if "/" in key else ""
    return f"{found.label} ({suffix})" if suffix else found.label


def better_score(key: str, value):
    """A number that is larger when ``value`` is better (for bold and ranks)."""
    found = fact(key)
    if found is None or found.better == "higher":
        return value
    if found.better == "lower":
        return -value
    return -abs(value - (found.parity if found.parity is not None else 0.0))


def direction_word(key: str) -> str:
    """'higher is better', 'lower is better' or 'closer to X is better'."""
    found = fact(key)
    if found is None:
        return ""
    if found.better == "parity":
        return f"closer to {found.parity:g} is better" if found.parity is not None else "no better direction"
    return f"{found.better} is better"


def header(key: str) -> str:
    """Table header with the direction: 'AUROC (higher better)'."""
    found = fact(key)
    if found is None:
        return key
    arrow = {"higher": "↑", "lower": "↓"}.get(found.better, f"→{found.parity:g}" if found.parity is not None else "")
    return f"{label(key)} {arrow}".strip()
