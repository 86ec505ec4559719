"""A complete example detector plugin (the one DEVELOPERS.md walks through)."""

import numpy as np


class CovarianceDistanceDetector:
    """Squared Mahalanobis distance to the training mean; higher = more anomalous."""

    def __init__(self, shrinkage: float = 0.1, seed: int | None = None):
        self.shrinkage = shrinkage  # pulls the covariance towards the identity
        self.seed = seed            # unused: the method is deterministic

    def fit(self, X, group=None):
        X = np.asarray(X, dtype=np.float64)
        cov = np.cov(X, rowvar=False).reshape(X.shape[1], X.shape[1])
        cov = (1 - self.shrinkage) * cov + self.shrinkage * np.eye(X.shape[1])
        self.mean_ = X.mean(axis=0)
        self.precision_ = np.linalg.inv(cov)
        return self

    def anomaly_score(self, X):
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != len(self.mean_):
            raise ValueError(f"expected {len(self.mean_)} features, got shape {X.shape}")
        centred = X - self.mean_
        return np.einsum("ij,jk,ik->i", centred, self.precision_, centred)
