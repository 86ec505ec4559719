"""Conformance checks that detector plugin authors run on their own class.

From the shell: ``evenflag check-detector mypkg.module:MyDetector``.
In pytest::

    from evenflag.detectors.conformance import assert_conforms
    def test_my_detector():
        assert_conforms(MyDetector, n_components=3)
"""

from __future__ import annotations

import pickle
from dataclasses import dataclass

import numpy as np

from evenflag.detectors.base import resolve_detector_class


@dataclass
class CheckResult:
    name: str
    passed: bool
    detail: str = ""


def _data(seed: int = 0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(300, 5)).astype(np.float32)
    outliers = (rng.normal(size=(10, 5)) * 0.5 + 6.0).astype(np.float32)
    groups = np.where(rng.random(300) < 0.4, "b", "a")
    return X, outliers, groups


def check_detector(cls, **params) -> list[CheckResult]:
    """Run every check on a detector class; returns one result per check."""
    results: list[CheckResult] = []
    X, outliers, groups = _data()
    test = np.vstack([X[:50], outliers])

    def make(seed=0):
        kwargs = dict(params)
        try:
            return cls(seed=seed, **kwargs)
        except TypeError:
            return cls(**kwargs)

    def run(name, fn):
        try:
            detail = fn() or ""
            results.append(CheckResult(name, True, detail))
        except Exception as exc:  # a check reports, it never crashes the checker
            results.append(CheckResult(name, False, f"{type(exc).__name__}: {exc}"))

    state = {}

    def fit_returns_self():
        det = make()
        X_before, groups_before = X.copy(), groups.copy()
        returned = det.fit(X, group=groups)
        assert returned is det, "fit must return self"
        state["det"] = det
        assert np.array_equal(X, X_before) and np.array_equal(groups, groups_before), "fit changed its inputs"

    def score_shape():
        det = state["det"]
        before = test.copy()
        scores = np.asarray(det.anomaly_score(test))
        assert np.array_equal(test, before), "anomaly_score changed its input"
        assert scores.shape == (len(test),), f"expected shape ({len(test)},), got {scores.shape}"
        assert np.issubdtype(scores.dtype, np.floating), f"scores must be floats, got {scores.dtype}"
        assert np.isfinite(scores).all(), "scores contain NaN or inf"
        state["scores"] = scores

    def higher_is_more_anomalous():
        scores = state["scores"]
        assert np.median(scores[50:]) > np.median(scores[:50]), (
            "obvious outliers score lower than normal rows; anomaly_score must be higher for anomalies "
            "(negate scikit-learn's score_samples)")

    def deterministic():
        a = np.asarray(make(seed=3).fit(X, group=groups).anomaly_score(test))
        b = np.asarray(make(seed=3).fit(X, group=groups).anomaly_score(test))
        assert np.array_equal(a, b), f"same seed, different scores (max difference {np.abs(a - b).max():.3g})"

    def wrong_width():
        det = state["det"]
        try:
            det.anomaly_score(np.zeros((4, X.shape[1] + 2), dtype=np.float32))
        except Exception as exc:
            return f"raises {type(exc).__name__}: {str(exc)[:80]}"
        raise AssertionError("scoring rows with the wrong number of features did not raise")

    def picklable():
        det = state["det"]
        if getattr(det, "picklable", True) is False:
            return "declared not picklable (picklable = False)"
        copy = pickle.loads(pickle.dumps(det))
        assert np.allclose(copy.anomaly_score(test), state["scores"]), "unpickled detector scores differently"

    def learned_state():
        det = state["det"]
        learned = [k for k in vars(det) if k.endswith("_") and not k.startswith("_")]
        assert learned, "no learned attribute ending in '_' after fit"
        return ", ".join(learned[:5])

    def embedding():
        det = state["det"]
        if not hasattr(det, "embed"):
            return "no embed(); leakage_auroc will be skipped"
        emb = np.asarray(det.embed(test))
        assert emb.ndim == 2 and len(emb) == len(test), f"embed must return (rows, d), got {emb.shape}"
        return f"embedding width {emb.shape[1]}"

    for name, fn in [("fit returns self, inputs unchanged", fit_returns_self),
                     ("anomaly_score shape and finiteness", score_shape),
                     ("higher score = more anomalous", higher_is_more_anomalous),
                     ("same seed, same scores", deterministic),
                     ("wrong input width raises", wrong_width),
                     ("picklable or declared not", picklable),
                     ("learned state in attributes ending in _", learned_state),
                     ("embed (optional)", embedding)]:
        if name != "fit returns self, inputs unchanged" and "det" not in state:
            results.append(CheckResult(name, False, "skipped: fit failed"))
            continue
        if name == "higher score = more anomalous" and "scores" not in state:
            results.append(CheckResult(name, False, "skipped: scoring failed"))
            continue
        run(name, fn)
    return results


def assert_conforms(cls, **params) -> None:
    """pytest helper: raise AssertionError listing every failed check."""
    failed = [r for r in check_detector(cls, **params) if not r.passed]
    assert not failed, "; ".join(f"{r.name}: {r.detail}" for r in failed)


def main(target: str) -> int:
    import os
    import sys

    # Like `python -m`, let a plugin in the current project import by its path.
    if os.getcwd() not in sys.path:
        sys.path.insert(0, os.getcwd())
    cls = resolve_detector_class(target)
    results = check_detector(cls)
    width = max(len(r.name) for r in results)
    for r in results:
        print(f"{'pass' if r.passed else 'FAIL'}  {r.name.ljust(width)}  {r.detail}")
    failed = sum(not r.passed for r in results)
    print(f"\n{len(results) - failed} passed, {failed} failed")
    return 1 if failed else 0
