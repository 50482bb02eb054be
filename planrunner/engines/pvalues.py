"""From a null distribution to p-values: the rules every permutation-type engine shares.

Conventions (V-CONV-P, stated in every record):

* exact (enumeration or dynamic programming): ``p = #{T* at least as extreme as t} / arrangements``,
  the observed arrangement included, so ``p ≥ 1 / arrangements``;
* Monte Carlo over m random arrangements: ``p = (b + 1) / (m + 1)``, never below ``1/(m + 1)``;
* two-sided, rule ``doubled`` (the default, as scipy.stats.permutation_test):
  ``min(1, 2 min(p_greater, p_less))``; rule ``absolute``: ``|T* − c| ≥ |t − c|`` with c the centre of
  the null given by the engine (the exact null mean of sum statistics; 0 for the others);
* "at least as extreme" allows ``tolerance``, so values equal in exact arithmetic count as equal.

For a Monte Carlo p-value the record also carries its standard error and a Clopper–Pearson interval for
the p-value that full enumeration would give (the binomial proportion b/m of extreme arrangements; for
the doubled rule, twice that of the smaller side), at :data:`P_INTERVAL_LEVEL`. The standard error is
that of the binomial proportion behind the p-value, scaled as the p-value is: ``sqrt(p (1 − p) / m)``
for a one-sided p and for the absolute rule (one proportion each); ``2 sqrt(p₁ (1 − p₁) / m)`` for the
doubled rule, with p₁ the smaller one-sided p, since the doubled p is twice that proportion
(:func:`monte_carlo_sd`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.engines.lazy import betaincinv
from planrunner.engines.results import EngineWarning

__all__ = ["P_INTERVAL_LEVEL", "TWO_SIDED_RULES", "PValues", "clopper_pearson", "monte_carlo_sd", "summarize"]

TWO_SIDED_RULES = ("doubled", "absolute")
P_INTERVAL_LEVEL = 0.99  # common practice: a wide interval so that its warning rarely cries wolf


@dataclass(frozen=True)
class PValues:
    p_value: float
    p_greater: float
    p_less: float
    count_greater: float  # arrangements (or draws) with T* ≥ t − tol; a float only for float DP weights
    count_less: float
    count_absolute: float  # |T* − c| ≥ |t − c| − tol
    total: float  # arrangements (exact) or resamples (Monte Carlo); Python ints for exact integer weights
    monte_carlo_se: float | None
    p_interval: tuple[float, float] | None
    smallest_p: float
    warnings: tuple[EngineWarning, ...]


def clopper_pearson(count: int, trials: int, level: float = P_INTERVAL_LEVEL) -> tuple[float, float]:
    """Exact binomial interval for a proportion (Clopper & Pearson 1934), from beta quantiles."""
    tail = (1.0 - level) / 2.0
    lower = 0.0 if count == 0 else float(betaincinv(count, trials - count + 1, tail))
    upper = 1.0 if count == trials else float(betaincinv(count + 1, trials - count, 1.0 - tail))
    return lower, upper


def monte_carlo_sd(p_greater: float, p_less: float, resamples: int, *, alternative: str, two_sided: str,
                   p_absolute: float | None = None) -> float:
    """Monte Carlo standard deviation of the reported p-value, from the proportion it scales.

    A one-sided p (and the absolute rule) is one binomial proportion p: sd = sqrt(p (1 − p) / m).
    The doubled two-sided p is 2·p₁, p₁ = min(p_greater, p_less), so its sd is 2·sqrt(p₁ (1 − p₁) / m),
    not sqrt(2p₁ (1 − 2p₁) / m), which understates it (at p = 0.83 and m = 100 000: 0.0012 instead of 0.0031).
    """
    if alternative in ("greater", "less"):
        p = p_greater if alternative == "greater" else p_less
        return float(np.sqrt(p * (1.0 - p) / resamples))
    if two_sided == "absolute":
        if p_absolute is None:
            raise ValueError("the absolute rule needs its own p-value")
        return float(np.sqrt(p_absolute * (1.0 - p_absolute) / resamples))
    smaller = min(p_greater, p_less)
    return float(2.0 * np.sqrt(smaller * (1.0 - smaller) / resamples))


def summarize(null: np.ndarray, observed: float, *, exact: bool, alternative: str, two_sided: str,
              tolerance: float, center: float = 0.0, weights: np.ndarray | None = None,
              alpha: float | None = None, arrangements: float | None = None) -> PValues:
    """p-values of ``observed`` against ``null`` (values, optionally with exact ``weights``).

    ``weights`` (dynamic programming) are the number of arrangements at each null value; the null is
    then its support. ``arrangements`` bounds the smallest Monte Carlo p-value (1/arrangements).
    """
    integers = weights is not None and np.asarray(weights).dtype == object  # exact Python int counts
    w = np.ones(null.shape[0]) if weights is None else np.asarray(weights, dtype=object if integers else np.float64)

    def weight(mask: np.ndarray) -> Any:
        # exact ints stay ints: int / int below is the correctly rounded quotient
        return int(w[mask].sum()) if integers else float(w[mask].sum())
    everywhere = np.ones(null.shape[0], dtype=bool)
    greater = weight(null >= observed - tolerance)
    less = weight(null <= observed + tolerance)
    distance = np.abs(null - center)
    far = weight(distance >= abs(observed - center) - tolerance)
    total = weight(everywhere)
    if weights is None:
        greater, less, far, total = int(greater), int(less), int(far), int(total)
    if exact:
        p_g, p_l, p_abs = greater / total, less / total, far / total
    else:
        p_g, p_l, p_abs = (greater + 1) / (total + 1), (less + 1) / (total + 1), (far + 1) / (total + 1)
    doubled = min(1.0, 2.0 * min(p_g, p_l))
    p_value = {"greater": p_g, "less": p_l}.get(alternative, doubled if two_sided == "doubled" else p_abs)

    # smallest attainable p: the most extreme value of the null, however the data had fallen
    if exact:
        top = weight(null >= null.max() - tolerance) / total
        bottom = weight(null <= null.min() + tolerance) / total
        edge = weight(distance >= distance.max() - tolerance) / total
        smallest = {"greater": top, "less": bottom}.get(
            alternative, min(1.0, 2.0 * min(top, bottom)) if two_sided == "doubled" else edge)
    else:
        # 1/arrangements underflows to 0 for large groups (and int → float overflows past 1e308)
        known = arrangements is not None and 0 < arrangements < 10 ** 300
        floor = max(1.0 / (total + 1), 1.0 / arrangements if known and arrangements else 0.0)
        smallest = min(1.0, 2.0 * floor) if alternative == "two-sided" and two_sided == "doubled" else floor

    se = interval = None
    warnings: list[EngineWarning] = []
    if not exact:
        m = int(total)
        se = monte_carlo_sd(p_g, p_l, m, alternative=alternative, two_sided=two_sided, p_absolute=p_abs)
        if alternative == "greater" or alternative == "less":
            interval = clopper_pearson(int(greater if alternative == "greater" else less), m)
        elif two_sided == "absolute":
            interval = clopper_pearson(int(far), m)
        else:
            lo, hi = clopper_pearson(int(min(greater, less)), m)
            interval = (min(1.0, 2.0 * lo), min(1.0, 2.0 * hi))
        if alpha is not None and interval[0] <= alpha <= interval[1]:
            warnings.append(EngineWarning(
                "mc-interval-contains-alpha",
                f"alpha = {alpha:g} lies inside the {P_INTERVAL_LEVEL:.0%} Clopper–Pearson interval "
                f"({interval[0]:.4g}, {interval[1]:.4g}) for the p-value of full enumeration: "
                f"{m} random arrangements cannot settle the test at this alpha; use more resamples"))
    if alpha is not None and smallest > alpha:
        warnings.append(EngineWarning(
            "p-floor-above-alpha",
            f"the smallest attainable p-value is {smallest:.4g}, above alpha = {alpha:g}: "
            "this test cannot reject at that level whatever the data"))
    return PValues(p_value=float(p_value), p_greater=float(p_g), p_less=float(p_l), count_greater=greater,
                   count_less=less, count_absolute=far, total=total, monte_carlo_se=se, p_interval=interval,
                   smallest_p=float(smallest), warnings=tuple(warnings))
