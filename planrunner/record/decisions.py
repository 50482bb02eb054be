"""The record's `decision`: the pre-specified rule applied to the analysis's numbers (README:
Decision rules).

The comparisons come from `planrunner.plan.decisions`. A bootstrap comparison reads an end of the
pre-specified interval; it is unresolved when that end's Monte Carlo band (`record/bands.py`, rule
`MC_RULE`) holds the threshold, since another run of the same size could fall on the other side.
A permutation comparison reads the p-value of the test at the shifted null; it is unresolved when
the 99% Clopper–Pearson interval of that p-value (the interval `engines/pvalues.py` gives every
Monte Carlo p-value) holds α. Exact results (exhaustive bootstrap, enumerated arrangements) are
never unresolved.

Resamples that would resolve a comparison (an estimate): a band's half-width and a p-value's
standard error both shrink as 1/√B, so

    bootstrap:    B · (h / d)²              h = the band's reach from the end towards the threshold,
                                            d = |end − threshold|
    permutation:  z² · p (1 − p) / (p − α)²  z = 2.576 (the 99% interval), p the Monte Carlo p-value

rounded up; null when the end sits on the threshold (or p on α). For a rule of several comparisons
the largest is given.
"""

from __future__ import annotations

import math
from typing import Any

from planrunner.engines.pvalues import P_INTERVAL_LEVEL, clopper_pearson
from planrunner.engines.results import PermutationResult
from planrunner.plan.decisions import ABOVE, Comparison, benefit, comparisons, one_sided_alpha
from planrunner.plan.schema import Plan
from planrunner.record.canonical import plain_number as _f
from planrunner.record.fields import MethodFields

MET, NOT_MET, UNRESOLVED = "met", "not met", "unresolved"
Z_P_INTERVAL = 2.5758293035489004  # the normal quantile of the two-sided 99% interval (P_INTERVAL_LEVEL)
_NAMES = {"bca": "BCa", "percentile": "percentile", "basic": "basic", "normal": "normal",
          "studentized": "studentized", "shift": "shift"}


def decision_entry(analysis: Any, plan: Plan, fields: MethodFields, result: Any) -> dict[str, Any] | None:
    """The analysis's `decision`, or None when the plan gives it no decision."""
    decision = getattr(analysis, "decision", None)
    if decision is None:
        return None
    found = comparisons(analysis, plan)
    alpha = one_sided_alpha(analysis, plan)
    if analysis.method == "bootstrap":
        checks = [_bootstrap_check(c, fields, benefit(analysis, plan) is not None) for c in found]
    else:
        assert isinstance(result, PermutationResult)
        checks = [_permutation_check(c, test, alpha) for c, test in zip(found, result.shifted_tests)]
    verdict, reason = _combine(decision.rule, checks)
    if decision.rule == "equivalence":  # TOST ⇔ the 1 − 2α two-sided interval inside the limits
        reason = f"two one-sided tests at α = {alpha:g}: {reason}"
    needed = [c["resamples"] for c in checks if c["verdict"] == UNRESOLVED]
    margin = None
    if decision.rule in ("superiority", "non-inferiority"):
        margin = 0.0 if decision.margin is None else float(decision.margin)
    return {
        "rule": decision.rule,
        "margin": margin,
        "limits": None if decision.limits is None else [float(v) for v in decision.limits],
        "limit": None if decision.limit is None else float(decision.limit),
        "benefit": benefit(analysis, plan),
        "alpha": alpha,  # the level of each one-sided comparison
        "compared": {"quantity": " and ".join(c["quantity"] for c in checks),
                     "value": checks[0]["value"] if len(checks) == 1 else [c["value"] for c in checks],
                     "monte_carlo": [c["monte_carlo"] for c in checks]},
        "verdict": verdict,
        "reason": reason,
        "resamples_to_resolve": None if verdict != UNRESOLVED or None in needed or not needed else max(needed),
    }


def _combine(rule: str, checks: list[dict[str, Any]]) -> tuple[str, str]:
    """All comparisons met: met; one clearly not met: not met; else unresolved."""
    verdicts = [c["verdict"] for c in checks]
    reasons = "; ".join(c["reason"] for c in checks)
    if NOT_MET in verdicts:
        return NOT_MET, reasons
    if UNRESOLVED in verdicts:
        return UNRESOLVED, reasons
    return MET, reasons


def _check(verdict: str, quantity: str, value: Any, reason: str, monte_carlo: Any = None,
           resamples: int | None = None) -> dict[str, Any]:
    return {"verdict": verdict, "quantity": quantity, "value": value, "reason": reason,
            "monte_carlo": monte_carlo, "resamples": resamples}


def _bootstrap_check(c: Comparison, fields: MethodFields, one_sided: bool) -> dict[str, Any]:
    interval = fields.intervals[0]  # the pre-specified interval
    end = "lower" if c.side == ABOVE else "upper"
    level = f"{interval['level'] * 100:g}%"
    name = _NAMES.get(interval["method"], interval["method"])
    quantity = (f"{level} {end} bound ({name})" if one_sided else f"{end} end of the {level} {name} interval")
    value = interval.get(end)
    sign = ">" if c.side == ABOVE else "<"
    not_beyond = "≤" if c.side == ABOVE else "≥"
    if value is None or not math.isfinite(value):
        return _check(UNRESOLVED, quantity, None, f"the {quantity} could not be formed"
                      + (f" ({interval['note']})" if interval.get("note") else ""))
    beyond = value > c.threshold if c.side == ABOVE else value < c.threshold
    said = f"{quantity} {_num(value)} {sign if beyond else not_beyond} {c.what} {_num(c.threshold)}"
    band = (interval.get("monte_carlo") or {}).get(end)
    if band is not None and band[0] is not None and band[1] is not None and band[0] <= c.threshold <= band[1]:
        reach = abs((band[0] if c.threshold <= value else band[1]) - value)
        distance = abs(value - c.threshold)
        needed = None if distance == 0 else math.ceil((fields.resamples or 0) * (reach / distance) ** 2)
        return _check(UNRESOLVED, quantity, value, f"{said}, but its Monte Carlo band {_num(band[0])} to "
                      f"{_num(band[1])} holds the {c.what}", [band[0], band[1]], needed)
    return _check(MET if beyond else NOT_MET, quantity, value, said, None if band is None else [band[0], band[1]])


def _permutation_check(c: Comparison, test: Any, alpha: float) -> dict[str, Any]:
    p = test.p_greater if c.side == ABOVE else test.p_less
    count = test.count_greater if c.side == ABOVE else test.count_less
    null = f"δ {'≤' if c.side == ABOVE else '≥'} {_num(c.threshold)}"
    quantity = f"one-sided p-value at the shifted null {null} ({c.what})"
    said = f"p = {_num(p)} {'≤' if p <= alpha else '>'} α = {_num(alpha)} for H0: {null}"
    verdict = MET if p <= alpha else NOT_MET
    if test.exact:
        return _check(verdict, quantity, _f(p), said + " (exact)")
    low, high = clopper_pearson(int(count), int(test.total))
    if low <= alpha <= high:
        needed = None if p == alpha else math.ceil(Z_P_INTERVAL ** 2 * p * (1.0 - p) / (p - alpha) ** 2)
        return _check(UNRESOLVED, quantity, _f(p), f"{said}, but its {P_INTERVAL_LEVEL * 100:g}% Monte Carlo "
                      f"interval {_num(low)} to {_num(high)} holds α", [low, high], needed)
    return _check(verdict, quantity, _f(p), said, [low, high])


def _num(value: float) -> str:
    return f"{value:.6g}"
