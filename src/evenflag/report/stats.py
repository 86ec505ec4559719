"""Statistical comparisons of detectors over datasets (Demsar, "Statistical
Comparisons of Classifiers over Multiple Data Sets", JMLR 7, 2006).

Datasets are the blocks: every comparison takes one value per dataset and
method (the mean over seeds). Seeds of one dataset share its data and are not
independent evidence about methods in general; treating them as separate pairs
makes a test reject far too often (34.6% at a nominal 5%, against 5.0% over
dataset means, in 1,000 simulated studies of 10 datasets x 5 seeds with no
difference on average).

* Wilcoxon signed-rank test between two methods over datasets, with the
  smallest p-value the number of datasets allows;
* Friedman test with the tie correction and an exact (or, for large designs,
  Monte Carlo) permutation p-value, the Iman-Davenport F, and the Nemenyi
  critical difference of mean ranks.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from itertools import permutations

import numpy as np
import pandas as pd

EXACT_WORK = 200_000        # state x permutation steps allowed for the exact Friedman p
MONTE_CARLO = 20_000        # permutations otherwise


@dataclass
class FriedmanResult:
    methods: list[str]
    mean_ranks: np.ndarray
    n_datasets: int
    chi2_f: float               # tie-corrected Friedman statistic
    f_f: float                  # Iman-Davenport F (NaN where undefined: rankings agree perfectly)
    p_value: float
    p_method: str               # "exact permutation", "Monte Carlo permutation" or "F approximation"
    critical_difference: float
    q_alpha: float

    @property
    def largest_rank_gap(self) -> int:
        return len(self.methods) - 1


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
    """Friedman statistic (no ties), Iman-Davenport F with its F p-value and the
    Nemenyi CD from mean ranks alone (Demsar 2006, section 3.2.2).

    Examples
    --------
    >>> r = friedman_from_ranks([3.143, 2.000, 2.893, 1.964], 14)
    >>> round(r.chi2_f, 2), round(r.f_f, 2), round(r.critical_difference, 2)
    (9.28, 3.69, 1.25)
    """
    ranks = np.asarray(mean_ranks, dtype=float)
    k, n = len(ranks), int(n_datasets)
    chi2 = 12 * n / (k * (k + 1)) * (np.sum(ranks ** 2) - k * (k + 1) ** 2 / 4)
    f_f, p = _iman_davenport(chi2, n, k)
    q = nemenyi_q(k, alpha)
    cd = q * math.sqrt(k * (k + 1) / (6 * n))
    return FriedmanResult(list(methods or [f"m{i}" for i in range(k)]), ranks, n, float(chi2), f_f, p,
                          "F approximation", cd, q)


def _iman_davenport(chi2: float, n: int, k: int) -> tuple[float, float]:
    from scipy.stats import f as f_dist

    denominator = n * (k - 1) - chi2
    if denominator <= 1e-12 or n < 2:
        return float("nan"), float("nan")  # perfect agreement: F is infinite, its p meaningless
    f_f = (n - 1) * chi2 / denominator
    return float(f_f), float(f_dist.sf(f_f, k - 1, (k - 1) * (n - 1)))


def rank_rows(values: np.ndarray, higher_is_better: bool) -> np.ndarray:
    """Rank within each row, 1 = best, ties get their average rank."""
    from scipy.stats import rankdata

    return np.vstack([rankdata(-row if higher_is_better else row) for row in values])


def tie_correction(ranks: np.ndarray) -> float:
    """1 - sum(t^3 - t) / (N k (k^2 - 1)) over groups of tied ranks (as
    ``scipy.stats.friedmanchisquare`` applies it)."""
    n, k = ranks.shape
    ties = sum(t ** 3 - t for row in ranks for t in Counter(row.tolist()).values())
    return 1.0 - ties / (n * k * (k * k - 1))


def friedman_statistic(ranks: np.ndarray) -> float:
    n, k = ranks.shape
    sums = ranks.sum(axis=0)
    chi2 = 12.0 / (n * k * (k + 1)) * np.sum(sums ** 2) - 3.0 * n * (k + 1)
    correction = tie_correction(ranks)
    return float(chi2 / correction) if correction > 0 else float("nan")


def friedman_permutation_p(ranks: np.ndarray, seed: int = 0) -> tuple[float, str]:
    """P-value of the Friedman statistic under its permutation distribution:
    with no difference between methods every ordering of a dataset's ranks is
    equally likely, independently across datasets. Exact by dynamic programming
    over datasets when the work is small, else Monte Carlo with a fixed seed.

    Examples
    --------
    >>> p, method = friedman_permutation_p(np.array([[1.0, 2.0, 3.0], [1.0, 2.0, 3.0]]))
    >>> round(p, 12), method
    (0.166666666667, 'exact permutation')
    """
    n, k = ranks.shape
    observed = np.sum(ranks.sum(axis=0) ** 2)
    doubled = np.rint(2 * ranks).astype(int)          # average ranks are halves at worst
    states: dict[tuple, float] = {tuple([0] * k): 1.0}
    work = 0 if math.factorial(k) <= EXACT_WORK // 10 else EXACT_WORK + 1
    for values in doubled if work <= EXACT_WORK else []:
        row = sorted(set(permutations(values.tolist())))
        work += len(states) * len(row)
        if work > EXACT_WORK:
            break
        step: dict[tuple, float] = {}
        share = 1.0 / len(row)
        for state, prob in states.items():
            for perm in row:
                key = tuple(a + b for a, b in zip(state, perm))
                step[key] = step.get(key, 0.0) + prob * share
        states = step
    if work <= EXACT_WORK:
        target = 4 * observed - 1e-6                  # compare on the doubled scale
        p = sum(prob for state, prob in states.items() if sum(v * v for v in state) >= target)
        return float(min(1.0, p)), "exact permutation"
    rng = np.random.default_rng(seed)
    stats = np.empty(MONTE_CARLO)
    for start in range(0, MONTE_CARLO, 2000):
        size = min(2000, MONTE_CARLO - start)
        shuffled = rng.permuted(np.broadcast_to(ranks, (size, n, k)), axis=2)
        stats[start:start + size] = np.sum(shuffled.sum(axis=1) ** 2, axis=1)
    exceed = int(np.sum(stats >= observed - 1e-9))
    return (1 + exceed) / (1 + MONTE_CARLO), "Monte Carlo permutation"


def friedman_nemenyi(scores: pd.DataFrame, higher_is_better: bool = True, alpha: float = 0.05,
                     seed: int = 0) -> FriedmanResult:
    """``scores``: rows = datasets, columns = methods (one value per cell, the
    mean over seeds). Rank 1 = best; ties get average ranks. The p-value is the
    permutation p of the tie-corrected statistic (exact where feasible), valid
    for any number of datasets; Iman-Davenport's F is reported beside it."""
    complete = scores.dropna(axis=1, how="all").dropna()  # methods with no result at all leave the test
    if complete.shape[0] < 2 or complete.shape[1] < 2:
        raise ValueError("the Friedman test needs at least 2 datasets and 2 methods with complete results")
    ranks = rank_rows(complete.to_numpy(dtype=float), higher_is_better)
    n, k = ranks.shape
    chi2 = friedman_statistic(ranks)
    f_f, _ = _iman_davenport(chi2, n, k)
    p, method = friedman_permutation_p(ranks, seed)
    q = nemenyi_q(k, alpha)
    cd = q * math.sqrt(k * (k + 1) / (6 * n))
    return FriedmanResult(list(complete.columns), ranks.mean(axis=0), n, chi2, f_f, p, method, cd, q)


