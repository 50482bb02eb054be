"""Test statistics for permutation and randomization tests, added to the statistics registry.

Every function is vectorised like the rest of the registry: observations on the LAST axis, any
leading batch axes. ``samples=0`` marks a statistic of two or more groups (one-way F, rank H).

Ties: rank statistics use mid-ranks (the average of the tied positions). ``rank_h`` is the
Kruskal–Wallis H WITHOUT the tie correction: under permutation of fixed pooled data the correction
is a constant factor, so the permutation p-value is the same either way (V-CONV-KW); the
estimate is therefore comparable with scipy.stats.kruskal only on data without ties.
``signed_rank`` is T+, the sum of the ranks of |d| over the positive differences d = first − second
of each pair; zero differences are dropped before ranking (Wilcoxon's convention).

``SUM_SCORES`` names the two-group statistics that, for fixed pooled data, are increasing functions
of the sum of the first group's scores (identity 15): the permutation engine may then count
arrangements through that sum (the fast path; dynamic programming when the scores are integers).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from planrunner.engines.ranks import rankdata
from planrunner.engines.statistics import Statistic, register

__all__ = ["K_GROUP", "PAIRED_ONLY", "SUM_SCORES", "rank_scores"]


def _var(x: np.ndarray) -> np.ndarray:
    return x.var(axis=-1, ddof=1)


def _t_pooled(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Student's two-sample t with the pooled variance (divisor n1 + n2 − 2)."""
    n1, n2 = x.shape[-1], y.shape[-1]
    pooled = ((n1 - 1) * _var(x) + (n2 - 1) * _var(y)) / (n1 + n2 - 2)
    return (x.mean(axis=-1) - y.mean(axis=-1)) / np.sqrt(pooled * (1.0 / n1 + 1.0 / n2))


