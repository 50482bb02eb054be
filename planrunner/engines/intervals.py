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

__all__ = ["INTERVAL_METHODS", "INVERSION_RULES", "MC_RULE", "Inverted", "Summary", "bca_levels", "invert",
           "quantile_band", "quantile_rank", "read_quantile", "tail_levels"]

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
    alternative: str = "two-sided"  # "greater": a one-sided lower bound; "less": an upper bound

    @property
    def exact(self) -> bool:
        return self.cumulative is not None

    @property
    def side(self) -> str:
        """The interval's side: "two-sided", or "lower" / "upper" for a one-sided bound."""
        return {"greater": "lower", "less": "upper"}.get(self.alternative, "two-sided")


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
    """The interval with the bands of its read ends (an open end of a one-sided bound has none)."""
    if lower is None and upper is None:
        return interval
    return dataclasses.replace(interval, monte_carlo=(None if lower is None else (lower[0], lower[1]),
                                                      None if upper is None else (upper[0], upper[1])),
                               monte_carlo_sd=(None if lower is None else lower[2],
                                               None if upper is None else upper[2]))


def _undefined(method: str, s: Summary, note: str) -> Interval:
    return Interval(method, s.confidence, None, None, note=note, side=s.side)


def tail_levels(confidence: float, alternative: str) -> tuple[float | None, float | None]:
    """The levels of the lower and of the upper end: (α/2, 1 − α/2) two-sided; a one-sided bound
    at confidence 1 − α reads one end at α (lower bound, ``greater``) or 1 − α (upper bound,
    ``less``), and its other end is open (None here, ∓∞ in the interval)."""
    alpha = 1.0 - confidence
    if alternative == "greater":
        return alpha, None
    if alternative == "less":
        return None, 1.0 - alpha
    return alpha / 2, 1 - alpha / 2


def _tails(s: Summary) -> tuple[float | None, float | None]:
    return tail_levels(s.confidence, s.alternative)


def _reflected_tails(s: Summary) -> tuple[float | None, float | None]:
    """The levels that the lower and the upper end of a reflected interval (basic, studentized)
    read: the lower end reflects the upper quantile, so (1 − α/2, α/2) two-sided; (1 − α, open)
    for a lower bound; (open, α) for an upper bound."""
    alpha = 1.0 - s.confidence
    if s.alternative == "greater":
        return 1 - alpha, None
    if s.alternative == "less":
        return None, alpha
    return 1 - alpha / 2, alpha / 2


def _ends(lo: float | None, hi: float | None, read: Callable[[float], float],
          band: Callable[[float], Band | None]) -> tuple[float, float, Band | None, Band | None]:
    """(lower, upper, lower band, upper band) of ends read at ``lo`` and ``hi``; an open end is ∓∞."""
    return (-math.inf if lo is None else read(lo), math.inf if hi is None else read(hi),
            None if lo is None else band(lo), None if hi is None else band(hi))


def _percentile(s: Summary) -> Interval:
    lo, hi = _tails(s)
    lower, upper, b_lo, b_hi = _ends(lo, hi, lambda q: read_quantile(s.ordered, s.cumulative, q),
                                     lambda q: _band(s.ordered, s.cumulative, q))
    interval = Interval("percentile", s.confidence, lower, upper, quantile_levels=(lo, hi), side=s.side)
    return _with_bands(interval, b_lo, b_hi)


def _basic(s: Summary) -> Interval:
    r_lo, r_hi = _reflected_tails(s)
    lower, upper, b_lo, b_hi = _ends(r_lo, r_hi, lambda q: 2 * s.estimate - read_quantile(s.ordered, s.cumulative, q),
                                     lambda q: _reflected(s.estimate, _band(s.ordered, s.cumulative, q)))
    interval = Interval("basic", s.confidence, lower, upper, quantile_levels=(r_lo, r_hi), side=s.side)
    return _with_bands(interval, b_lo, b_hi)


