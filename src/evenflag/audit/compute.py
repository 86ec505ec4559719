"""Metrics of an audited file: overall, per period, and the change between
the first and the last period.

The metric suites are the ones benchmark runs use (``metrics.suites.evaluate``),
so the keys, intervals and facts are the same. What an audit adds:

* labels may be known for every row, for flagged rows only (the usual case:
  only reviewed cases have an outcome) or not at all. Keys that need the
  outcome of unflagged rows (AUROC, hit and false-flag rates, base rates) are
  computed only when every row has a label; with outcomes of flagged rows,
  the hit rate among the flagged (``precision/<g>``, ``flag_precision``) is
  computed from the reviewed flagged rows with Wilson intervals.
* flags come from the file, or from the threshold policy within each period.
* with a period column, the flag-rate ratio of each group to the reference
  group is compared between the first and the last period: the ratio of the
  two ratios, with a Wald test and interval on its log (the variance of each
  log ratio is Katz's, the periods are independent rows). It equals the Wald
  test of the group x period interaction in a saturated binomial model with a
  log link; Holm's adjustment covers several groups.
* with a weight column, weighted flag rates and their ratio are added as
  point estimates (``weighted_flag_rate/<g>``, ``weighted_flag_rate_ratio``);
  intervals and tests use the unweighted rows.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from evenflag.audit.table import AuditInputError, AuditTable
from evenflag.errors import ConfigError, MetricInputError, warn_line
from evenflag.metrics.inputs import FlagRule, MetricNaNWarning
from evenflag.metrics.intervals import newcombe_difference, wilson, z_value
from evenflag.metrics.keys import group_key
from evenflag.metrics.suites import MetricsSpec, evaluate
from evenflag.thresholds import ThresholdSpec, flag_scores

MAX_SCORE_LEVELS = 1 << 16
# Keys that need the outcome of unflagged rows (or of every row).
NEEDS_ALL_LABELS = ("auroc", "average_precision", "r_precision", "flag_recall", "flag_f1", "base_rate", "hit_rate",
                    "false_flag", "group_auroc_gap", "cross_auroc", "flag_precision", "precision",
                    "group_precision_gap")


@dataclass
class AuditResult:
    values: dict[str, float]              # overall keys with intervals, change-test keys, weighted keys
    notes: dict[str, str]
    periods: pd.DataFrame                 # one row per period: rows, flags, keys with intervals
    labels_known: str                     # all, flagged_only, partial or none
    score_levels: int                     # distinct score values the score metrics used
    flags: np.ndarray                     # who was flagged (the file's flags or the threshold policy's)
    skipped: list[str] = field(default_factory=list)   # one line per family or key left out, with the reason


def coarsen_scores(score: np.ndarray, max_levels: int = MAX_SCORE_LEVELS) -> tuple[np.ndarray, int]:
    """Scores with at most ``max_levels`` distinct values, for the score metrics
    of very large files: rows are cut into equal-count bins of the pooled score
    order (tied scores share a bin) and take their bin's mean. A pair of rows
    changes order only within a bin, so an AUROC moves by at most about
    1 / ``max_levels``. Fewer distinct scores than that: returned unchanged.

    >>> coarsen_scores(np.array([0.3, 0.1, 0.2]), 8)[0].tolist()
    [0.3, 0.1, 0.2]
    >>> coarsen_scores(np.array([1.0, 2.0, 3.0, 4.0]), 2)[0].tolist()
    [1.5, 1.5, 3.5, 3.5]
    """
    order = np.argsort(score, kind="stable")
    ranked = score[order]
    starts = np.flatnonzero(np.r_[True, ranked[1:] != ranked[:-1]])
    if len(starts) <= max_levels:
        return score, len(starts)
    block_bin = (starts * max_levels) // len(score)           # a tie block goes to the bin where it starts
    bins = np.repeat(block_bin, np.diff(np.r_[starts, len(score)]))
    means = np.bincount(bins, weights=ranked, minlength=max_levels) / np.maximum(np.bincount(bins, minlength=max_levels), 1)
    out = np.empty_like(score)
    out[order] = means[bins]
    return out, int(len(np.unique(bins)))


def check_flag_source(table: AuditTable, threshold: ThresholdSpec) -> None:
    """Refuse, before anything is tracked, flags that cannot be had from this file."""
    if table.flag is not None:
        if not table.flag.any():
            raise AuditInputError("the flag column flags no row; an audit of who is flagged needs flags: check "
                                  "audit.flag, or drop it to flag by the threshold policy")
        return
    if threshold.policy == "train_quantile":
        raise ConfigError("threshold policy train_quantile needs scores of held-out training rows, which an audit "
                          "file does not have; use threshold=top_fraction or give the file's flag column (audit.flag)")
    if threshold.policy == "true_rate" and (table.label is None or (table.label < 0).any()):
        raise ConfigError("threshold policy true_rate flags as many rows as there are anomalies and needs a label "
                          "on every row; use threshold=top_fraction or give audit.flag")


def audit_flags(table: AuditTable, threshold: ThresholdSpec) -> tuple[np.ndarray, FlagRule | None, str]:
    """(flags, rule for resampling, how the flags were set)."""
    check_flag_source(table, threshold)
    if table.flag is not None:
        return table.flag, None, "the file's flag column"
    if table.period is None:
        flags = flag_scores(threshold, table.score, test_labels=None if table.label is None else table.label)
        rule = FlagRule("top_fraction", threshold.fraction) if threshold.policy == "top_fraction" else FlagRule("top_anomalies")
        return flags, rule, f"threshold policy {threshold.policy} ({threshold.fraction:g}) over the whole file"
    flags = np.zeros(table.n_rows, dtype=bool)
    for p in range(len(table.period_names)):
        rows = np.flatnonzero(table.period == p)
        labels = None if table.label is None else table.label[rows]
        flags[rows] = flag_scores(threshold, table.score[rows], test_labels=labels)
    return flags, None, f"threshold policy {threshold.policy} ({threshold.fraction:g}) within each period"


def labels_known(table: AuditTable, flags: np.ndarray) -> str:
    """``all``, ``flagged_only`` (every flagged row reviewed, no unflagged one),
    ``partial`` (some rows reviewed) or ``none``."""
    if table.label is None:
        return "none"
    known = table.label >= 0
    if known.all():
        return "all"
    if not known.any():
        return "none"
    if known[flags].all() and not known[~flags].any():
        return "flagged_only"
    return "partial"


def _evaluate(families, label, score, flags, group, spec: MetricsSpec, seed: int, reference, rule):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", MetricNaNWarning)
        result = evaluate(families, label, score, flags, group, n_bootstrap=spec.bootstrap, seed=seed,
                          level=spec.level, resample=spec.resample, reference_group=reference, rule=rule)
    return result, [str(c.message) for c in caught if issubclass(c.category, MetricNaNWarning)]


def _keep(key: str, with_labels: bool) -> bool:
    return with_labels or not key.split(".", 1)[0].split("/", 1)[0].startswith(NEEDS_ALL_LABELS)


def reviewed_precision(label: np.ndarray, flags: np.ndarray, group: np.ndarray, names: list[str], reference: int,
                       level: float) -> dict[str, float]:
    """Hit rate among the flagged rows that were reviewed, per group and overall,
    with Wilson intervals (and Newcombe for the difference to the reference)."""
    reviewed = flags & (label >= 0)
    out = {}
    x_all, n_all = int((label[reviewed] == 1).sum()), int(reviewed.sum())
    if n_all:
        out["flag_precision"] = x_all / n_all
        out["flag_precision.ci_low"], out["flag_precision.ci_high"] = map(float, wilson(x_all, n_all, level))
    per_group = []
    for g, name in enumerate(names):
        rows = reviewed & (group == g)
        x, n = int((label[rows] == 1).sum()), int(rows.sum())
        per_group.append((x, n))
        if n:
            key = f"precision/{group_key(name)}"
            out[key] = x / n
            out[f"{key}.ci_low"], out[f"{key}.ci_high"] = map(float, wilson(x, n, level))
    rates = [x / n for x, n in per_group if n]
    if len(rates) >= 2:
        out["group_precision_gap"] = max(rates) - min(rates)
    xr, nr = per_group[reference]
    for g, name in enumerate(names):
        x, n = per_group[g]
        if g != reference and n and nr:
            key = f"precision_diff/{group_key(name)}"
            out[key] = x / n - xr / nr
            out[f"{key}.ci_low"], out[f"{key}.ci_high"] = map(float, newcombe_difference(x, n, xr, nr, level))
    return out


def ratio_change(first: tuple[int, int, int, int], last: tuple[int, int, int, int], level: float = 0.95):
    """Change of a group's flag-rate ratio to the reference from the first to
    the last period: (ratio of ratios, low, high, two-sided p).

    ``first`` and ``last`` are (flagged in group, rows of group, flagged in
    reference, rows of reference). NaN where a group or the reference has no
    flag in a period (the log ratio is then unbounded).

    >>> change, low, high, p = ratio_change((20, 200, 40, 800), (20, 200, 40, 800))
    >>> round(change, 3), round(p, 3)
    (1.0, 1.0)
    """
    (a1, n1, b1, m1), (a2, n2, b2, m2) = first, last
    if min(a1, b1, a2, b2) <= 0:
        return (float("nan"),) * 4
    diff = math.log((a2 / n2) / (b2 / m2)) - math.log((a1 / n1) / (b1 / m1))
    variance = 1 / a1 - 1 / n1 + 1 / b1 - 1 / m1 + 1 / a2 - 1 / n2 + 1 / b2 - 1 / m2
    se = math.sqrt(variance)
    half = z_value(level) * se
    p = math.erfc(abs(diff) / se / math.sqrt(2)) if se > 0 else float("nan")
    return math.exp(diff), math.exp(diff - half), math.exp(diff + half), p


def holm(p_values: list[float]) -> list[float]:
    """Holm's step-down adjustment (NaN entries stay NaN and do not count)."""
    finite = [(p, i) for i, p in enumerate(p_values) if np.isfinite(p)]
    out = [float("nan")] * len(p_values)
    running = 0.0
    for rank, (p, i) in enumerate(sorted(finite)):
        running = max(running, min(1.0, (len(finite) - rank) * p))
        out[i] = running
    return out