def _t_welch(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Welch's t: the difference of means over sqrt(s1²/n1 + s2²/n2)."""
    return (x.mean(axis=-1) - y.mean(axis=-1)) / np.sqrt(_var(x) / x.shape[-1] + _var(y) / y.shape[-1])


def _ranks(a: np.ndarray) -> np.ndarray:
    return rankdata(a, axis=-1)  # mid-ranks for ties


def _rank_sum(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Wilcoxon rank sum W: the sum of the first group's mid-ranks in the pooled sample."""
    return _ranks(np.concatenate([x, y], axis=-1))[..., :x.shape[-1]].sum(axis=-1)






def _signed_rank(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Wilcoxon signed-rank T+ of the pair differences x − y (pairs aligned on the last axis)."""
    return signed_rank_of_differences(x - y)


def signed_rank_of_differences(d: np.ndarray) -> np.ndarray:
    """T+ of differences d (last axis): ranks of |d| among the nonzero d, summed over d > 0."""
    zeros = (d == 0).sum(axis=-1, keepdims=True)
    # zeros take the lowest mid-ranks; subtracting their count ranks the nonzero |d| among themselves
    ranks = _ranks(np.abs(d)) - zeros
    return np.where(d > 0, ranks, 0.0).sum(axis=-1)


def _group_sizes_and_stack(groups: tuple[np.ndarray, ...]) -> tuple[list[int], np.ndarray]:
    return [g.shape[-1] for g in groups], np.concatenate(groups, axis=-1)


def _one_way_f(*groups: np.ndarray) -> np.ndarray:
    """One-way analysis-of-variance F: between-group over within-group mean square."""
    sizes, pooled = _group_sizes_and_stack(groups)
    n, k = sum(sizes), len(groups)
    grand = pooled.mean(axis=-1)
    between = sum(s * (g.mean(axis=-1) - grand) ** 2 for s, g in zip(sizes, groups))
    within = sum(((g - g.mean(axis=-1, keepdims=True)) ** 2).sum(axis=-1) for g in groups)
    return (between / (k - 1)) / (within / (n - k))


def _rank_h(*groups: np.ndarray) -> np.ndarray:
    """Kruskal–Wallis H on mid-ranks, without the tie correction (see the module note)."""
    sizes, pooled = _group_sizes_and_stack(groups)
    n = sum(sizes)
    ranks = _ranks(pooled)
    total: Any = 0.0  # a float, then an array of the leading shape
    start = 0
    for s in sizes:
        total = total + ranks[..., start:start + s].sum(axis=-1) ** 2 / s
        start += s
    return 12.0 / (n * (n + 1)) * total - 3.0 * (n + 1)


def _columns(xy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return xy[..., 0, :], xy[..., 1, :]






def _tied_pairs(sorted_rows: np.ndarray) -> np.ndarray:
    """Σ t(t − 1)/2 over the runs of equal values of each row (rows sorted on the last axis)."""
    n = sorted_rows.shape[-1]
    position = np.arange(n)
    starts = np.empty(sorted_rows.shape, dtype=bool)
    starts[:, 0] = True
    np.not_equal(sorted_rows[:, 1:], sorted_rows[:, :-1], out=starts[:, 1:])
    run_start = np.maximum.accumulate(np.where(starts, position, 0), axis=-1)
    return (position - run_start).sum(axis=-1)  # each value counts the equal values before it


def _dense_ranks(rows: np.ndarray) -> np.ndarray:
    """0, 1, 2, … per row; equal values share a rank."""
    order = np.argsort(rows, axis=-1, kind="stable")
    ordered = np.take_along_axis(rows, order, axis=-1)
    new = np.empty(rows.shape, dtype=np.int64)
    new[:, 0] = 0
    np.not_equal(ordered[:, 1:], ordered[:, :-1], out=new[:, 1:])
    ranks = np.empty_like(new)
    np.put_along_axis(ranks, order, np.cumsum(new, axis=-1), axis=-1)
    return ranks


def _inversions(ranks: np.ndarray) -> np.ndarray:
    """#{i < j: r_i > r_j} per row, by a bottom-up merge sort counted for all rows at once.

    At width w the rows are sorted within blocks of w; each right block's values are looked up in
    its sorted left neighbour (one searchsorted over every row, the blocks kept apart by offsets),
    then pairs of blocks are merged. log2(n) levels of O(n log n): O(n log² n) per row.
    """
    rows, n = ranks.shape
    size = 1 << max(0, (n - 1).bit_length())
    span = size + 1  # every rank (pads: n) is below this, so offsets keep the blocks apart
    work = np.full((rows, size), n, dtype=np.int64)  # pads at the end, larger than every rank: no inversions
    work[:, :n] = ranks
    total = np.zeros(rows, dtype=np.int64)
    width = 1
    while width < size:
        pairs = work.reshape(rows, size // (2 * width), 2, width)
        offset = np.arange(rows * (size // (2 * width)), dtype=np.int64).reshape(rows, -1, 1) * span
        left = (pairs[:, :, 0, :] + offset).ravel()
        right = pairs[:, :, 1, :] + offset
        at_most = np.searchsorted(left, right.ravel(), side="right").reshape(right.shape)
        at_most -= (offset // span) * width  # the left blocks before this one
        total += (width - at_most).sum(axis=(1, 2))
        work = np.sort(work.reshape(rows, size // (2 * width), 2 * width), axis=-1).reshape(rows, size)
        width *= 2
    return total


def _kendall_rows(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Kendall's tau-b of each row pair (x, y) in O(n log² n), Knight's (1966) counting.

    Sorted by x then y, the discordant pairs are the exchanges a sort of y needs (inversions, ties in
    y not counted); with n₀ = n(n − 1)/2 and n₁, n₂, n₃ the pairs tied in x, in y and in both,
    concordant − discordant = n₀ − n₁ − n₂ + n₃ − 2·discordant, and tau-b divides it by
    sqrt((n₀ − n₁)(n₀ − n₂)). Every count is an exact integer, so the result equals the pairwise sum.
    """
    n = x.shape[-1]
    order = np.lexsort((y, x), axis=-1)
    xs, ys = np.take_along_axis(x, order, axis=-1), np.take_along_axis(y, order, axis=-1)
    # pairs tied in both: runs of equal (x, y) in the lexicographic order
    both = np.empty(xs.shape, dtype=bool)
    both[:, 0] = True
    both[:, 1:] = (xs[:, 1:] != xs[:, :-1]) | (ys[:, 1:] != ys[:, :-1])
    position = np.arange(n)
    n3 = (position - np.maximum.accumulate(np.where(both, position, 0), axis=-1)).sum(axis=-1)
    n1 = _tied_pairs(xs)
    n2 = _tied_pairs(np.sort(y, axis=-1))
    discordant = _inversions(_dense_ranks(ys))
    n0 = n * (n - 1) // 2
    score = (n0 - n1 - n2 + n3 - 2 * discordant).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        return score / np.sqrt((n0 - n1).astype(np.float64) * (n0 - n2).astype(np.float64))


def _kendall(xy: np.ndarray) -> np.ndarray:
    """Kendall's tau-b: Σ sign(Δx) sign(Δy) / sqrt(Σ sign(Δx)² Σ sign(Δy)²) over pairs i < j,
    counted in O(n log² n) per row (``_kendall_rows``) so that n in the thousands is practical."""
    x, y = _columns(xy)
    lead = x.shape[:-1]
    x2, y2 = x.reshape(-1, x.shape[-1]), y.reshape(-1, y.shape[-1])
    out = np.empty(x2.shape[0])
    step = max(1, KENDALL_CELLS // max(1, x.shape[-1]))  # bound the memory of the merge levels
    for start in range(0, x2.shape[0], step):
        out[start:start + step] = _kendall_rows(x2[start:start + step], y2[start:start + step])
    return out.reshape(lead)


def _kendall_pairs(xy: np.ndarray) -> np.ndarray:
    """The definition over all n(n − 1)/2 pairs (O(n²); kept to check ``_kendall`` against)."""
    x, y = _columns(xy)
    i, j = np.triu_indices(x.shape[-1], k=1)
    sx, sy = np.sign(x[..., i] - x[..., j]), np.sign(y[..., i] - y[..., j])
    with np.errstate(invalid="ignore", divide="ignore"):
        return (sx * sy).sum(axis=-1) / np.sqrt((sx * sx).sum(axis=-1) * (sy * sy).sum(axis=-1))


KENDALL_CELLS = 1_000_000




# spearman, slope, risk_difference and risk_ratio are registered in statistics.py
register(Statistic("t_pooled", "pooled-variance t", 2, True, "numeric", _t_pooled))
register(Statistic("t_welch", "Welch t", 2, True, "numeric", _t_welch))
register(Statistic("rank_sum", "Wilcoxon rank sum (mid-ranks)", 2, False, "numeric", _rank_sum))
register(Statistic("signed_rank", "Wilcoxon signed rank T+ of the pair differences", 2, False, "numeric",
                   _signed_rank))
register(Statistic("one_way_f", "one-way F", 0, True, "numeric", _one_way_f))
register(Statistic("rank_h", "Kruskal–Wallis H (mid-ranks, no tie correction)", 0, False, "numeric", _rank_h))
register(Statistic("kendall", "Kendall tau-b", 1, False, "numeric", _kendall, columns=2))

PAIRED_ONLY = frozenset({"signed_rank"})  # meaningful only on pairs (needs `pairs:`)
K_GROUP = frozenset({"one_way_f", "rank_h"})
# may be +inf for some arrangements (a second group without 1s); ordered as the largest value
INFINITE_ALLOWED = frozenset({"risk_ratio"})  # large values are evidence: tested one-sided ("greater")


def rank_scores(pooled: np.ndarray) -> np.ndarray:
    return rankdata(pooled)


def _identity(pooled: np.ndarray) -> np.ndarray:
    return np.asarray(pooled, dtype=np.float64)


# statistic → the scores whose first-group sum it increases with (for fixed pooled data)
SUM_SCORES: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "mean_difference": _identity,
    "risk_difference": _identity,
    "risk_ratio": _identity,
    "t_pooled": _identity,
    "rank_sum": rank_scores,
}