def _normal(s: Summary) -> Interval:
    lo, hi = _tails(s)
    centre = s.estimate - s.bias
    # the lower end is centre − z(1 − lo)·se, the upper centre + z(hi)·se
    z_lo = None if lo is None else float(ndtri(1 - lo))
    z_hi = None if hi is None else float(ndtri(hi))
    lower = -math.inf if z_lo is None else centre - z_lo * s.standard_error
    upper = math.inf if z_hi is None else centre + z_hi * s.standard_error
    sign = {"lower": "-", "upper": "+"}.get(s.side, "-/+")
    interval = Interval("normal", s.confidence, lower, upper,
                        note=f"bias-corrected: (estimate - bias) {sign} z * standard error", side=s.side)
    if s.standard_error_sd is None or s.bias_sd is None:
        return interval

    def band(end: float, z: float | None) -> Band | None:
        if z is None:
            return None
        assert s.bias_sd is not None and s.standard_error_sd is not None
        sd = math.sqrt(s.bias_sd ** 2 + (z * s.standard_error_sd) ** 2)
        return end - MC_Z * sd, end + MC_Z * sd, sd
    return _with_bands(interval, band(lower, z_lo), band(upper, z_hi))


def _bca(s: Summary) -> Interval:
    if s.bca_problem is not None:
        return _undefined("bca", s, s.bca_problem)
    assert s.z0 is not None and s.acceleration is not None
    lo, hi = _tails(s)
    a_lo = None if lo is None else float(bca_levels(s.z0, s.acceleration, lo))
    a_hi = None if hi is None else float(bca_levels(s.z0, s.acceleration, hi))
    lower, upper, b_lo, b_hi = _ends(a_lo, a_hi, lambda q: read_quantile(s.ordered, s.cumulative, q),
                                     lambda q: _band(s.ordered, s.cumulative, q))
    interval = Interval("bca", s.confidence, lower, upper, quantile_levels=(a_lo, a_hi), side=s.side)
    return _with_bands(interval, b_lo, b_hi)


def _studentized(s: Summary) -> Interval:
    if s.studentized_problem is not None:
        return _undefined("studentized", s, s.studentized_problem)
    assert s.t_ordered is not None and s.se_hat is not None
    se_hat = s.se_hat
    t_ordered, t_cumulative = s.t_ordered, s.t_cumulative

    def mapped(band: Band | None) -> Band | None:  # an end θ̂ − ŝe·t moves with its t quantile
        return None if band is None else (s.estimate - se_hat * band[1], s.estimate - se_hat * band[0],
                                          abs(se_hat) * band[2])
    r_lo, r_hi = _reflected_tails(s)  # the lower end is θ̂ − ŝe·t(r_lo), the upper θ̂ − ŝe·t(r_hi)
    lower, upper, b_lo, b_hi = _ends(r_lo, r_hi,
                                     lambda q: s.estimate - se_hat * read_quantile(t_ordered, t_cumulative, q),
                                     lambda q: mapped(_band(t_ordered, t_cumulative, q)))
    interval = Interval("studentized", s.confidence, lower, upper, quantile_levels=(r_lo, r_hi), side=s.side)
    return _with_bands(interval, b_lo, b_hi)


INTERVAL_METHODS: dict[str, IntervalMethod] = {
    "percentile": _percentile, "basic": _basic, "normal": _normal, "bca": _bca, "studentized": _studentized,
}


# ------------------------------------------------------------------ p-values by inverting a bound family


@dataclass(frozen=True)
class Inverted:
    """One-sided p-values of a null value θ0 from inverting an interval family (:func:`invert`).

    ``p_greater``: the smallest α at which θ0 lies below the 1 − α lower bound (evidence that
    θ > θ0); ``p_less``: the smallest α at which θ0 lies above the 1 − α upper bound. ``sd_*``: their
    Monte Carlo s.d. (None when exact). ``counts``: for the methods that count replicates, the
    (count, total) behind each p (a Clopper–Pearson interval can be formed from them).
    """

    p_greater: float
    p_less: float
    sd_greater: float | None
    sd_less: float | None
    counts: tuple[tuple[int, int], tuple[int, int]] | None = None


def _shares(ordered: np.ndarray, cumulative: np.ndarray | None, value: float,
            tolerance: float) -> tuple[float, float, int, int]:
    """(P(θ* ≤ value), P(θ* ≥ value), #≤, #≥): ties within ``tolerance`` count on both sides."""
    b = ordered.shape[0]
    at_most = int(np.searchsorted(ordered, value + tolerance, side="right"))
    below = int(np.searchsorted(ordered, value - tolerance, side="left"))
    if cumulative is None:
        return at_most / b, (b - below) / b, at_most, b - below
    total = float(cumulative[-1])
    le = float(cumulative[at_most - 1]) / total if at_most else 0.0
    lt = float(cumulative[below - 1]) / total if below else 0.0
    return min(le, 1.0), min(max(1.0 - lt, 0.0), 1.0), at_most, b - below


