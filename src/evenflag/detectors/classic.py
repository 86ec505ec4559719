"""Classic detectors: isolation forest and any scikit-learn-style outlier estimator."""

from __future__ import annotations

import inspect
from typing import Any

import numpy as np

from evenflag.plugins import import_object
from evenflag.errors import DetectorError


def check_width(X: np.ndarray, expected: int | None, who: str) -> np.ndarray:
    X = np.asarray(X, dtype=np.float32)
    if X.ndim != 2:
        raise DetectorError(f"{who}: X must be 2-d (rows x features), got shape {X.shape}")
    if expected is not None and X.shape[1] != expected:
        raise DetectorError(f"{who}: X has {X.shape[1]} features but the detector was fitted on {expected}")
    return X


class SklearnDetector:
    """Wrap a scikit-learn-style outlier estimator.

    scikit-learn's ``score_samples`` is higher for *normal* rows; the wrapper
    negates it so that higher = more anomalous.

    Parameters
    ----------
    estimator : str
        Import path, e.g. ``sklearn.neighbors.LocalOutlierFactor``.
    params : dict
        Constructor arguments of the estimator.
    seed : int, optional
        Passed as ``random_state`` when the estimator has one.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).normal(size=(200, 3))
    >>> det = SklearnDetector("sklearn.covariance.EllipticEnvelope", {"support_fraction": 1.0}).fit(X)
    >>> scores = det.anomaly_score(np.array([[0.0, 0.0, 0.0], [8.0, 8.0, 8.0]]))
    >>> bool(scores[1] > scores[0])
    True
    """

    def __init__(self, estimator: str, params: dict[str, Any] | None = None, seed: int | None = None):
        self.estimator = estimator
        self.params = dict(params or {})
        self.seed = seed

    def _unfitted_model(self):
        cls = import_object(self.estimator, "estimator")
        params = dict(self.params)
        if self.seed is not None and "random_state" in inspect.signature(cls.__init__).parameters:
            params.setdefault("random_state", self.seed)
        if cls.__name__ == "LocalOutlierFactor":
            params.setdefault("novelty", True)  # scoring new rows needs novelty mode
        try:
            return cls(**params)
        except TypeError as exc:
            raise DetectorError(f"{self.estimator}: {exc}; check detector.params") from exc

    def check_settings(self) -> None:
        """Check the estimator's arguments without data, so a sweep with
        ``n_estimators=-5`` stops at launch. scikit-learn estimators declare
        their allowed values (``_parameter_constraints``, checked by
        ``_validate_params`` since scikit-learn 1.2); others are only built."""
        model = self._unfitted_model()
        validate = getattr(model, "_validate_params", None)
        if callable(validate):
            try:
                validate()
            except (TypeError, ValueError) as exc:
                raise DetectorError(f"{self.estimator}: {str(exc).splitlines()[0]}") from exc
        if not hasattr(model, "score_samples"):
            raise DetectorError(f"{self.estimator} has no score_samples; use an outlier detector")

    def fit(self, X, group=None):
        X = check_width(X, None, self.estimator)
        self.model_ = self._unfitted_model().fit(X)
        if not hasattr(self.model_, "score_samples"):
            raise DetectorError(f"{self.estimator} has no score_samples; use an outlier detector")
        self.n_features_in_ = X.shape[1]
        return self

    def anomaly_score(self, X):
        X = check_width(X, self.n_features_in_, self.estimator)
        return -np.asarray(self.model_.score_samples(X), dtype=np.float64)


class IsolationForestDetector(SklearnDetector):
    """Isolation forest (Liu, Ting and Zhou, 2008) through scikit-learn.

    Examples
    --------
    >>> import numpy as np
    >>> X = np.random.default_rng(0).normal(size=(300, 4))
    >>> det = IsolationForestDetector(n_estimators=50, seed=0).fit(X)
    >>> det.anomaly_score(X).shape
    (300,)
    """

    def __init__(self, n_estimators: int = 100, max_samples: Any = "auto", max_features: float = 1.0,
                 seed: int | None = None):
        super().__init__(
            "sklearn.ensemble.IsolationForest",
            {"n_estimators": n_estimators, "max_samples": max_samples, "max_features": max_features},
            seed,
        )
        self.n_estimators = n_estimators
        self.max_samples = max_samples
        self.max_features = max_features
