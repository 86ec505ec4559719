"""How much group information a detector's representation carries.

Two fresh probes predict the group from the embedding of the test rows, each
scored on rows it was not fitted on (stratified k-fold): a logistic regression
(linear) and scikit-learn's histogram gradient boosting (non-linear). A model
trained to hide the group from one kind of adversary can still leak it to
another, so ``leakage_auroc`` is the larger of the two AUROCs; each probe's
value is kept as ``leakage_auroc/linear`` and ``leakage_auroc/boosted``.

Intervals come from the out-of-fold predictions: DeLong's interval for two
groups, a percentile bootstrap of the one-vs-rest macro AUROC for more.
``leakage_auroc`` takes the interval of the probe that reached the maximum;
choosing the larger of two estimates biases it slightly upwards, which errs on
the side of reporting leakage.
"""

from __future__ import annotations

import numpy as np

from evenflag.metrics.inputs import warn_undefined

PROBES = ("linear", "boosted")
MAX_PROBE_ROWS = 10_000  # larger test sets are subsampled (stratified by group) for the probes


def _probe(kind: str, seed: int):
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    if kind == "linear":
        return make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))
    return HistGradientBoostingClassifier(max_iter=100, random_state=seed)


def out_of_fold_probabilities(embedding, codes, kind: str, folds: int = 5, seed: int = 0) -> np.ndarray:
    """Group probabilities of every row from a probe fitted on the other folds."""
    from sklearn.model_selection import StratifiedKFold

    n_groups = int(codes.max()) + 1
    splitter = StratifiedKFold(n_splits=min(folds, int(np.bincount(codes).min())), shuffle=True, random_state=seed)
    proba = np.zeros((len(codes), n_groups))
    for train, test in splitter.split(embedding, codes):
        probe = _probe(kind, seed).fit(embedding[train], codes[train])
        proba[np.ix_(test, probe.classes_)] = probe.predict_proba(embedding[test])
    return proba


def _macro_auroc(codes, proba, weights=None) -> float:
    from evenflag.metrics.intervals import delong_from_blocks

    aucs = []
    for g in range(proba.shape[1]):
        values, inverse = np.unique(proba[:, g], return_inverse=True)
        w = np.ones(len(codes)) if weights is None else weights
        pos = np.bincount(inverse, weights=w * (codes == g), minlength=len(values))
        neg = np.bincount(inverse, weights=w * (codes != g), minlength=len(values))
        aucs.append(delong_from_blocks(pos, neg)[0])
    return float(np.mean(aucs))


def probe_auroc(codes, proba, level: float = 0.95, n_bootstrap: int = 200, seed: int = 0):
    """(AUROC, low, high) of out-of-fold group probabilities."""
    from evenflag.metrics.bootstrap import percentile_interval
    from evenflag.metrics.intervals import delong_components, normal_interval

    if proba.shape[1] == 2:
        auc, variance = delong_components(proba[codes == 1, 1], proba[codes == 0, 1])
        return (auc, *normal_interval(auc, variance, level))  # plain: an AUROC below 0.5 is possible here
    auc = _macro_auroc(codes, proba)
    if n_bootstrap <= 0:
        return auc, float("nan"), float("nan")
    rng = np.random.default_rng(seed)
    draws = [
        _macro_auroc(codes, proba, np.bincount(rng.integers(0, len(codes), len(codes)), minlength=len(codes)))
        for _ in range(n_bootstrap)
    ]
    return (auc, *percentile_interval(np.array(draws), level))


def leakage(embedding, group, folds: int = 5, seed: int = 0, level: float = 0.95, n_bootstrap: int = 200,
            intervals: bool = True) -> dict[str, float]:
    """``leakage_auroc`` and per-probe keys (with ``.ci_low``/``.ci_high`` when
    ``intervals``). NaN with a warning when a group has fewer than 2 rows."""
    embedding = np.asarray(embedding, dtype=np.float64)
    names, codes = np.unique(np.asarray(group).astype(str), return_inverse=True)
    if len(names) < 2 or np.bincount(codes).min() < 2:
        warn_undefined("leakage_auroc", "a group has fewer than 2 rows")
        return {"leakage_auroc": float("nan")}
    if np.allclose(embedding.std(axis=0), 0):
        return {"leakage_auroc": 0.5}  # a constant embedding carries no information at all
    if len(codes) > MAX_PROBE_ROWS:
        from sklearn.model_selection import train_test_split

        keep, _ = train_test_split(np.arange(len(codes)), train_size=MAX_PROBE_ROWS, stratify=codes, random_state=seed)
        embedding, codes = embedding[keep], codes[keep]
    out: dict[str, float] = {}
    best = None
    for kind in PROBES:
        proba = out_of_fold_probabilities(embedding, codes, kind, folds, seed)
        auc, low, high = probe_auroc(codes, proba, level, n_bootstrap, seed)
        out[f"leakage_auroc/{kind}"] = auc
        if intervals:
            out[f"leakage_auroc/{kind}.ci_low"], out[f"leakage_auroc/{kind}.ci_high"] = low, high
        if best is None or auc > best[0]:
            best = (auc, low, high)
    out["leakage_auroc"] = best[0]
    if intervals:
        out["leakage_auroc.ci_low"], out["leakage_auroc.ci_high"] = best[1], best[2]
    return out


def leakage_auroc(embedding, group, folds: int = 5, seed: int = 0) -> float:
    """The larger of the linear and the boosted-tree probe's cross-validated
    AUROC (one-vs-rest macro AUROC for more than two groups). 0.5 means the
    embedding tells neither probe anything about the group.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> group = rng.choice(["a", "b"], 400)
    >>> abs(leakage_auroc(rng.normal(size=(400, 3)), group) - 0.5) < 0.1
    True
    """
    return leakage(embedding, group, folds, seed, intervals=False)["leakage_auroc"]


def flag_overlap(flag_a, flag_b) -> float:
    """Jaccard index of two detectors' flagged sets on the same rows.

    Examples
    --------
    >>> flag_overlap([1, 1, 0, 0], [1, 0, 1, 0])
    0.3333333333333333
    """
    a = np.asarray(flag_a).astype(bool)
    b = np.asarray(flag_b).astype(bool)
    if a.shape != b.shape:
        from evenflag.errors import MetricInputError

        raise MetricInputError(f"flag sets have different lengths {a.shape} and {b.shape}; compare flags on the same rows")
    union = (a | b).sum()
    if union == 0:
        warn_undefined("flag_overlap", "neither detector flags any row")
        return float("nan")
    return float((a & b).sum() / union)