def _count_sd(p: float, b: int, exact: bool) -> float | None:
    return None if exact else math.sqrt(p * (1.0 - p) / b)


def _invert_percentile(s: Summary, null: float, tolerance: float) -> Inverted:
    # lower bound q(α) > θ0 ⇔ P(θ* ≤ θ0) < α; upper bound q(1 − α) < θ0 ⇔ P(θ* ≥ θ0) ≤ α
    le, ge, n_le, n_ge = _shares(s.ordered, s.cumulative, null, tolerance)
    b = s.ordered.shape[0]
    return Inverted(le, ge, _count_sd(le, b, s.exact), _count_sd(ge, b, s.exact), ((n_le, b), (n_ge, b)))


def _invert_basic(s: Summary, null: float, tolerance: float) -> Inverted:
    # lower bound 2θ̂ − q(1 − α) > θ0 ⇔ q(1 − α) < 2θ̂ − θ0 ⇔ P(θ* ≥ 2θ̂ − θ0) ≤ α; mirrored above
    le, ge, n_le, n_ge = _shares(s.ordered, s.cumulative, 2 * s.estimate - null, tolerance)
    b = s.ordered.shape[0]
    return Inverted(ge, le, _count_sd(ge, b, s.exact), _count_sd(le, b, s.exact), ((n_ge, b), (n_le, b)))


def _invert_studentized(s: Summary, null: float, tolerance: float) -> Inverted | str:
    if s.studentized_problem is not None:
        return s.studentized_problem
    assert s.t_ordered is not None and s.se_hat is not None
    # lower bound θ̂ − ŝe·t(1 − α) > θ0 ⇔ t(1 − α) < t0 = (θ̂ − θ0)/ŝe ⇔ P(t* ≥ t0) ≤ α (bootstrap-t test)
    t0 = (s.estimate - null) / s.se_hat
    le, ge, n_le, n_ge = _shares(s.t_ordered, s.t_cumulative, t0, TIE_SCALE * max(1.0, abs(t0)))
    b = s.t_ordered.shape[0]
    return Inverted(ge, le, _count_sd(ge, b, s.exact), _count_sd(le, b, s.exact), ((n_ge, b), (n_le, b)))


def _invert_normal(s: Summary, null: float, tolerance: float) -> Inverted | str:
    if not s.standard_error > 0:
        return "the standard error is zero"
    # lower bound c − z(1 − α)·SE > θ0 ⇔ α > Φ((θ0 − c)/SE); upper mirrored
    x = (null - (s.estimate - s.bias)) / s.standard_error
    p_g, p_l = float(ndtr(x)), float(ndtr(-x))
    if s.standard_error_sd is None or s.bias_sd is None:
        return Inverted(p_g, p_l, None, None)
    # delta method: ∂p/∂bias = φ(x)/SE, ∂p/∂SE = −φ(x)·x/SE (same for both sides)
    sd = _phi(x) / s.standard_error * math.sqrt(s.bias_sd ** 2 + (x * s.standard_error_sd) ** 2)
    return Inverted(p_g, p_l, sd, sd)


def _phi(x: float) -> float:
    return math.exp(-0.5 * x * x) / math.sqrt(2 * math.pi)


def _bca_p(share: float, z0: float, a: float, side: str) -> float:
    """The smallest α at which the BCa bound excludes θ0, from the share of replicates on θ0's side.

    Lower bound (side "greater"): θ0 < q(β(α)) ⇔ F(θ0) < β(α), β(α) = Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α)));
    solving β(α) = F with w = Φ⁻¹(F): α = Φ((w − z0)/(1 + a(w − z0)) − z0). Upper bound (side "less"),
    with F = P(θ* < θ0): α = Φ(z0 − (w − z0)/(1 + a(w − z0))). Where 1 + a(w − z0) ≤ 0 the share lies
    beyond every level the BCa map reaches: excluded at every α (0) or at none (1).
    """
    w = float(ndtri(share)) if 0.0 < share < 1.0 else (-math.inf if share <= 0.0 else math.inf)
    if math.isinf(w):
        # the limits of the formula as w → ∓∞
        if a == 0.0:
            u = w
        else:
            tends = 1.0 + a * (w - z0)  # ±∞ with the sign of a·w
            u = 1.0 / a if tends > 0 else math.nan
    else:
        d = 1.0 + a * (w - z0)
        u = (w - z0) / d if d > 0 else math.nan
    if math.isnan(u):
        reached = a > 0  # the map reaches only levels above Φ(z0 − 1/a) (a > 0) or below it (a < 0)
        if side == "greater":
            return 0.0 if reached else 1.0
        return 1.0 if reached else 0.0
    return float(ndtr(u - z0)) if side == "greater" else float(ndtr(z0 - u))


