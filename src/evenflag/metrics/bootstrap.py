"""Percentile bootstrap over test rows.

Two resampling schemes (``metrics.resample``):

* ``rows`` (default): rows drawn with replacement from all test rows, so group
  sizes and each group's anomaly share vary from resample to resample as they
  do between samples of people drawn from one population. This is the scheme
  whose intervals reached nominal coverage in our simulations
  (scripts/sim_coverage.py).
* ``strata``: rows drawn inside every group x label stratum, so every resample
  keeps the observed group sizes and label mix. It answers a narrower question
  (these groups with exactly these anomaly counts) and its intervals of
  quantities that depend on the label mix are too narrow for the wider one.

Two exact-in-distribution ways to draw the same resamples:

* up to ``EXACT_MAX_ROWS`` rows: integer row weights (how often each row was
  drawn), built a chunk of resamples at a time;
* above it: rows are first pooled into cells (group, label, score bin, flag)
  with bins at pooled score quantiles; a resample is then one multinomial draw
  over the cells (of each stratum, for ``strata``), so its cost does not grow
  with the number of rows. Scores within a bin count as tied, which moves each
  metric slightly; the interval is shifted by the same offset measured on the
  point estimate (exact minus binned).

Either way every metric of a chunk comes out of array operations on count
tables, without a Python loop over resamples.
"""

from __future__ import annotations

import numpy as np

from evenflag.metrics.inputs import MetricInput

CHUNK_CELLS = 16_000_000  # weights held at once: about 64 MB of float32
EXACT_MAX_ROWS = 20_000
N_BINS = 2_000
CHUNK_RESAMPLES = 50
SCHEMES = ("rows", "strata")


def resample_weights(inputs: MetricInput, n_resamples: int, rng: np.random.Generator, dtype=np.float32,
                     scheme: str = "rows"):
    """Yield weight matrices of shape (chunk, n): how often each row was drawn,
    from all rows (``rows``) or inside each group x label stratum (``strata``)."""
    n = len(inputs.label)
    if scheme == "rows":
        members = [np.arange(n)]
    else:
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
    """Percentile interval of the finite resample values; NaN when fewer than
    half of the resamples (or fewer than 10) define the metric."""
    finite = samples[np.isfinite(samples)]
    if len(finite) < max(10, len(samples) // 2):
        return float("nan"), float("nan")
    tail = (1 - level) / 2 * 100
    low, high = np.percentile(finite, [tail, 100 - tail])
    return float(low), float(high)


def resample_cells(cells: np.ndarray, n_resamples: int, rng: np.random.Generator, scheme: str = "rows"):
    """Yield (chunk, G, 2, bins, 2) cell tables: all cells redrawn as one
    multinomial (``rows``) or each group x label stratum over its own cells
    (``strata``)."""
    G = cells.shape[0]
    flat = cells.reshape(G, 2, -1)
    done = 0
    while done < n_resamples:
        size = min(CHUNK_RESAMPLES, n_resamples - done)
        if scheme == "rows":
            n = int(cells.sum())
            out = rng.multinomial(n, cells.ravel() / n, size=size)
        else:
            out = np.zeros((size, *flat.shape), dtype=np.int64)
            for g in range(G):
                for lab in range(2):
                    n = int(flat[g, lab].sum())
                    if n:
                        out[:, g, lab] = rng.multinomial(n, flat[g, lab] / n, size=size)
        done += size
        yield out.reshape(size, *cells.shape)