def weighted_rates(weight: np.ndarray, flags: np.ndarray, group: np.ndarray, names: list[str]) -> dict[str, float]:
    total = np.bincount(group, weights=weight, minlength=len(names))
    flagged = np.bincount(group[flags], weights=weight[flags], minlength=len(names))
    rate = np.divide(flagged, total, out=np.full(len(names), np.nan), where=total > 0)
    out = {f"weighted_flag_rate/{group_key(n)}": float(r) for n, r in zip(names, rate)}
    if np.isfinite(rate).sum() >= 2 and np.nanmax(rate) > 0:
        out["weighted_flag_rate_ratio"] = float(np.nanmin(rate) / np.nanmax(rate))
    return out


def compute_audit(table: AuditTable, threshold: ThresholdSpec, spec: MetricsSpec, seed: int = 0) -> AuditResult:
    """Every metric of the audit. Undefined metrics are left out with a line in
    ``skipped`` (an audit's reader wants the reason, not a column of NaN)."""
    flags, rule, flag_source = audit_flags(table, threshold)
    known = labels_known(table, flags)
    if not flags.any():
        raise AuditInputError("the threshold policy flags no row; raise threshold.fraction")
    score, levels = coarsen_scores(table.score)
    with_labels = known == "all"
    families = [f for f in spec.families if f != "leakage" and (with_labels or f != "detection")]
    skipped = []
    if "leakage" in spec.families:
        skipped.append("leakage_auroc: needs the detector's internal representation, which an exported score file "
                       "does not have")
    if not with_labels:
        reason = {"none": "the file has no label column (set audit.label)" if table.label is None
                  else "no row of the label column is filled",
                  "flagged_only": "outcomes are known for flagged rows only",
                  "partial": "outcomes are known for some rows only"}[known]
        skipped.append(f"AUROC, average precision, hit rates, false-flag rates and base rates: {reason}; they need "
                       "the outcome of unflagged rows too")
    label = table.label if with_labels else np.zeros(table.n_rows, dtype=np.int8)
    names = np.asarray(table.group_names, dtype=object)
    group_text = pd.Categorical.from_codes(table.group, table.group_names)
    sizes = np.bincount(table.group, minlength=len(names))
    reference = spec.reference_group if spec.reference_group is not None else str(names[int(np.argmax(sizes))])

    overall, messages = _evaluate(families, label, score, flags, group_text, spec, seed, reference, rule)
    values = {k: v for k, v in overall.values.items() if _keep(k, with_labels)}
    skipped += [m for m in dict.fromkeys(messages) if _keep(m.split(" ", 1)[0], with_labels)]
    ref_index = table.group_names.index(str(reference))
    if known in ("flagged_only", "partial"):
        values.update(reviewed_precision(table.label, flags, table.group, table.group_names, ref_index, spec.level))
    if table.weight is not None:
        values.update(weighted_rates(table.weight, flags, table.group, table.group_names))
    notes = {k: v for k, v in overall.notes.items()}
    notes.update({"flag_source": flag_source, "labels_known": known, "score_levels": str(levels),
                  "reference_group": str(reference)})

    periods = pd.DataFrame()
    if table.period is not None:
        periods, period_skips = per_period(table, score, flags, label, with_labels, families, spec, seed, reference,
                                           threshold if table.flag is None else None)
        skipped += period_skips
        values.update(change_between(table, flags, ref_index, spec.level))
    return AuditResult(values=values, notes=notes, periods=periods, labels_known=known, score_levels=levels,
                       flags=flags, skipped=skipped)


