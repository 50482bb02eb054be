"""Pre-specified decision rules (README: Decision rules): what each rule compares, and the plan
rules that make a rule readable before any data are read.

A rule is a list of one-sided comparisons, each "the effect is above T" or "the effect is below T":

    superiority, non-inferiority   above margin (benefit greater) or below margin (benefit less)
    above-limit / below-limit      above limit / below limit
    equivalence                    above low and below high (two one-sided tests)

A bootstrap analysis reads its pre-specified interval: "above T" is met when the lower end is above
T, "below T" when the upper end is below T. The end of a two-sided interval at level c is a
one-sided bound at (1 + c)/2, so each comparison is at α = (1 − c)/2; a one-sided bound at c
(`alternative: greater | less`) is at α = 1 − c. For equivalence the two-sided interval at c is the
1 − 2α interval of two one-sided tests at α = (1 − c)/2 (TOST ⇔ interval inclusion).

A permutation analysis tests at the shifted null: "above T" is the test of x − T against y with
p_greater ≤ α (H0: δ ≤ T), "below T" the same with p_less ≤ α (H0: δ ≥ T), on the arrangements of
the shift interval; α as for the bootstrap (1 − confidence when the analysis is one-sided, half of
it when two-sided).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from planrunner.plan.permrules import SHIFT_STATISTICS
from planrunner.plan.problems import Problem
from planrunner.plan.schema import Plan

ABOVE, BELOW = "above", "below"


@dataclass(frozen=True)
class Comparison:
    """One one-sided comparison of a rule: the effect must be ``side`` (above/below) ``threshold``."""

    side: str
    threshold: float
    what: str  # "margin", "limit", "lower limit", "upper limit"


def benefit(analysis: Any, plan: Plan) -> str | None:
    """The direction of benefit: the analysis's one-sided alternative (greater: larger is better),
    None for a two-sided analysis. A bootstrap never inherits `defaults.alternative`."""
    own = getattr(analysis, "alternative", None)
    if own is None and analysis.method == "permutation":
        own = plan.defaults.alternative
    return own if own in ("greater", "less") else None


def comparisons(analysis: Any, plan: Plan) -> tuple[Comparison, ...]:
    """The rule's comparisons in the order they are reported (empty without a decision, or when the
    rule cannot be read: `decision_problems` says why)."""
    decision = getattr(analysis, "decision", None)
    if decision is None:
        return ()
    rule = decision.rule
    if rule in ("superiority", "non-inferiority"):
        side = {"greater": ABOVE, "less": BELOW}.get(benefit(analysis, plan) or "")
        margin = 0.0 if decision.margin is None else float(decision.margin)
        return () if side is None else (Comparison(side, margin, "margin"),)
    if rule == "above-limit":
        return (Comparison(ABOVE, float(decision.limit), "limit"),)
    if rule == "below-limit":
        return (Comparison(BELOW, float(decision.limit), "limit"),)
    low, high = decision.limits
    return (Comparison(ABOVE, float(low), "lower limit"), Comparison(BELOW, float(high), "upper limit"))


def one_sided_alpha(analysis: Any, plan: Plan) -> float:
    """The level of each one-sided comparison: 1 − confidence for a one-sided analysis, half of it
    for a two-sided one (the end of a two-sided interval)."""
    confidence = analysis.confidence or plan.defaults.confidence
    alpha = 1.0 - confidence
    return round(alpha if benefit(analysis, plan) is not None else alpha / 2.0, 12)


def null_shifts(analysis: Any, plan: Plan) -> tuple[float, ...]:
    """The shifted nulls a permutation analysis's decision tests (none for other methods)."""
    if analysis.method != "permutation":
        return ()
    return tuple(c.threshold for c in comparisons(analysis, plan))


def decision_problems(plan: Plan) -> list[Problem]:
    """Every decision rule that cannot be read from its analysis, with the fix."""
    out: list[Problem] = []
    for i, a in enumerate(plan.analyses):
        decision = getattr(a, "decision", None)
        if decision is None:
            continue
        at = ("analyses", i, "decision")
        rule = decision.rule
        if a.method == "jackknife":
            out.append(Problem(at, "a jackknife gives no interval or p-value for a decision to read",
                               "move the decision to a bootstrap or permutation analysis"))
            continue
        side = benefit(a, plan)
        if rule in ("superiority", "non-inferiority") and side is None:
            out.append(Problem(at + ("rule",), f"{rule} needs the direction of benefit, and the analysis is "
                               "two-sided", "add alternative: greater (larger values are better) or less "
                               "(smaller are better) to the analysis, or use above-limit / below-limit"))
        if rule == "equivalence" and side is not None:
            out.append(Problem(at + ("rule",), f"equivalence reads both ends of a two-sided interval, and the "
                               f"analysis is one-sided (alternative: {side})",
                               "remove alternative: the two-sided interval at confidence c gives two one-sided "
                               "tests at (1 − c)/2 (e.g. confidence: 0.90 for tests at 0.05)"))
        if (rule, side) in (("below-limit", "greater"), ("above-limit", "less")):
            end = "an upper end" if rule == "below-limit" else "a lower end"
            out.append(Problem(at + ("rule",), f"{rule} reads {end}, and alternative: {side} gives only the "
                               "other bound", "give the analysis the other alternative, or make it two-sided"))
        if a.method == "bootstrap" and "intervals" not in a.model_fields_set:
            out.append(Problem(at, "a decision reads the pre-specified interval, so the analysis lists its "
                               "intervals", "add intervals: [METHOD, ...]; the first one listed is read"))
        if a.method == "permutation" and (a.statistic not in SHIFT_STATISTICS or a.groups is None
                                          or len(a.groups.compare) != 2 or a.pairs is not None
                                          or a.clusters is not None or a.strata is not None):
            out.append(Problem(at, "a permutation decision tests at a shifted null, which needs a two-group "
                               "test of location without strata, pairs or clusters",
                               f"use one of {', '.join(SHIFT_STATISTICS)} on two plain groups, or decide on a "
                               "bootstrap analysis"))
    return out
