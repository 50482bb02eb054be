"""Exact permutation null distributions by dynamic programming over integer-valued scores.

For fixed pooled data, several two-group statistics are increasing functions of S1, the sum of the
first group's scores (identity 15; see ``teststats.SUM_SCORES``). Under label exchangeability
every choice of the n1 group-1 positions among N is equally likely, so the null of S1 is the
number of n1-subsets with each sum. When the scores are integers (or halves, e.g. mid-ranks,
doubled first) that count is a small dynamic programme over (items chosen, sum):

    count_i(k, s) = count_{i−1}(k, s) + count_{i−1}(k − 1, s − a_i)      (a_i the i-th score)

processed over the N scores with the band of (k, s) that can still be reached. Within strata the
per-stratum distributions of S1_h are convolved (S1 = Σ_h S1_h, arrangements = ∏ C(N_h, n1_h)).
Counts are held as float64 times a power of two (:data:`RESCALE`): whenever the table's largest
count passes 2**900 the whole table is multiplied by 2**-900, exactly, and the exponent kept, so
C(N, N/2) beyond 1e308 (N ≈ 1030 and up) never overflows. Only positive numbers are summed, so the
relative error of every ratio (a p-value) stays near N·1e-16; counts below 2**-1074 of the largest
underflow to 0 (a p-value below about 1e-300 of its own arrangements' weight, see ``permutation``).

Sizes reached on the development machine (one core, numpy 2.4, measured, not asserted in tests):
ranks without ties, n1 = n2 = 100 in 0.1–0.3 s and n1 = n2 = 200 in 2–7 s (a shared machine); binary
outcomes (the hypergeometric, Fisher's exact test) with n1 = n2 = 200 in about 0.01 s. :data:`WORK_LIMIT` bounds the
cells visited; beyond it the engine falls back to Monte Carlo (or, with ``exact: always``, says so).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["WORK_LIMIT", "integer_scores", "dp_work", "subset_sum_distribution", "sum_distribution"]

WORK_LIMIT = 6_000_000_000  # DP cells visited; about 10 s on one core
RESCALE = 900  # counts above 2**RESCALE are multiplied by 2**-RESCALE (exact in binary floating point)


def integer_scores(values: np.ndarray) -> tuple[np.ndarray, float] | None:
    """``(integers, scale)`` with ``values == integers / scale`` (scale 1 or 2), or None."""
    for scale in (1.0, 2.0):
        scaled = values * scale
        rounded = np.round(scaled)
        # exactly whole: a relative tolerance would round 1e7 + 0.0031 to 1e7 and the DP would count
        # the wrong sums (mid-ranks and 0/1 scores are exact halves and integers in binary)
        if np.all(scaled == rounded) and np.all(np.abs(rounded) < 2**40):
            return rounded.astype(np.int64), scale
    return None


def dp_work(scores: np.ndarray, chosen: int) -> int:
    """Cells the programme visits for one stratum (an upper bound used to decide feasibility)."""
    a = np.sort(scores - scores.min())
    k = min(chosen, a.size - chosen)
    width = int(a[::-1][:k].sum()) + 1
    return a.size * (k + 1) * width


def _rescaled(table: np.ndarray, exponent: int) -> int:
    """Multiply ``table`` by 2**-RESCALE in place while its largest value passes 2**RESCALE."""
    while table.size and float(table.max()) > 2.0 ** RESCALE:
        table *= 2.0 ** -RESCALE
        exponent += RESCALE
    return exponent


def subset_sum_distribution(scores: np.ndarray, chosen: int) -> tuple[int, np.ndarray, int]:
    """Number of ``chosen``-subsets of ``scores`` (integers) with each sum.

    Returns ``(offset, counts, exponent)``: ``counts[j] · 2**exponent`` subsets have sum ``offset + j``.
    """
    scores = np.asarray(scores, dtype=np.int64)
    total_n = scores.size
    if chosen == 0 or chosen == total_n:
        return int(scores.sum()) if chosen else 0, np.ones(1), 0
    if chosen > total_n - chosen:  # count the complement: sum = total − complement's sum
        offset, counts, exponent = subset_sum_distribution(scores, total_n - chosen)
        total = int(scores.sum())
        return total - (offset + counts.size - 1), counts[::-1].copy(), exponent
    low = int(scores.min())
    a = np.sort(scores - low)
    width = int(a[::-1][:chosen].sum()) + 1
    table = np.zeros((chosen + 1, width))
    table[0, 0] = 1.0
    reach = 0  # largest sum reachable so far
    exponent = 0
    for i, score in enumerate(a, start=1):
        if i % 64 == 0:  # counts at most double per score: 64 steps cannot overflow from 2**900
            exponent = _rescaled(table, exponent)
        score = int(score)
        k_hi = min(i, chosen)
        k_lo = max(1, chosen - (total_n - i))  # rows that can still end at `chosen`
        reach = min(width - 1, reach + score)
        if k_lo > k_hi:
            continue
        top = reach + 1
        # simultaneous update of rows k_lo..k_hi from rows k_lo−1..k_hi−1 (numpy buffers overlaps)
        table[k_lo:k_hi + 1, score:top] += table[k_lo - 1:k_hi, 0:top - score]
    counts = table[chosen].copy()
    return chosen * low, counts, _rescaled(counts, exponent)


def sum_distribution(strata: Sequence[tuple[np.ndarray, int]]) -> tuple[int, np.ndarray, int]:
    """Null of S1 = Σ_h (sum of the n1_h group-1 scores of stratum h): ``(offset, counts, exponent)``,
    ``counts[j] · 2**exponent`` arrangements with S1 = offset + j."""
    offset, counts, exponent = 0, np.ones(1), 0
    for scores, chosen in strata:
        o, c, e = subset_sum_distribution(scores, chosen)
        offset += o
        exponent += e
        if float(counts.max()) * float(c.max()) * min(counts.size, c.size) > 2.0 ** 1000:
            counts = counts * 2.0 ** -RESCALE  # each factor is below 2**901: keep the products finite
            exponent += RESCALE
        counts = np.convolve(counts, c)
        exponent = _rescaled(counts, exponent)
    return offset, counts, exponent
