"""Confidence interval for a two-group location shift by inverting the permutation test.

Model: the first group is the second shifted by δ, so under H0(δ) the values x − δ and y are
exchangeable. The interval at level 1 − α is every δ that the two-sided test (rule ``doubled``)
does not reject: ``p_greater(δ) > α/2`` and ``p_less(δ) > α/2`` (Lehmann 1975 §2.6; for the
rank sum this is the exact interval of the Hodges–Lehmann estimate, with endpoints at pairwise
differences x_i − y_j).

Every δ is tested on the SAME arrangements (all of them when enumerable, else one fixed set of
Monte Carlo arrangements from the stream), so p_greater(δ) never decreases and p_less(δ) never
increases as δ grows (for a location statistic) and each endpoint is found by bisection: first a
bracket doubling out from the estimate, then 60 halvings. The shift estimate is the δ at which the
statistic of (x − δ, y) reaches the centre of its null (0; the null mean for the rank sum): the
difference of means, of medians, or the Hodges–Lehmann median of pairwise differences.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator

import numpy as np

from planrunner.engines.permcore import ENUMERATION, PermutationOptions, choose_computation, tie_tolerance
from planrunner.engines.permutation import _enumerate, _evaluate, _pool, _random, null_centre
from planrunner.engines.results import Interval, ShiftedTest
from planrunner.engines.statistics import Statistic, check_samples
from planrunner.engines.streams import Stream
from planrunner.errors import EngineError

__all__ = ["ShiftedNulls", "computation", "shift_interval", "shifted_tests"]

HALVINGS = 60
CACHE_ELEMENTS = 5_000_000


def _bisect(test: Callable[[float], bool], inside: float, outside: float) -> float:
    """The boundary between ``inside`` (test true) and ``outside`` (test false)."""
    for _ in range(HALVINGS):
        middle = 0.5 * (inside + outside)
        if middle in (inside, outside):
            break
        if test(middle):
            inside = middle
        else:
            outside = middle
    return 0.5 * (inside + outside)


def _choose(arrangements: int, options: PermutationOptions) -> str:
    """Enumeration or Monte Carlo by the one rule of ``choose_computation``. The interval tests many
    shifted data sets on one set of arrangements and has no exact shortcut (the test alone may have
    one), so ``exact: always`` beyond the enumeration limit is refused, never quietly drawn at random."""
    return choose_computation(
        arrangements, options, shortcut=False,
        why="the shift interval has no exact shortcut (it re-tests every candidate shift on listed or drawn "
            "arrangements)",
        fix="use exact: auto (the test stays exact where a shortcut applies; the interval then draws "
            "resamples at random) or exact: never, or drop intervals: [shift]")


def computation(x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions) -> str:
    """The computation :func:`shift_interval` will use, or its refusal, raised, without drawing
    anything: ``check`` calls it so that it finds what a run would refuse."""
    x, y = check_samples([x, y], statistic, method="the shift interval")
    return _choose(math.comb(x.size + y.size, x.size), options)


class ShiftedNulls:
    """The permutation test of x − δ against y for any δ, every δ on the SAME arrangements: all of
    them when they are few enough for ``options.exact``, else ``options.resamples`` random ones
    from ``stream`` (kept in memory when small, else drawn again from the same blocks)."""

    def __init__(self, x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                 stream: Stream, method: str = "the shift interval") -> None:
        x, y = check_samples([x, y], statistic, method=method)
        self.x, self.y, self.statistic = x, y, statistic
        self.pooled = pooled = _pool((x, y), None)
        n1, n2 = x.size, y.size
        arrangements = math.comb(n1 + n2, n1)
        self.exact = enumerate_all = _choose(arrangements, options) == ENUMERATION
        rows = max(1, 2_000_000 // (n1 + n2))
        self.total = arrangements if enumerate_all else options.resamples

        def fresh() -> Iterator[tuple[np.ndarray, ...]]:
            return _enumerate(pooled, rows) if enumerate_all else _random(pooled, stream, options.resamples, rows)

        self._fresh = fresh
        self._cached = list(fresh()) if self.total * (n1 + n2) <= CACHE_ELEMENTS else None
        self.adjust = 0 if enumerate_all else 1
        self._is_x = np.zeros(n1 + n2)
        self._is_x[pooled.slots[0]] = 1.0  # without strata the first n1 pooled positions hold x

    def counts(self, delta: float) -> tuple[int, int, int]:
        """(arrangements with T* ≥ t, with T* ≤ t, arrangements tested) for the data x − δ, y."""
        pooled = self.pooled
        shifted = pooled.values - delta * self._is_x
        moved = type(pooled)(shifted, pooled.stratum, pooled.slots, pooled.blocks)
        arrangements = iter(self._cached) if self._cached is not None else self._fresh()
        null = _evaluate(moved, self.statistic, arrangements, self.total, fast=False)
        t = float(self.statistic.compute(self.x - delta, self.y))
        tol = tie_tolerance(t, float(np.max(np.abs(shifted))))
        return int(np.count_nonzero(null >= t - tol)), int(np.count_nonzero(null <= t + tol)), int(null.size)

    def pvalues(self, delta: float) -> tuple[float, float]:
        """(p_greater, p_less) of the test at δ: count/m exact, (count + 1)/(m + 1) Monte Carlo."""
        greater, less, m = self.counts(delta)
        return (greater + self.adjust) / (m + self.adjust), (less + self.adjust) / (m + self.adjust)


def shifted_tests(x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                  stream: Stream, shifts: tuple[float, ...]) -> tuple[ShiftedTest, ...]:
    """The test of H0: the first group is the second shifted by δ₀, for each δ₀ in ``shifts`` (on the
    arrangements of the shift interval: the same stream gives the same ones), with its counts."""
    nulls = ShiftedNulls(x, y, statistic, options, stream=stream, method="a decision's shifted-null test")
    out = []
    for shift in shifts:
        greater, less, m = nulls.counts(shift)
        a = nulls.adjust
        out.append(ShiftedTest(shift=float(shift), count_greater=greater, count_less=less, total=m,
                               exact=nulls.exact, p_greater=(greater + a) / (m + a), p_less=(less + a) / (m + a)))
    return tuple(out)


def shift_interval(x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                   stream: Stream) -> tuple[Interval, float]:
    """(interval, shift estimate) for x = y + δ by inverting the permutation test of ``statistic``
    (at ``options.confidence``; all arrangements when they are few enough for ``options.exact``,
    else ``options.resamples`` random ones)."""
    if options.confidence is None:
        raise EngineError("the shift interval needs a confidence level", hint="give confidence, e.g. 0.95")
    confidence = options.confidence
    nulls = ShiftedNulls(x, y, statistic, options, stream=stream)
    x, y, pooled = nulls.x, nulls.y, nulls.pooled
    spread = float(np.ptp(np.concatenate([x, y]))) or 1.0
    centre = null_centre(pooled, statistic)
    pvalues = nulls.pvalues

    estimate = _shift_estimate(x, y, statistic, centre, spread)
    alpha = 1.0 - confidence
    tail = alpha / 2.0

    def in_lower(d: float) -> bool:
        return pvalues(d)[0] > tail

    def in_upper(d: float) -> bool:
        return pvalues(d)[1] > tail

    if not (in_lower(estimate) and in_upper(estimate)):
        raise EngineError("the shift estimate itself is rejected; the test cannot be inverted on these data")
    note = f"location shift δ of the first group over the second (estimate {estimate:.6g}), by test inversion"
    bounds = [_bound(in_lower, estimate, -spread), _bound(in_upper, estimate, spread)]
    for bound in bounds:
        if bound is None:
            note += ("; too few arrangements to reject any shift on this side at this confidence, "
                     "so the interval is unbounded there")
    interval = Interval(method="shift", level=confidence, lower=bounds[0], upper=bounds[1], note=note)
    return interval, estimate


def _shift_estimate(x: np.ndarray, y: np.ndarray, statistic: Statistic, centre: float, spread: float) -> float:
    """The δ at which statistic(x − δ, y) reaches ``centre`` (it falls as δ grows): the
    Hodges–Lehmann median of pairwise differences for the rank sum, else by bisection."""
    if statistic.name == "rank_sum":
        return float(np.median(np.subtract.outer(x, y)))

    def observed(delta: float) -> float:
        return float(statistic.compute(x - delta, y))

    base = float(np.median(x) - np.median(y))
    lo, hi = base - spread, base + spread
    while observed(lo) < centre:
        lo -= spread
    while observed(hi) > centre:
        hi += spread
    return _bisect(lambda d: observed(d) >= centre, lo, hi)


def _bound(test: Callable[[float], bool], estimate: float, step: float) -> float | None:
    """The end of the interval on the side of ``step``'s sign: the bracket doubles out from the
    estimate (at most 40 times), then bisection; None when no shift on that side is rejected."""
    outside = estimate + step
    tries = 0
    while test(outside) and tries < 40:
        step *= 2.0
        outside = estimate + step
        tries += 1
    if test(outside):
        return None
    return _bisect(test, estimate, outside)
