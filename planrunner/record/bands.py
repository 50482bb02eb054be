"""Monte Carlo error of bootstrap interval endpoints, for the record.

A percentile-type endpoint is the order statistic of rank k = ⌈qB⌉ among B replicates. How many
replicates fall below the ideal (B = ∞) quantile is Binomial(B, q), so the rank that the ideal
quantile occupies varies by s = √(B q (1 − q)) ranks from run to run. The replicates at ranks
k ± ⌈z s⌉ therefore bracket the endpoint of an infinitely long run with about the coverage of z
(the distribution-free order-statistic interval for a quantile; David & Nagaraja, *Order
Statistics*, §7.1, from memory). The spread of the replicates over ranks k ± s estimates the Monte
Carlo s.d. of the endpoint, √(q(1−q)/B) / f(x_q) (V-TOL), without estimating the
density f.

The levels used are the interval's own `quantile_levels` (for BCa the adjusted levels, taken as
fixed: the Monte Carlo wobble of z0 is not included). An endpoint that is not the replicate read at
its level (nor its reflection 2θ̂ − q, as in a basic interval) gets no band.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from planrunner.engines.bootstrap import quantile_rank

BAND_Z = 1.959963984540054  # Φ⁻¹(0.975): the band brackets the B = ∞ endpoint about 95% of the time
RULE = ("band: ranks ceil(qB) ± ceil(z·s) of the sorted replicates, s = sqrt(B q (1-q)), z = 1.96 "
        "(order-statistic band for a quantile); sd = (x_(k+r) - x_(k-r))·s / (2r), r = max(1, round(s)); "
        "q = the interval's quantile levels")


def quantile_band(ordered: np.ndarray, level: float, z: float = BAND_Z) -> tuple[float, float, float]:
    """(low, high, sd) of the inverse-CDF quantile at `level` of the sorted replicates `ordered`.

    The band is ranks k ± ⌈z s⌉; the s.d. is read from the narrower ranks k ± r, r = max(1, round(s)),
    as (x_(k+r) − x_(k−r)) · s / (rank distance): a narrower difference quotient of the quantile
    function is less biased where the density changes fast (far tails).
    """
    b = ordered.shape[0]
    k = quantile_rank(level, b)
    s = math.sqrt(b * level * (1.0 - level))

    def at(rank: int) -> tuple[int, float]:
        rank = min(max(rank, 1), b)
        return rank, float(ordered[rank - 1])

    step = math.ceil(z * s)
    (_, low), (_, high) = at(k - step), at(k + step)
    r = max(1, round(s))
    (r_lo, x_lo), (r_hi, x_hi) = at(k - r), at(k + r)
    sd = (x_hi - x_lo) * s / (r_hi - r_lo) if r_hi > r_lo else 0.0
    return low, high, sd


def interval_bands(distribution: np.ndarray, estimate: float,
                   intervals: Sequence[Any]) -> list[dict[str, Any]]:
    """One entry per interval (same order as the record's `intervals`): bands and s.d. of both ends."""
    values = np.asarray(distribution, dtype=float)
    ordered = np.sort(values[np.isfinite(values)])
    out: list[dict[str, Any]] = []
    for interval in intervals:
        entry: dict[str, Any] = {"method": interval.method, "lower_band": None, "upper_band": None,
                                 "lower_sd": None, "upper_sd": None}
        levels = getattr(interval, "quantile_levels", None)
        if levels is not None and ordered.size == values.size and ordered.size > 1:
            for end, level in zip(("lower", "upper"), levels):
                endpoint = getattr(interval, end)
                if endpoint is None:
                    continue
                band = _band_of(ordered, float(endpoint), float(estimate), level, levels)
                if band is not None:
                    entry[f"{end}_band"], entry[f"{end}_sd"] = band
        out.append(entry)
    return out


def _band_of(ordered: np.ndarray, endpoint: float, estimate: float, level: float,
             levels: Sequence[float]) -> tuple[list[float], float] | None:
    """The band of an endpoint read at `level`, or of a reflected one 2θ̂ − q read at either level."""
    def read(q: float) -> float:
        return float(ordered[quantile_rank(q, ordered.shape[0]) - 1])

    if endpoint == read(level):
        low, high, sd = quantile_band(ordered, level)
        return [low, high], sd
    for q in levels:
        if math.isclose(endpoint, 2.0 * estimate - read(q), rel_tol=1e-12, abs_tol=1e-12):
            low, high, sd = quantile_band(ordered, q)
            return [2.0 * estimate - high, 2.0 * estimate - low], sd
    return None
