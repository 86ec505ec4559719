"""Metric suites: named families of metrics evaluated together, with intervals.

A suite is a list of family names (configs/metrics/*.yaml). Families:

=================  ===============================================================
``detection``      auroc, average_precision, flag_precision/recall/f1, r_precision
``flag_fairness``  flag rates per group, flag_rate_ratio, flag_rate_gap,
                   four_fifths_pass, hit_rate_gap, false_flag_gap, per-group
                   precision and base rate, signed differences and ratios
                   against the reference group, worst-pair z and Fisher tests,
                   flips_to_parity
``score_fairness`` score_distance(_raw), score_ks, per-group AUROC,
                   group_auroc_gap, cross-group AUROC, signed score_shift and
                   auroc_diff against the reference group
``leakage``        leakage_auroc from a linear and a boosted-tree probe (needs
                   an embedding; skipped without one)
=================  ===============================================================

How each key gets its interval is a fact of the key (metrics/facts.py); the
method used for a run's keys is recorded in the ``interval_methods`` note.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass, field
from typing import Optional

import numpy as np

from evenflag.errors import ConfigError
from evenflag.metrics import bootstrap
from evenflag.metrics.detection import detection_from_counts
from evenflag.metrics.facts import MIN_BOOTSTRAP_COUNT, fact
from evenflag.metrics.flag_fairness import flag_fairness_from_counts, flag_tests, rate_counts
from evenflag.metrics.inputs import FlagRule, MetricInput, MetricNaNWarning, counts_from_cells, rethreshold
from evenflag.metrics.keys import group_key
from evenflag.metrics.intervals import (
    delong_from_blocks,
    katz_ratio,
    logit_interval,
    newcombe_difference,
    normal_interval,
    wilson,
)
from evenflag.metrics.leakage import leakage
from evenflag.metrics.score_fairness import score_fairness_from_counts

# Families computed from count tables: these get vectorised bootstrap CIs.
BATCHED = {
    "detection": detection_from_counts,
    "flag_fairness": flag_fairness_from_counts,
    "score_fairness": score_fairness_from_counts,
}
FAMILIES = ("detection", "flag_fairness", "score_fairness", "leakage")


@dataclass
class MetricsSpec:
    """Structured config of configs/metrics/*.yaml.

    ``bootstrap``: resamples per run (0 = point estimates only, no intervals);
    ``resample``: ``rows`` (rows drawn from all test rows) or ``strata``
    (inside every group x label stratum); ``reference_group``: the group the
    signed per-group keys compare against (null = the largest group).
    """

    families: list[str] = field(default_factory=lambda: list(FAMILIES))
    bootstrap: int = 200
    level: float = 0.95
    resample: str = "rows"
    reference_group: Optional[str] = None


@dataclass
class SuiteResult:
    values: dict[str, float]
    notes: dict[str, str]


def _reason(key: str) -> str:
    if key.startswith(("auroc", "average_precision", "r_precision", "group_auroc", "cross_auroc")):
        return "needs both anomalies and normal rows (in each group compared)"
    if key.startswith(("hit_rate", "false_flag")):
        return "a group has no rows of the needed label"
    if key.startswith(("flag_rate", "four_fifths", "flag_precision", "precision", "group_precision", "flag_f1")):
        return "no row is flagged in the rows compared"
    return "inputs do not define it"


def check_spec(spec: MetricsSpec) -> None:
    unknown = [f for f in spec.families if f not in FAMILIES]
    if unknown:
        raise ConfigError(f"unknown metric family {unknown}; use any of {list(FAMILIES)}")
    if spec.resample not in bootstrap.SCHEMES:
        raise ConfigError(f"metrics.resample '{spec.resample}' is unknown; use one of {list(bootstrap.SCHEMES)}")
    if not 0.5 <= spec.level < 1:
        raise ConfigError(f"metrics.level must be in [0.5, 1), got {spec.level}")
    if spec.bootstrap < 0:
        raise ConfigError(f"metrics.bootstrap must be 0 (no intervals) or a positive count, got {spec.bootstrap}")


def evaluate(families, label, score, flag, group, embedding=None, n_bootstrap: int = 0,
             seed: int = 0, level: float = 0.95, resample: str = "rows", reference_group=None,
             rule: FlagRule | None = None) -> SuiteResult:
    """Evaluate metric families on one set of test rows.

    Returns point estimates and, with ``n_bootstrap > 0``, intervals as
    ``<key>.ci_low`` / ``<key>.ci_high`` by each key's method (metrics/facts.py);
    ``<key>.ci_degenerate`` = 1 marks an interval of zero width or one resting
    on a group with no flags (or none of the label compared). ``rule`` says how
    the flags were set from the scores, so that resamples can set them again.
    An undefined metric is NaN with an :class:`MetricNaNWarning` naming
    it, never an exception.

    Examples
    --------
    >>> result = evaluate(["detection"], [0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8],
    ...                   [0, 0, 0, 1], ["a", "b", "a", "b"])
    >>> result.values["auroc"]
    0.75
    """
    check_spec(MetricsSpec(families=list(families), bootstrap=n_bootstrap, level=level, resample=resample))
    inputs = MetricInput.build(label, score, flag, group, embedding, reference_group, rule)
    counts = inputs.counts()
    values: dict[str, float] = {}
    notes: dict[str, str] = {}
    batched = [f for f in families if f in BATCHED]
    for family in batched:
        if family == "score_fairness":
            out, pairs = score_fairness_from_counts(counts, with_pairs=True)
            notes.update(pairs)
        else:
            out = BATCHED[family](counts)
        values.update({k: float(v[0]) for k, v in out.items()})
    if "flag_fairness" in families:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MetricNaNWarning)
            tests = flag_tests(counts)  # the point-estimate counts, not computed again
        notes.update({k: v for k, v in tests.items() if isinstance(v, str)})
        values.update({k: float(v) for k, v in tests.items() if not isinstance(v, str)})
        notes["reference_group"] = inputs.group_names[inputs.reference]
    for key, value in values.items():
        if np.isnan(value):
            warnings.warn(f"{key} is undefined ({_reason(key)}); reported as NaN", MetricNaNWarning, stacklevel=2)
    intervals = n_bootstrap > 0
    if "leakage" in families and inputs.embedding is not None:
        values.update(leakage(inputs.embedding, group, seed=seed, level=level, n_bootstrap=n_bootstrap,
                              intervals=intervals))

    if intervals:
        methods = interval_methods(values, inputs, counts)
        values.update(closed_form_intervals(methods, counts, level))
        wanted = [k for k, m in methods.items() if m == "bootstrap"]
        if wanted and batched:
            values.update(_bootstrap_intervals(inputs, batched, values, wanted, n_bootstrap, seed, level, resample))
        values.update(degenerate_marks(methods, values, counts))
        notes["interval_methods"] = json.dumps(
            {m: sorted(k for k, v in methods.items() if v == m) for m in sorted(set(methods.values()))})
    return SuiteResult(values=values, notes=notes)


def interval_methods(values: dict, inputs: MetricInput, counts) -> dict[str, str]:
    """The interval method of every key that gets one (see metrics/facts.py)."""
    methods = {}
    for key, value in values.items():
        found = fact(key)
        if found is None or found.interval in ("none", "cv") or "." in key or not np.isfinite(value):
            continue
        method = found.interval
        if method.startswith("rate/"):
            closed = method.split("/", 1)[1]
            large = all(x >= MIN_BOOTSTRAP_COUNT and n - x >= MIN_BOOTSTRAP_COUNT for x, n in rate_counts(counts, key))
            method = "bootstrap" if inputs.rule is not None and large else closed
        methods[key] = method
    return methods


def closed_form_intervals(methods: dict, counts, level: float) -> dict[str, float]:
    out = {}
    delong = _delong_parts(counts) if "delong" in methods.values() else {}
    for key, method in methods.items():
        if method in ("wilson", "newcombe", "katz"):
            pairs = rate_counts(counts, key)
            if method == "wilson":
                low, high = wilson(*pairs[0], level)
            elif method == "newcombe":
                low, high = newcombe_difference(*pairs[0], *pairs[1], level)
            else:
                low, high = katz_ratio(*pairs[0], *pairs[1], level)
        elif method == "delong":
            estimate, variance = delong[key]
            if key.startswith("auroc_diff/"):
                low, high = normal_interval(estimate, variance, level, -1.0, 1.0)
            else:
                low, high = logit_interval(estimate, variance, level)
        else:
            continue
        out[f"{key}.ci_low"], out[f"{key}.ci_high"] = float(low), float(high)
    return out


def _delong_parts(counts) -> dict[str, tuple[float, float]]:
    """(AUROC, DeLong variance) of every AUROC key, from the point counts."""
    pos, neg = counts.blocks[0, :, 1, :], counts.blocks[0, :, 0, :]
    names, ref = [group_key(n) for n in counts.group_names], counts.reference
    parts = {"auroc": delong_from_blocks(pos.sum(axis=0), neg.sum(axis=0))}
    per_group = [delong_from_blocks(pos[g], neg[g]) for g in range(len(names))]
    for g, name in enumerate(names):
        parts[f"auroc/{name}"] = per_group[g]
        if g != ref:  # disjoint rows: the variances add
            parts[f"auroc_diff/{name}"] = (per_group[g][0] - per_group[ref][0], per_group[g][1] + per_group[ref][1])
        for b, other in enumerate(names):
            if b != g:
                parts[f"cross_auroc/{name}_vs_{other}"] = delong_from_blocks(pos[g], neg[b])
    return parts


def degenerate_marks(methods: dict, values: dict, counts) -> dict[str, float]:
    """``<key>.ci_degenerate`` = 1 where an interval is missing, of zero width,
    or rests on a group with no flags (or no rows of the label compared)."""
    out = {}
    for key, method in methods.items():
        low, high = values.get(f"{key}.ci_low", np.nan), values.get(f"{key}.ci_high", np.nan)
        empty = False
        if method in ("wilson", "newcombe", "katz") or (method == "bootstrap" and fact(key).interval.startswith("rate/")):
            empty = any(x == 0 or n == 0 for x, n in rate_counts(counts, key))
        if empty or not (np.isfinite(low) and np.isfinite(high)) or high - low <= 1e-12:
            out[f"{key}.ci_degenerate"] = 1.0
    return out


def _bootstrap_intervals(inputs: MetricInput, families, point: dict, wanted: list[str], n_bootstrap: int, seed: int,
                         level: float, resample: str):
    rng = np.random.default_rng(seed)
    wanted_set = set(wanted)
    samples: dict[str, list[np.ndarray]] = {}
    shift: dict[str, float] = {}

    def family_values(counts):
        if inputs.rule is not None:
            counts = rethreshold(counts, inputs.rule)
        for family in families:
            for key, value in BATCHED[family](counts).items():
                if key in wanted_set:
                    yield key, value

    with np.errstate(all="ignore"):
        if len(inputs.label) <= bootstrap.EXACT_MAX_ROWS:
            for weights in bootstrap.resample_weights(inputs, n_bootstrap, rng, scheme=resample):
                for key, value in family_values(inputs.counts(weights)):
                    samples.setdefault(key, []).append(value)
        else:
            cells, bin_mean = inputs.binned_cells(bootstrap.N_BINS)
            binned_point = counts_from_cells(cells[None], bin_mean, inputs.group_names, inputs.reference)
            for key, value in family_values(binned_point):
                shift[key] = point[key] - float(value[0])
            for chunk in bootstrap.resample_cells(cells, n_bootstrap, rng, scheme=resample):
                for key, value in family_values(counts_from_cells(chunk, bin_mean, inputs.group_names, inputs.reference)):
                    samples.setdefault(key, []).append(value)
    out = {}
    for key, parts in samples.items():
        low, high = bootstrap.percentile_interval(np.concatenate(parts), level)
        offset = shift.get(key, 0.0)
        out[f"{key}.ci_low"], out[f"{key}.ci_high"] = low + offset, high + offset
    return out
