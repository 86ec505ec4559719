"""A detector that fails on purpose for odd seeds (for failure-isolation tests)."""

import numpy as np


class FailsOnOddSeed:
    def __init__(self, seed: int = 0):
        self.seed = seed

    def fit(self, X, group=None):
        if self.seed % 2:
            raise RuntimeError(f"deliberate failure for seed {self.seed}")
        self.mean_ = np.asarray(X).mean(axis=0)
        return self

    def anomaly_score(self, X):
        return np.linalg.norm(np.asarray(X) - self.mean_, axis=1)


class AlwaysFails(FailsOnOddSeed):
    """Fails for every seed: a whole table cell without results."""

    def fit(self, X, group=None):
        raise RuntimeError("this detector always fails")
