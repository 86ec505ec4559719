"""Statistical comparisons of detectors (Demsar, "Statistical Comparisons of
Classifiers over Multiple Data Sets", JMLR 7, 2006).

* Wilcoxon signed-rank test between two detectors on paired (dataset, seed) results;
* Friedman test over datasets with the Iman-Davenport F correction, and the
  Nemenyi critical difference of mean ranks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass
class FriedmanResult:
    methods: list[str]
    mean_ranks: np.ndarray
    n_datasets: int
    chi2_f: float
    f_f: float
    p_value: float
    critical_difference: float
    q_alpha: float


def nemenyi_q(k: int, alpha: float = 0.05) -> float:
    """Critical value q_alpha of the Nemenyi test: the studentized range
    quantile for k groups and infinite degrees of freedom, divided by sqrt(2).

    Examples
    --------
    >>> round(nemenyi_q(4), 3)
    2.569
    """
    from scipy.stats import studentized_range

    return float(studentized_range.ppf(1 - alpha, k, np.inf) / math.sqrt(2))


def friedman_from_ranks(mean_ranks, n_datasets: int, alpha: float = 0.05, methods=None) -> FriedmanResult:
    """Friedman statistic, Iman-Davenport F and Nemenyi CD from mean ranks.

    Examples
    --------
    >>> r = friedman_from_ranks([3.143, 2.000, 2.893, 1.964], 14)
    >>> round(r.chi2_f, 2), round(r.f_f, 2), round(r.critical_difference, 2)
    (9.28, 3.69, 1.25)
    """
    from scipy.stats import f as f_dist

    ranks = np.asarray(mean_ranks, dtype=float)
    k, n = len(ranks), int(n_datasets)
    chi2 = 12 * n / (k * (k + 1)) * (np.sum(ranks ** 2) - k * (k + 1) ** 2 / 4)
    denominator = n * (k - 1) - chi2
    f_f = (n - 1) * chi2 / denominator if denominator > 0 else float("inf")
    p = float(f_dist.sf(f_f, k - 1, (k - 1) * (n - 1))) if np.isfinite(f_f) else 0.0
    q = nemenyi_q(k, alpha)
    cd = q * math.sqrt(k * (k + 1) / (6 * n))
    return FriedmanResult(list(methods or [f"m{i}" for i in range(k)]), ranks, n, float(chi2), float(f_f), p, cd, q)


def friedman_nemenyi(scores: pd.DataFrame, higher_is_better: bool = True, alpha: float = 0.05) -> FriedmanResult:
    """``scores``: rows = datasets, columns = methods (one value per cell, e.g.
    the mean over seeds). Rank 1 = best; ties get average ranks."""
    from scipy.stats import rankdata

    complete = scores.dropna()
    if complete.shape[0] < 2 or complete.shape[1] < 2:
        raise ValueError("the Friedman test needs at least 2 datasets and 2 methods with complete results")
    values = complete.to_numpy(dtype=float)
    ranks = np.vstack([rankdata(-row if higher_is_better else row) for row in values])
    return friedman_from_ranks(ranks.mean(axis=0), len(complete), alpha, methods=list(complete.columns))


def wilcoxon_pair(runs: pd.DataFrame, detector_a: str, detector_b: str, metric: str) -> dict:
    """Paired Wilcoxon signed-rank test on (dataset, seed) pairs where both finished."""
    from scipy.stats import wilcoxon

    finished = runs[runs["status"] == "FINISHED"]
    a = finished[finished["detector"] == detector_a].set_index(["dataset", "seed"])[metric]
    b = finished[finished["detector"] == detector_b].set_index(["dataset", "seed"])[metric]
    paired = pd.concat([a.rename("a"), b.rename("b")], axis=1, join="inner").dropna()
    if len(paired) < 2 or np.allclose(paired["a"], paired["b"]):
        return {"n": len(paired), "statistic": float("nan"), "p_value": float("nan"),
                "median_difference": float("nan")}
    result = wilcoxon(paired["a"], paired["b"])
    return {"n": len(paired), "statistic": float(result.statistic), "p_value": float(result.pvalue),
            "median_difference": float((paired["a"] - paired["b"]).median())}