def _invert_bca(s: Summary, null: float, tolerance: float) -> Inverted | str:
    if s.bca_problem is not None:
        return s.bca_problem
    assert s.z0 is not None and s.acceleration is not None
    z0, a = s.z0, s.acceleration
    le, ge, n_le, n_ge = _shares(s.ordered, s.cumulative, null, tolerance)
    below = 1.0 - ge  # P(θ* < θ0)
    p_g, p_l = _bca_p(le, z0, a, "greater"), _bca_p(below, z0, a, "less")
    if s.exact:
        return Inverted(p_g, p_l, None, None)
    b = s.ordered.shape[0]

    g = float(ndtr(z0))  # the share of replicates below the estimate that z0 was read from

    def sd(share: float, side: str) -> float:
        # delta method in the two shares the p-value reads from the same replicates (a fixed): F, the
        # share on the null value's side, and G = Φ(z0); both are empirical CDF values, so
        # Var(F) = F(1 − F)/B, Var(G) = G(1 − G)/B, Cov = (min(F, G) − F·G)/B. Slopes by central
        # differences (one replicate's weight for F; 1e-4 in z0 for G, dz0/dG = 1/φ(z0)).
        h = 1.0 / b
        f = min(max(share, h), 1.0 - h)
        d_f = (_bca_p(min(f + h, 1.0), z0, a, side) - _bca_p(max(f - h, 0.0), z0, a, side)) / (2 * h)
        e = 1e-4
        d_g = (_bca_p(f, z0 + e, a, side) - _bca_p(f, z0 - e, a, side)) / (2 * e) / _phi(z0)
        variance = (d_f ** 2 * f * (1 - f) + d_g ** 2 * g * (1 - g) + 2 * d_f * d_g * (min(f, g) - f * g)) / b
        return math.sqrt(max(variance, 0.0))
    return Inverted(p_g, p_l, sd(le, "greater"), sd(below, "less"))


TIE_SCALE = 2.0 ** -43  # relative tolerance of ties at the null value (as the engine's TIE_TOLERANCE)

INVERSIONS: dict[str, Callable[[Summary, float, float], Inverted | str]] = {
    "percentile": lambda s, v, t: _invert_percentile(s, v, t), "basic": lambda s, v, t: _invert_basic(s, v, t),
    "normal": _invert_normal, "bca": _invert_bca, "studentized": _invert_studentized,
}
INVERSION_RULES = {
    "percentile": "p_greater = share of replicates <= null value; p_less = share >= null value",
    "basic": "p_greater = share of replicates >= 2 estimate - null value; p_less = share <= it",
    "normal": "p_greater = Phi((null value - (estimate - bias)) / SE); p_less = 1 - that",
    "bca": "p_greater = Phi((w - z0) / (1 + a (w - z0)) - z0), w = inverse normal of the share <= null value; "
           "p_less = Phi(z0 - (w - z0) / (1 + a (w - z0))), w from the share < null value",
    "studentized": "t0 = (estimate - null value) / se_hat; p_greater = share of t* >= t0; p_less = share <= t0",
}


def invert(method: str, s: Summary, null: float, tolerance: float) -> Inverted | str:
    """One-sided p-values of ``null`` by inverting ``method``'s one-sided bounds (or why there are none).

    p_greater is the smallest α whose 1 − α lower bound lies above ``null`` and p_less the smallest α
    whose upper bound lies below it, so that p < α exactly when the bound at confidence 1 − α
    excludes the null value (for the counting methods: p_greater < α, p_less ≤ α, by the inverse-CDF
    quantile convention). Efron & Tibshirani (1993), §15.4 (percentile and BCa achieved significance
    levels); Davison & Hinkley (1997), §4.4 (tests from confidence limits); both from memory.
    """
    return INVERSIONS[method](s, null, tolerance)
