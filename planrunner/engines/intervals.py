"""Bootstrap confidence intervals and the Monte Carlo error of their endpoints.

Every method reads a :class:`Summary` of the replicates (sorted, optionally weighted when the
resamples were enumerated exhaustively) and returns an :class:`Interval`. Conventions:

* quantile of the replicates at level p: the smallest replicate whose (weighted) empirical CDF
  reaches p (inverse CDF; level·B within 1e-9 of an integer is snapped, see ``quantile_rank``).
* percentile (E&T ch. 13): (q(α/2), q(1 − α/2)).
* basic (D&H eq. 5.6): (2θ̂ − q(1 − α/2), 2θ̂ − q(α/2)), the reflection of the percentile interval.
* normal, bias-corrected (D&H eq. 5.5): (θ̂ − bias) ∓ z_{1−α/2}·se.
* BCa (E&T ch. 14): q at the adjusted levels Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α))).
* studentized (bootstrap-t, E&T ch. 12): t* = (θ* − θ̂)/se*, interval
  (θ̂ − ŝe·t(1 − α/2), θ̂ − ŝe·t(α/2)), with se* and ŝe from the same standard-error method.

Monte Carlo error of an endpoint: ONE rule (:data:`MC_RULE`, stated in every record), giving each
end a band (about 95%) and a Monte Carlo s.d. An end read at level q from B replicates is the
order statistic of rank k = ⌈qB⌉ (``quantile_rank``); how many replicates fall below the B = ∞
quantile is Binomial(B, q), so its rank varies by s = √(Bq(1 − q)) and the replicates at ranks
k ± ⌈z·s⌉ (z = 1.96) bracket the B = ∞ end about 95% of the time (the distribution-free
order-statistic interval for a quantile; David & Nagaraja, *Order Statistics*, §7.1, from memory).
The s.d. √(q(1 − q)/B)/f(x_q) is read from the replicates at ranks k ± r, r = max(1, round(s)), as
(x_(k+r) − x_(k−r))·s/(2r), without estimating the density f. A basic end is the reflection
2θ̂ − x of the quantile it reflects; a studentized end θ̂ − ŝe·t maps the band and s.d. of the t
quantile (ŝe taken as fixed); BCa ends use the adjusted levels (taken as fixed). The normal
interval's ends move with the bias and the SE: s.d. √(sd_bias² + z_c²·sd_se²), band ± z of it.
Exhaustive enumeration has no Monte Carlo error.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from planrunner.engines.lazy import ndtr, ndtri
from planrunner.engines.results import Interval

__all__ = ["INTERVAL_METHODS", "MC_RULE", "Summary", "bca_levels", "quantile_band", "quantile_rank", "read_quantile"]

MC_Z = 1.959963984540054  # 97.5% normal point: the Monte Carlo bands are about 95%
MC_RULE = ("band: ranks ceil(qB) ± ceil(z·s) of the sorted replicates, s = sqrt(B q (1-q)), z = 1.96 "
           "(order-statistic band for a quantile); sd = (x_(k+r) - x_(k-r))·s / (2r), r = max(1, round(s)); "
           "q = the interval's quantile levels (BCa: adjusted; basic: reflected; studentized: the t "
           "quantiles, mapped by the estimate and its SE); normal: sd = sqrt(sd_bias² + z_c²·sd_se²), "
           "band ± 1.96 sd")


@dataclass(frozen=True)
class Summary:
    """What an interval method may read."""

    estimate: float
    ordered: np.ndarray  # sorted replicates
    cumulative: np.ndarray | None  # cumulative weights of ``ordered`` (exhaustive), None: each 1/B
    confidence: float
    standard_error: float
    bias: float
    standard_error_sd: float | None  # Monte Carlo s.d. of the SE (None when exact)
    bias_sd: float | None
    z0: float | None = None
    acceleration: float | None = None
    bca_problem: str | None = None
    t_ordered: np.ndarray | None = None  # sorted studentized replicates
    t_cumulative: np.ndarray | None = None
    se_hat: float | None = None
    studentized_problem: str | None = None

    @property
    def exact(self) -> bool:
        return self.cumulative is not None


IntervalMethod = Callable[[Summary], Interval]


def bca_levels(z0: float, acceleration: float, levels: np.ndarray | list[float] | float) -> np.ndarray:
    """BCa adjusted quantile levels Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α))), E&T eq. 14.10.

    With z0 = 0 and a = 0 they equal the nominal levels (identity 12).
    """
    z = z0 + ndtri(np.asarray(levels, dtype=np.float64))
    return ndtr(z0 + z / (1.0 - acceleration * z))


def quantile_rank(level: float, resamples: int) -> int:
    """1-based rank k of the inverse-CDF quantile: the smallest k with k/B ≥ level.

    Equals ``np.quantile(..., method="inverted_cdf")`` except that level·B within 1e-9 of an
    integer is snapped to it, so that rounding in 1 − confidence (0.025000000000000022 for 95%)
    cannot move an endpoint by one replicate.
    """
    position = level * resamples
    nearest = round(position)
    k = nearest if abs(position - nearest) <= 1e-9 * max(1.0, position) else math.ceil(position)
    return min(max(int(k), 1), resamples)


def read_quantile(ordered: np.ndarray, cumulative: np.ndarray | None, level: float) -> float:
    """Smallest value whose (weighted) empirical CDF reaches ``level`` (V-CONV-QUANTILE)."""
    if cumulative is None:
        return float(ordered[quantile_rank(level, ordered.shape[0]) - 1])
    k = int(np.searchsorted(cumulative, level - 1e-12, side="left"))
    return float(ordered[min(k, ordered.shape[0] - 1)])


def quantile_band(ordered: np.ndarray, level: float, z: float = MC_Z) -> tuple[float, float, float]:
    """(low, high, sd) of the end read at ``level`` from the sorted replicates (``MC_RULE``)."""
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


Band = tuple[float, float, float]  # (low, high, sd) of one end


def _band(ordered: np.ndarray, cumulative: np.ndarray | None, level: float) -> Band | None:
    """The end's band and s.d.; None for exhaustive enumeration (no Monte Carlo error)."""
    if cumulative is not None or ordered.shape[0] < 2:
        return None
    return quantile_band(ordered, level)


