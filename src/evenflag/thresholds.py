"""Threshold policies: scores become flags.

* ``top_fraction``: flag the top ``fraction`` of test scores (a review budget);
* ``train_quantile``: flag test scores above the ``1 - fraction`` quantile of
  the scores of held-out training rows (what a deployment without labels
  does). The runner holds out ``calibration_fraction`` of the training rows,
  the same share of every group, and fits the detector on the rest: scores of
  rows a flexible detector was fitted on are too low (it flagged 9.8% of new
  normal rows for a nominal 5% when cut on in-sample scores).
* ``true_rate``: flag as many test rows as there are true anomalies (the
  oracle setting common in papers).

Rows tied with the last flagged score are flagged too, so a policy never
separates equal scores.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from evenflag.errors import ConfigError

POLICIES = ("top_fraction", "train_quantile", "true_rate")


@dataclass
class ThresholdSpec:
    """Structured config of configs/threshold/*.yaml."""

    policy: str = "top_fraction"
    fraction: float = 0.05
    calibration_fraction: float = 0.2   # train_quantile: share of training rows held out to set the cut


def check_spec(spec: ThresholdSpec) -> None:
    """Refuse an unknown policy or a fraction outside (0, 1), before any work."""
    if spec.policy not in POLICIES:
        raise ConfigError(f"threshold.policy '{spec.policy}' is unknown; use one of {list(POLICIES)}")
    if spec.policy != "true_rate" and not 0.0 < spec.fraction < 1.0:
        raise ConfigError(f"threshold.fraction must be between 0 and 1 (exclusive), got {spec.fraction}")
    if not 0.0 < spec.calibration_fraction < 1.0:
        raise ConfigError(f"threshold.calibration_fraction must be between 0 and 1 (exclusive), got {spec.calibration_fraction}")


def _top_k(scores: np.ndarray, k: int) -> np.ndarray:
    if k <= 0:
        return np.zeros(len(scores), dtype=bool)
    k = min(k, len(scores))
    cut = np.partition(scores, len(scores) - k)[len(scores) - k]
    return scores >= cut


def flag_scores(spec: ThresholdSpec, test_scores, train_scores=None, test_labels=None) -> np.ndarray:
    """Flags for the test rows under a policy.

    Examples
    --------
    >>> flag_scores(ThresholdSpec("top_fraction", 0.25), np.array([0.1, 0.9, 0.5, 0.3])).tolist()
    [False, True, False, False]
    >>> flag_scores(ThresholdSpec("train_quantile", 0.5), np.array([0.1, 0.9]), train_scores=np.array([0.2, 0.4, 0.6])).tolist()
    [False, True]
    """
    scores = np.asarray(test_scores, dtype=np.float64)
    check_spec(spec)
    if spec.policy == "top_fraction":
        return _top_k(scores, int(round(spec.fraction * len(scores))))
    if spec.policy == "train_quantile":
        if train_scores is None:
            raise ConfigError("threshold policy train_quantile needs the scores of held-out training rows")
        cut = np.quantile(np.asarray(train_scores, dtype=np.float64), 1.0 - spec.fraction)
        return scores > cut
    if test_labels is None:
        raise ConfigError("threshold policy true_rate needs the test labels")
    return _top_k(scores, int(np.sum(test_labels)))
