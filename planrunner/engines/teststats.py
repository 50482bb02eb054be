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

from planrunner.engines.lazy import stats
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
    return stats.rankdata(a, axis=-1)  # mid-ranks for ties


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






def _kendall(xy: np.ndarray) -> np.ndarray:
    """Kendall's tau-b: Σ sign(Δx) sign(Δy) / sqrt(Σ sign(Δx)² Σ sign(Δy)²) over pairs i < j."""
    x, y = _columns(xy)
    lead = x.shape[:-1]
    x2, y2 = x.reshape(-1, x.shape[-1]), y.reshape(-1, y.shape[-1])
    i, j = np.triu_indices(x.shape[-1], k=1)
    out = np.empty(x2.shape[0])
    step = max(1, KENDALL_CELLS // max(1, i.size))  # O(n²) pairs per row: bound the memory per chunk
    for start in range(0, x2.shape[0], step):
        sx = np.sign(x2[start:start + step, i] - x2[start:start + step, j])
        sy = np.sign(y2[start:start + step, i] - y2[start:start + step, j])
        with np.errstate(invalid="ignore", divide="ignore"):
            out[start:start + step] = (sx * sy).sum(axis=-1) / np.sqrt((sx * sx).sum(axis=-1) * (sy * sy).sum(axis=-1))
    return out.reshape(lead)


KENDALL_CELLS = 2_000_000




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
    return stats.rankdata(pooled)


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
