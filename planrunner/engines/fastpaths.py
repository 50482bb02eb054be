"""Fast kernels behind the bootstrap and permutation engines (DESIGN §7).

Every kernel here computes, from the SAME uniform rows as the plain computation (the draw contract
of :mod:`planrunner.engines.bootstrap` and :mod:`planrunner.engines.permutation` is untouched),
either exactly the same bits or the same number up to floating-point rounding of a sum:

* :func:`bootstrap_replicates` draws resample rows in cache-sized batches with in-place arithmetic
  and reused buffers (the plain loop allocates several batch-sized temporaries). Means and any
  other statistic are computed by the statistic itself on the same gathered values: identical bits.
* medians (``form == "median"``): the middle order statistics of each resample are found among
  the few drawn values that fall in a window of the once-sorted data around the sample median
  (only a one-byte code saying below / inside / above is gathered for every draw), instead of a
  full selection per row. The chosen values are data values, combined exactly as ``np.median``
  combines them: identical bits. Rows whose middle leaves the window use ``np.median``.
* difference of means under label permutation (``form == "mean"``, two groups): group 1 of an
  arrangement is, in every stratum, the n1_h positions with the smallest keys; they are found by
  a threshold (the n1_h-th smallest key) instead of an argsort, and only the sum of group 1 is
  formed (group 2's sum is the total minus it). Agrees with the plain computation to rounding
  (a different order of summation, relative error about 1e-15 of the data scale). Rows with a tie
  at the threshold fall back to the plain stable argsort.

None of these functions draws a random number itself; callers pass the rows they read from their
:class:`~planrunner.engines.streams.UniformRows`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = ["CACHE_ELEMENTS", "batch_rows", "kth_smallest", "median_of_draws", "median_window",
           "threshold_window", "window_codes"]

# Draws per batch on the fast paths: about 1 MB of doubles, so that the batch's uniforms, indices and
# gathered values stay in a core's L2 cache; larger batches are slower, never different.
CACHE_ELEMENTS = 1 << 17
# window half-width in standard deviations of the order statistic's rank; beyond it a row falls back
WINDOW_SDS = 4.5
MEDIAN_FAST_MINIMUM = 256  # below this a full selection per row is as fast


def batch_rows(width: int, batch_elements: int) -> int:
    """Rows per batch: at most ``batch_elements`` (and the cache size) draws, at least one row."""
    return max(1, min(batch_elements, CACHE_ELEMENTS) // max(1, width))


def kth_smallest(values: np.ndarray, ks: Sequence[int], lo: float, hi: float) -> np.ndarray:
    """The ``ks``-th smallest (0-based) value of every row of ``values``, shape (rows, len(ks)).

    Exact for any ``lo <= hi``: a row whose order statistics all lie in [lo, hi] is answered from
    the few values inside the window (sorted), any other row by ``np.partition``. The window only
    decides the speed.
    """
    rows, width = values.shape
    ks_arr = np.asarray(ks, dtype=np.int64)
    out = np.empty((rows, ks_arr.size), dtype=np.float64)
    if rows == 0:
        return out
    inside = values >= lo
    below = width - np.count_nonzero(inside, axis=1)
    inside &= values <= hi
    flat = np.flatnonzero(inside)
    picked = values.ravel()[flat]  # row by row, since the flat index is row-major
    counts = np.bincount(flat // width, minlength=rows)
    ends = np.cumsum(counts)
    local = ks_arr[None, :] - below[:, None]
    ok = (local >= 0).all(axis=1) & (local < counts[:, None]).all(axis=1)
    for r in np.flatnonzero(ok).tolist():
        # a few hundred values per row: a partition of them is cheaper than any batched sort
        kk = local[r]
        out[r] = np.partition(picked[ends[r] - counts[r]:ends[r]], kk)[kk]
    bad = ~ok
    if bad.any():
        out[bad] = np.partition(values[bad], ks_arr, axis=1)[:, ks_arr]
    return out


def median_window(ordered: np.ndarray) -> tuple[float, float]:
    """Values bounding the likely ranks of a resample's median: ± WINDOW_SDS·√n/2 ranks (binomial sd)."""
    n = ordered.shape[0]
    half = int(math.ceil(WINDOW_SDS * math.sqrt(n) / 2.0)) + 8
    return float(ordered[max(0, (n - 1) // 2 - half)]), float(ordered[min(n - 1, n // 2 + half)])


def window_codes(values: np.ndarray, window: tuple[float, float]) -> np.ndarray:
    """Per observation: 0 below the window, 1 inside it (ends included), 2 above it (int8)."""
    lo, hi = window
    return (values >= lo).astype(np.int8) + (values > hi).astype(np.int8)


def median_of_draws(values: np.ndarray, index: np.ndarray, codes: np.ndarray) -> np.ndarray:
    """``np.median(values[index], axis=-1)`` bit for bit, for a (rows, n) array of drawn indices.

    Only one-byte window codes are gathered for every draw (``codes = window_codes(values, ...)``);
    the values themselves only for the few draws inside the window, among which each row's middle
    order statistics are selected. np.median takes the mean of the middle one or two values of the
    partitioned row; the same ``np.mean`` of the same values gives the same bits. Rows whose middle
    leaves the window are computed by np.median itself.
    """
    rows, n = index.shape
    if n < MEDIAN_FAST_MINIMUM or rows == 0:
        return np.median(values[index], axis=-1)
    ks = np.array([n // 2] if n % 2 else [n // 2 - 1, n // 2], dtype=np.int64)
    drawn = codes[index]
    below = np.count_nonzero(drawn == 0, axis=1)
    flat = np.flatnonzero(drawn == 1)
    row = flat // n
    # row by row, since the flat index is row-major (one group: the index rows are contiguous)
    picked = values[index.ravel()[flat] if index.flags.c_contiguous else index[row, flat - row * n]]
    counts = np.bincount(row, minlength=rows)
    ends = np.cumsum(counts)
    local = ks[None, :] - below[:, None]
    ok = (local >= 0).all(axis=1) & (local < counts[:, None]).all(axis=1)
    middle = np.empty((rows, ks.size), dtype=np.float64)
    for r in np.flatnonzero(ok).tolist():
        # a few hundred values per row: a partition of them is cheaper than any batched sort
        kk = local[r]
        middle[r] = np.partition(picked[ends[r] - counts[r]:ends[r]], kk)[kk]
    out = np.empty(rows, dtype=np.float64)
    out[ok] = np.mean(middle[ok], axis=-1)
    bad = ~ok
    if bad.any():
        out[bad] = np.median(values[index[bad]], axis=-1)
    return out


def threshold_window(size: int, first: int, offset: float) -> tuple[float, float]:
    """Window of keys (U[0,1) + offset) likely to hold the ``first``-th smallest of ``size`` keys."""
    q = first / size
    spread = WINDOW_SDS * math.sqrt(q * (1.0 - q) / size) + 8.0 / size
    return offset + max(0.0, q - spread), offset + min(1.0, q + spread)
