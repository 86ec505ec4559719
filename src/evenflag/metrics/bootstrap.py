"""Percentile bootstrap with resampling inside every group x label stratum.

Resamples are represented as integer row weights (how often each row was
drawn), built a chunk at a time, so the count-based metrics of a whole chunk
come out of a few matrix operations instead of a loop over resamples.
"""

from __future__ import annotations

import numpy as np

from evenflag.metrics.inputs import MetricInput

CHUNK_CELLS = 16_000_000  # weights held at once: about 64 MB of float32


def resample_weights(inputs: MetricInput, n_resamples: int, rng: np.random.Generator, dtype=np.float32):
    """Yield weight matrices of shape (chunk, n), rows drawn with replacement
    inside each group x label stratum (so every resample keeps the stratum sizes)."""
    n = len(inputs.label)
    strata = inputs.group * 2 + inputs.label
    members = [np.flatnonzero(strata == s) for s in np.unique(strata)]
    chunk = max(1, min(n_resamples, CHUNK_CELLS // max(n, 1)))
    done = 0
    while done < n_resamples:
        size = min(chunk, n_resamples - done)
        offsets = (np.arange(size, dtype=np.int64) * n)[:, None]
        drawn = np.concatenate([rows[rng.integers(0, len(rows), size=(size, len(rows)))] for rows in members], axis=1)
        weights = np.bincount((drawn + offsets).ravel(), minlength=size * n).astype(dtype).reshape(size, n)
        done += size
        yield weights


def percentile_interval(samples: np.ndarray, level: float = 0.95) -> tuple[float, float]:
    finite = samples[np.isfinite(samples)]
    if len(finite) < max(10, len(samples) // 2):
        return float("nan"), float("nan")
    tail = (1 - level) / 2 * 100
    low, high = np.percentile(finite, [tail, 100 - tail])
    return float(low), float(high)
