"""Metric suites: named families of metrics evaluated together, with bootstrap CIs.

A suite is a list of family names (configs/metrics/*.yaml). Families:

=================  ===============================================================
``detection``      auroc, average_precision, flag_precision/recall/f1, precision_at_k
``flag_fairness``  flag rates per group, flag_rate_ratio, flag_rate_gap,
                   four_fifths_pass, hit_rate_gap, false_flag_gap, per-group
                   precision, worst-pair z and Fisher tests, flips_to_parity
``score_fairness`` score_distance(_raw), score_ks, per-group AUROC,
                   group_auroc_gap, cross-group AUROC
``leakage``        leakage_auroc (needs an embedding; skipped without one)
=================  ===============================================================
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from evenflag.errors import ConfigError
from evenflag.metrics import bootstrap
from evenflag.metrics.detection import detection_from_counts
from evenflag.metrics.flag_fairness import flag_fairness_from_counts, flag_tests
from evenflag.metrics.inputs import MetricInput, UndefinedMetricWarning, counts_from_cells
from evenflag.metrics.leakage import leakage_auroc
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
    """Structured config of configs/metrics/*.yaml."""

    families: list[str] = field(default_factory=lambda: list(FAMILIES))
    bootstrap: int = 200
    level: float = 0.95


@dataclass
class SuiteResult:
    values: dict[str, float]
    notes: dict[str, str]


def _reason(key: str) -> str:
    if key.startswith(("auroc", "average_precision", "precision_at_k", "group_auroc", "cross_auroc")):
        return "needs both anomalies and normal rows (in each group compared)"
    if key.startswith(("hit_rate", "false_flag")):
        return "a group has no rows of the needed label"
    if key.startswith(("flag_rate", "four_fifths", "flag_precision", "precision", "group_precision", "flag_f1")):
        return "no row is flagged in the rows compared"
    return "inputs do not define it"


def evaluate(families, label, score, flag, group, embedding=None, n_bootstrap: int = 0,
             seed: int = 0, level: float = 0.95) -> SuiteResult:
    """Evaluate metric families on one set of test rows.

    Returns point estimates and, with ``n_bootstrap > 0``, percentile CIs as
    ``<key>.ci_low`` / ``<key>.ci_high``. An undefined metric is NaN with an
    :class:`UndefinedMetricWarning` naming it, never an exception.

    Examples
    --------
    >>> result = evaluate(["detection"], [0, 0, 1, 1], [0.1, 0.4, 0.35, 0.8],
    ...                   [0, 0, 0, 1], ["a", "b", "a", "b"])
    >>> result.values["auroc"]
    0.75
    """
    unknown = [f for f in families if f not in FAMILIES]
    if unknown:
        raise ConfigError(f"unknown metric family {unknown}; use any of {list(FAMILIES)}")
    inputs = MetricInput.build(label, score, flag, group, embedding)
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
            warnings.simplefilter("ignore", UndefinedMetricWarning)
            tests = flag_tests(counts)  # the point-estimate counts, not computed again
        notes.update({k: v for k, v in tests.items() if isinstance(v, str)})
        values.update({k: float(v) for k, v in tests.items() if not isinstance(v, str)})
    if "leakage" in families and inputs.embedding is not None:
        values["leakage_auroc"] = leakage_auroc(inputs.embedding, group, seed=seed)
    for key, value in values.items():
        if np.isnan(value):
            warnings.warn(f"{key} is undefined ({_reason(key)}); reported as NaN", UndefinedMetricWarning, stacklevel=2)

    if n_bootstrap > 0 and batched:
        values.update(_bootstrap_intervals(inputs, batched, values, n_bootstrap, seed, level))
    return SuiteResult(values=values, notes=notes)


def _bootstrap_intervals(inputs: MetricInput, families, point: dict, n_bootstrap: int, seed: int, level: float):
    rng = np.random.default_rng(seed)
    samples: dict[str, list[np.ndarray]] = {}
    shift: dict[str, float] = {}

    def collect(counts):
        for family in families:
            for key, value in BATCHED[family](counts).items():
                samples.setdefault(key, []).append(value)

    with np.errstate(all="ignore"):
        if len(inputs.label) <= bootstrap.EXACT_MAX_ROWS:
            for weights in bootstrap.resample_weights(inputs, n_bootstrap, rng):
                collect(inputs.counts(weights))
        else:
            cells, bin_mean = inputs.binned_cells(bootstrap.N_BINS)
            binned_point = counts_from_cells(cells[None], bin_mean, inputs.group_names)
            for family in families:
                for key, value in BATCHED[family](binned_point).items():
                    shift[key] = point[key] - float(value[0])
            for chunk in bootstrap.resample_cells(cells, n_bootstrap, rng):
                collect(counts_from_cells(chunk, bin_mean, inputs.group_names))
    out = {}
    for key, parts in samples.items():
        low, high = bootstrap.percentile_interval(np.concatenate(parts), level)
        offset = shift.get(key, 0.0)
        out[f"{key}.ci_low"], out[f"{key}.ci_high"] = low + offset, high + offset
    return out