def per_period(table, score, flags, label, with_labels, families, spec, seed, reference, threshold):
    rows_out, skipped = [], []
    period_rule = None
    if threshold is not None:
        period_rule = FlagRule("top_fraction", threshold.fraction) if threshold.policy == "top_fraction" else FlagRule("top_anomalies")
    for p, period_name in enumerate(table.period_names):
        rows = np.flatnonzero(table.period == p)
        row = {"period": period_name, "rows": len(rows), "flagged": int(flags[rows].sum())}
        try:
            result, _ = _evaluate(families, label[rows], score[rows], flags[rows],
                                  pd.Categorical.from_codes(table.group[rows], table.group_names), spec,
                                  seed, reference, period_rule)
        except MetricInputError as exc:
            skipped.append(f"period {period_name}: no metrics ({exc})")
            rows_out.append(row)
            continue
        row.update({k: v for k, v in result.values.items() if _keep(k, with_labels)})
        rows_out.append(row)
    return pd.DataFrame(rows_out), skipped


def change_between(table: AuditTable, flags: np.ndarray, ref: int, level: float) -> dict[str, float]:
    """Ratio-of-ratios test of every group against the reference, first vs last period."""
    if len(table.period_names) < 2:
        return {}
    G = len(table.group_names)
    counts = {}
    for p in (0, len(table.period_names) - 1):
        rows = table.period == p
        counts[p] = (np.bincount(table.group[rows & flags], minlength=G), np.bincount(table.group[rows], minlength=G))
    first, last = counts[0], counts[len(table.period_names) - 1]
    out, p_values, keys = {}, [], []
    for g, name in enumerate(table.group_names):
        if g == ref:
            continue
        change, low, high, p = ratio_change(
            (int(first[0][g]), int(first[1][g]), int(first[0][ref]), int(first[1][ref])),
            (int(last[0][g]), int(last[1][g]), int(last[0][ref]), int(last[1][ref])), level)
        key = group_key(name)
        if not np.isfinite(change):
            warn_line(f"ratio_change/{name}: a group has no flagged row in the first or last period; not tested")
            continue
        out[f"ratio_change/{key}"] = change
        out[f"ratio_change/{key}.ci_low"], out[f"ratio_change/{key}.ci_high"] = low, high
        out[f"ratio_change_p/{key}"] = p
        p_values.append(p)
        keys.append(key)
    for key, adjusted in zip(keys, holm(p_values)):
        out[f"ratio_change_p_holm/{key}"] = adjusted
    return out
