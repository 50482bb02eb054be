"""Westfall–Young max-T step-down adjustment on the same permutations across endpoints.

Several endpoints of one dataset and one design (same groups, same strata) are tested on the SAME
arrangements of the labels, so the adjusted p-values keep the dependence between the endpoints
(Westfall & Young 1993, Algorithm 2.8; strong control of the family-wise error under subset
pivotality).

Each endpoint's statistic is standardised by its permutation null, z = (T − c)/sd (c the centre of
the null: 0, or the null mean for rank sums; sd the null's standard deviation over the
arrangements), and oriented by its alternative: z for "greater", −z for "less", |z| for
"two-sided". With the endpoints ordered by observed z, largest first (z_(1) ≥ … ≥ z_(k)), and
q_b(j) = max over endpoints (j) … (k) of z at arrangement b, the step-down p-values are

    p̃_(j) = (#{b : q_b(j) ≥ z_(j) − tol} + a) / (B + a),   then made non-decreasing in j,

with a = 0 for full enumeration (the observed arrangement is among the B) and a = 1 for Monte Carlo.
The unadjusted p-values on the same permutations use each endpoint's own z alone.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.engines.permcore import ENUMERATION, PermutationOptions, choose_computation, tie_tolerance
from planrunner.engines.permutation import (
    _enumerate,
    _evaluate,
    _multinomial,
    _pool,
    _Pooled,
    _random,
    null_centre,
)
from planrunner.engines.statistics import Statistic, check_samples, check_strata, to_compute_layout
from planrunner.engines.streams import Stream
from planrunner.errors import EngineError

__all__ = ["MaxTResult", "computation", "max_t"]

CACHE_ELEMENTS = 5_000_000


@dataclass(frozen=True)
class MaxTResult:
    adjusted: tuple[float, ...]
    unadjusted: tuple[float, ...]  # each endpoint alone on the same permutations (|z| rule when two-sided)
    smallest_adjusted: tuple[float, ...]
    exact: bool
    arrangements: int
    resamples: int
    counts: tuple[int, ...]  # the count behind each adjusted p-value, before the monotone step

    def describe(self) -> dict:
        return {"scheme": "labels shuffled (within strata), the same arrangements for every endpoint",
                "standardisation": "z = (T - centre) / sd of the permutation null; |z| when two-sided",
                "exact": self.exact, "arrangements": self.arrangements, "resamples": self.resamples,
                "counts": list(self.counts), "unadjusted_same_permutations": list(self.unadjusted),
                "rule": "exact: count / arrangements; Monte Carlo: (count + 1) / (resamples + 1)"}


def _arrangements(layout: _Pooled) -> int:
    return math.prod(_multinomial(sizes) for _, _, sizes in layout.blocks)


def _choose(arrangements: int, resamples: int, exact: str) -> str:
    """Enumeration or Monte Carlo by the one rule of ``choose_computation`` (no exact shortcut: the
    joint null of several endpoints has no dynamic programme), so ``exact: always`` beyond the
    enumeration limit is refused, never quietly drawn at random."""
    options = PermutationOptions(resamples=resamples, alternative="two-sided", exact=exact)
    return choose_computation(
        arrangements, options, shortcut=False,
        why="the joint max-T null of several endpoints has no exact shortcut (it is enumerated or drawn)",
        fix="give the family's members exact: auto or exact: never (the family then draws its resamples "
            "at random), or adjust the family with holm instead of max-t")


Endpoint = tuple[Sequence[np.ndarray], Statistic, str]


def _pooled(endpoints: Sequence[Endpoint], strata: Sequence[np.ndarray] | None) -> list[_Pooled]:
    """Each endpoint's pooled layout; refused unless they share the rows, groups and strata."""
    if len(endpoints) < 2:
        raise EngineError("max-t needs at least two endpoints")
    pooled_all = []
    for samples, statistic, _ in endpoints:
        data = check_samples(samples, statistic, method="max-t")
        pooled_all.append(_pool(data, check_strata(strata, data)))
    if any(other.blocks != pooled_all[0].blocks for other in pooled_all[1:]):
        raise EngineError("max-t endpoints must share the rows, groups and strata")
    return pooled_all


