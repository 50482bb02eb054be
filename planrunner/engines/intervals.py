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

Monte Carlo error of an endpoint read at level p from B replicates (common practice: the
distribution-free binomial interval for a quantile from order statistics): ranks
floor(Bp − 1.96√(Bp(1−p))) and ceil(Bp + 1.96√(Bp(1−p))) bound, with about 95% confidence, the
endpoint that infinitely many resamples would give (for BCa and studentized endpoints the levels
and ŝe are taken as fixed). For the normal interval: ±1.96·√(sd_bias² + z²·sd_se²).
Exhaustive enumeration has no Monte Carlo error.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from planrunner.engines.lazy import ndtr, ndtri
from planrunner.engines.results import Interval

__all__ = ["INTERVAL_METHODS", "Summary", "bca_levels", "quantile_rank", "read_quantile"]

MC_Z = 1.959963984540054  # 97.5% normal point: the Monte Carlo ranges are about 95%


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


def _mc_range(ordered: np.ndarray, cumulative: np.ndarray | None, level: float) -> tuple[float, float] | None:
    """About 95% Monte Carlo range of the quantile read at ``level`` (order statistics)."""
    if cumulative is not None:
        return None
    b = ordered.shape[0]
    spread = MC_Z * math.sqrt(b * level * (1.0 - level))
    low = min(max(int(math.floor(b * level - spread)), 1), b)
    high = min(max(int(math.ceil(b * level + spread)), 1), b)
    return float(ordered[low - 1]), float(ordered[high - 1])


def _undefined(method: str, s: Summary, note: str) -> Interval:
    return Interval(method, s.confidence, None, None, note=note)


def _tails(s: Summary) -> tuple[float, float]:
    alpha = 1.0 - s.confidence
    return alpha / 2, 1 - alpha / 2


def _percentile(s: Summary) -> Interval:
    lo, hi = _tails(s)
    mc = _mc_range(s.ordered, s.cumulative, lo), _mc_range(s.ordered, s.cumulative, hi)
    return Interval("percentile", s.confidence, read_quantile(s.ordered, s.cumulative, lo),
                    read_quantile(s.ordered, s.cumulative, hi), quantile_levels=(lo, hi),
                    monte_carlo=None if mc[0] is None or mc[1] is None else (mc[0], mc[1]))


def _basic(s: Summary) -> Interval:
    lo, hi = _tails(s)
    q_lo = read_quantile(s.ordered, s.cumulative, lo)
    q_hi = read_quantile(s.ordered, s.cumulative, hi)
    mc_lo, mc_hi = _mc_range(s.ordered, s.cumulative, hi), _mc_range(s.ordered, s.cumulative, lo)
    reflect = (lambda r: (2 * s.estimate - r[1], 2 * s.estimate - r[0]))  # noqa: E731
    mc = None if mc_lo is None or mc_hi is None else (reflect(mc_lo), reflect(mc_hi))
    return Interval("basic", s.confidence, 2 * s.estimate - q_hi, 2 * s.estimate - q_lo,
                    quantile_levels=(hi, lo), monte_carlo=mc)


def _normal(s: Summary) -> Interval:
    _, hi = _tails(s)
    z = float(ndtri(hi))
    centre = s.estimate - s.bias
    lower, upper = centre - z * s.standard_error, centre + z * s.standard_error
    mc = None
    if s.standard_error_sd is not None and s.bias_sd is not None:
        half = MC_Z * math.sqrt(s.bias_sd ** 2 + (z * s.standard_error_sd) ** 2)
        mc = ((lower - half, lower + half), (upper - half, upper + half))
    return Interval("normal", s.confidence, lower, upper, monte_carlo=mc,
                    note="bias-corrected: (estimate - bias) -/+ z * standard error")


def _bca(s: Summary) -> Interval:
    if s.bca_problem is not None:
        return _undefined("bca", s, s.bca_problem)
    assert s.z0 is not None and s.acceleration is not None
    lo, hi = (float(v) for v in bca_levels(s.z0, s.acceleration, list(_tails(s))))
    mc = _mc_range(s.ordered, s.cumulative, lo), _mc_range(s.ordered, s.cumulative, hi)
    return Interval("bca", s.confidence, read_quantile(s.ordered, s.cumulative, lo),
                    read_quantile(s.ordered, s.cumulative, hi), quantile_levels=(lo, hi),
                    monte_carlo=None if mc[0] is None or mc[1] is None else (mc[0], mc[1]))


def _studentized(s: Summary) -> Interval:
    if s.studentized_problem is not None:
        return _undefined("studentized", s, s.studentized_problem)
    assert s.t_ordered is not None and s.se_hat is not None
    lo, hi = _tails(s)
    t_lo = read_quantile(s.t_ordered, s.t_cumulative, lo)
    t_hi = read_quantile(s.t_ordered, s.t_cumulative, hi)
    mc = None
    r_lo, r_hi = _mc_range(s.t_ordered, s.t_cumulative, hi), _mc_range(s.t_ordered, s.t_cumulative, lo)
    if r_lo is not None and r_hi is not None:
        mc = ((s.estimate - s.se_hat * r_lo[1], s.estimate - s.se_hat * r_lo[0]),
              (s.estimate - s.se_hat * r_hi[1], s.estimate - s.se_hat * r_hi[0]))
    return Interval("studentized", s.confidence, s.estimate - s.se_hat * t_hi, s.estimate - s.se_hat * t_lo,
                    quantile_levels=(hi, lo), monte_carlo=mc)


INTERVAL_METHODS: dict[str, IntervalMethod] = {
    "percentile": _percentile, "basic": _basic, "normal": _normal, "bca": _bca, "studentized": _studentized,
}