def cd_diagram_reason(result: FriedmanResult, alpha: float = 0.05) -> str | None:
    """Why a critical-difference diagram would mislead here, or None if it may be drawn."""
    if not result.p_value < alpha:
        return (f"the Friedman test does not reject equal performance (p = {result.p_value:.3g} "
                f">= {alpha:g}), so no pairwise differences are claimed")
    if result.critical_difference >= result.largest_rank_gap:
        return (f"the Nemenyi critical difference ({result.critical_difference:.2f}) is at least the largest "
                f"possible rank gap ({result.largest_rank_gap}) with {result.n_datasets} datasets: "
                "no pair of methods can be told apart")
    return None


def smallest_wilcoxon_p(n: int) -> float:
    """Smallest two-sided p-value the exact signed-rank test can give with n
    pairs (every difference of one sign): 2 / 2**n.

    Examples
    --------
    >>> smallest_wilcoxon_p(5)
    0.0625
    """
    return min(1.0, 2.0 / 2 ** n) if n > 0 else 1.0


def wilcoxon_datasets(matrix: pd.DataFrame, method_a: str, method_b: str) -> dict:
    """Wilcoxon signed-rank test of two methods over datasets (rows of
    ``matrix``, one value per dataset: the mean over seeds)."""
    from scipy.stats import wilcoxon

    paired = matrix[[method_a, method_b]].dropna() if {method_a, method_b} <= set(matrix.columns) else pd.DataFrame()
    n = len(paired)
    out = {"n": n, "statistic": float("nan"), "p_value": float("nan"), "median_difference": float("nan"),
           "smallest_p": smallest_wilcoxon_p(n)}
    if n < 2:
        return out
    diff = paired[method_a] - paired[method_b]
    out["median_difference"] = float(diff.median())
    if np.allclose(diff, 0):
        out["p_value"] = 1.0
        return out
    result = wilcoxon(paired[method_a], paired[method_b])
    out.update(statistic=float(result.statistic), p_value=float(result.pvalue))
    return out