def computation(endpoints: Sequence[Endpoint], *, strata: Sequence[np.ndarray] | None, resamples: int,
                exact: str = "auto") -> str:
    """The computation :func:`max_t` will use (enumeration or Monte Carlo), or its refusal, raised,
    without drawing anything: ``check`` calls it so that it finds what a run would refuse."""
    return _choose(_arrangements(_pooled(endpoints, strata)[0]), resamples, exact)


def max_t(endpoints: Sequence[Endpoint], *, strata: Sequence[np.ndarray] | None,
          resamples: int, stream: Stream, exact: str = "auto", batch_elements: int = 2_000_000) -> MaxTResult:
    """Step-down max-T adjusted p-values of endpoints ``(samples, statistic, alternative)``."""
    pooled_all = _pooled(endpoints, strata)
    observed, centres = [], []
    for pooled, (samples, statistic, _) in zip(pooled_all, endpoints):
        data = check_samples(samples, statistic, method="max-t")
        observed.append(float(statistic.compute(*[to_compute_layout(a) for a in data])))
        centres.append(null_centre(pooled, statistic))
    layout = pooled_all[0]
    arrangements = _arrangements(layout)
    is_exact = _choose(arrangements, resamples, exact) == ENUMERATION
    rows = max(1, batch_elements // layout.values.shape[0])
    total = arrangements if is_exact else resamples
    small = total * layout.values.shape[0] <= CACHE_ELEMENTS  # keep the arrangements only when small

    def fresh():
        return _enumerate(layout, rows) if is_exact else _random(layout, stream, resamples, rows)
    cached = list(fresh()) if small else None
    z_null, z_obs = [], []
    for pooled, (_, statistic, alternative), t, c in zip(pooled_all, endpoints, observed, centres):
        # the same arrangements for every endpoint: cached, or drawn again from the same stream blocks
        null = _evaluate(pooled, statistic, iter(cached) if cached is not None else fresh(), total)
        sd = float(np.sqrt(np.mean((null - c) ** 2)))
        if not np.all(np.isfinite(null)) or sd == 0.0:
            raise EngineError(f"the permutation null of {statistic.name!r} is degenerate; max-t cannot use it")
        sign = -1.0 if alternative == "less" else 1.0
        zn, zo = sign * (null - c) / sd, sign * (t - c) / sd
        if alternative == "two-sided":
            zn, zo = np.abs(zn), abs(zo)
        z_null.append(zn)
        z_obs.append(zo)
    z_null_m = np.array(z_null)  # (endpoints, B)
    z_obs_v = np.array(z_obs)
    tol = tie_tolerance(float(np.max(np.abs(z_obs_v))), 1.0)  # z is already on the unit scale
    a = 0 if is_exact else 1
    k = z_obs_v.size
    order = np.argsort(-z_obs_v, kind="stable")
    # successive maxima from the least significant endpoint upward
    running = np.maximum.accumulate(z_null_m[order[::-1]], axis=0)[::-1]
    counts = [int(np.count_nonzero(running[j] >= z_obs_v[order[j]] - tol)) for j in range(k)]
    step = np.maximum.accumulate([(c + a) / (total + a) for c in counts])
    adjusted = np.empty(k)
    adjusted[order] = np.minimum(1.0, step)
    unadjusted = [(int(np.count_nonzero(z_null_m[i] >= z_obs_v[i] - tol)) + a) / (total + a) for i in range(k)]
    # the smallest adjusted p any data could give: every endpoint at the top of its own null
    smallest = []
    for i in range(k):
        top = z_null_m.max(axis=0)
        floor = 1.0 / arrangements if arrangements < 10 ** 300 else 0.0
        smallest.append(max(floor, (int(np.count_nonzero(top >= z_null_m[i].max() - tol)) + a) / (total + a)))
    counts_in_order = np.empty(k, dtype=np.int64)
    counts_in_order[order] = counts
    return MaxTResult(adjusted=tuple(float(v) for v in adjusted), unadjusted=tuple(float(v) for v in unadjusted),
                      smallest_adjusted=tuple(smallest), exact=is_exact, arrangements=arrangements,
                      resamples=total, counts=tuple(int(c) for c in counts_in_order))
