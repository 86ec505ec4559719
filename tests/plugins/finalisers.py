"""A detector whose fit spends its time inside ``__del__`` finalisers, where
Python prints and drops an exception raised by a signal handler (the Python
documentation, "Data model: object.__del__": exceptions raised during __del__
are ignored and a warning is printed to sys.stderr). For the Ctrl-C tests."""

import time

import numpy as np


class _Finalised:
    def __del__(self):
        started = time.perf_counter()
        while time.perf_counter() - started < 0.05:  # Python code, so a pending signal is handled in here
            pass


class FitsInFinalisers:
    def __init__(self, seconds: float = 20.0, seed: int = 0):
        self.seconds = seconds
        self.seed = seed

    def fit(self, X, group=None):
        end = time.time() + self.seconds
        while time.time() < end:
            _Finalised()  # created and finalised at once
        self.mean_ = np.asarray(X).mean(axis=0)
        return self

    def anomaly_score(self, X):
        return np.linalg.norm(np.asarray(X) - self.mean_, axis=1)