def _reflected(estimate: float, band: Band | None) -> Band | None:
    return None if band is None else (2 * estimate - band[1], 2 * estimate - band[0], band[2])


def _with_bands(interval: Interval, lower: Band | None, upper: Band | None) -> Interval:
    if lower is None or upper is None:
        return interval
    return dataclasses.replace(interval, monte_carlo=((lower[0], lower[1]), (upper[0], upper[1])),
                               monte_carlo_sd=(lower[2], upper[2]))


def _undefined(method: str, s: Summary, note: str) -> Interval:
    return Interval(method, s.confidence, None, None, note=note)


def _tails(s: Summary) -> tuple[float, float]:
    alpha = 1.0 - s.confidence
    return alpha / 2, 1 - alpha / 2


def _percentile(s: Summary) -> Interval:
    lo, hi = _tails(s)
    interval = Interval("percentile", s.confidence, read_quantile(s.ordered, s.cumulative, lo),
                        read_quantile(s.ordered, s.cumulative, hi), quantile_levels=(lo, hi))
    return _with_bands(interval, _band(s.ordered, s.cumulative, lo), _band(s.ordered, s.cumulative, hi))


def _basic(s: Summary) -> Interval:
    lo, hi = _tails(s)
    q_lo = read_quantile(s.ordered, s.cumulative, lo)
    q_hi = read_quantile(s.ordered, s.cumulative, hi)
    interval = Interval("basic", s.confidence, 2 * s.estimate - q_hi, 2 * s.estimate - q_lo,
                        quantile_levels=(hi, lo))
    return _with_bands(interval, _reflected(s.estimate, _band(s.ordered, s.cumulative, hi)),
                       _reflected(s.estimate, _band(s.ordered, s.cumulative, lo)))


def _normal(s: Summary) -> Interval:
    _, hi = _tails(s)
    z = float(ndtri(hi))
    centre = s.estimate - s.bias
    lower, upper = centre - z * s.standard_error, centre + z * s.standard_error
    interval = Interval("normal", s.confidence, lower, upper,
                        note="bias-corrected: (estimate - bias) -/+ z * standard error")
    if s.standard_error_sd is None or s.bias_sd is None:
        return interval
    sd = math.sqrt(s.bias_sd ** 2 + (z * s.standard_error_sd) ** 2)
    return _with_bands(interval, (lower - MC_Z * sd, lower + MC_Z * sd, sd),
                       (upper - MC_Z * sd, upper + MC_Z * sd, sd))


def _bca(s: Summary) -> Interval:
    if s.bca_problem is not None:
        return _undefined("bca", s, s.bca_problem)
    assert s.z0 is not None and s.acceleration is not None
    lo, hi = (float(v) for v in bca_levels(s.z0, s.acceleration, list(_tails(s))))
    interval = Interval("bca", s.confidence, read_quantile(s.ordered, s.cumulative, lo),
                        read_quantile(s.ordered, s.cumulative, hi), quantile_levels=(lo, hi))
    return _with_bands(interval, _band(s.ordered, s.cumulative, lo), _band(s.ordered, s.cumulative, hi))


def _studentized(s: Summary) -> Interval:
    if s.studentized_problem is not None:
        return _undefined("studentized", s, s.studentized_problem)
    assert s.t_ordered is not None and s.se_hat is not None
    lo, hi = _tails(s)
    t_lo = read_quantile(s.t_ordered, s.t_cumulative, lo)
    t_hi = read_quantile(s.t_ordered, s.t_cumulative, hi)
    interval = Interval("studentized", s.confidence, s.estimate - s.se_hat * t_hi, s.estimate - s.se_hat * t_lo,
                        quantile_levels=(hi, lo))
    se_hat = s.se_hat

    def mapped(band: Band | None) -> Band | None:  # an end θ̂ − ŝe·t moves with its t quantile
        return None if band is None else (s.estimate - se_hat * band[1], s.estimate - se_hat * band[0],
                                          abs(se_hat) * band[2])
    return _with_bands(interval, mapped(_band(s.t_ordered, s.t_cumulative, hi)),
                       mapped(_band(s.t_ordered, s.t_cumulative, lo)))


INTERVAL_METHODS: dict[str, IntervalMethod] = {
    "percentile": _percentile, "basic": _basic, "normal": _normal, "bca": _bca, "studentized": _studentized,
}
