"""How much group information a detector's representation carries."""

from __future__ import annotations

import numpy as np

from evenflag.metrics.inputs import warn_undefined


def leakage_auroc(embedding, group, folds: int = 5, seed: int = 0) -> float:
    """Cross-validated AUROC of a fresh logistic-regression probe that predicts
    the group from the embedding (one-vs-rest macro AUROC for more than two
    groups). 0.5 means the embedding tells nothing about the group.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> group = rng.choice(["a", "b"], 400)
    >>> abs(leakage_auroc(rng.normal(size=(400, 3)), group) - 0.5) < 0.1
    True
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.metrics import roc_auc_score
    from sklearn.model_selection import StratifiedKFold
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    embedding = np.asarray(embedding, dtype=np.float64)
    names, codes = np.unique(np.asarray(group).astype(str), return_inverse=True)
    smallest = np.bincount(codes).min()
    if len(names) < 2 or smallest < 2:
        warn_undefined("leakage_auroc", "a group has fewer than 2 rows")
        return float("nan")
    if np.allclose(embedding.std(axis=0), 0):
        return 0.5  # a constant embedding carries no information at all
    splitter = StratifiedKFold(n_splits=min(folds, int(smallest)), shuffle=True, random_state=seed)
    proba = np.zeros((len(codes), len(names)))
    for train, test in splitter.split(embedding, codes):
        probe = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))
        probe.fit(embedding[train], codes[train])
        proba[test] = probe.predict_proba(embedding[test])
    if len(names) == 2:
        return float(roc_auc_score(codes, proba[:, 1]))
    return float(roc_auc_score(codes, proba, multi_class="ovr", average="macro"))


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
