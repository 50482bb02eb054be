"""Plan rules of estimands, roles and the pre-specified interval (README: Estimands, roles and the
pre-specified interval).

ICH E9(R1) asks every analysis to say which estimand it targets and a sensitivity analysis to target
the same estimand as the primary one. The rules, checked by `check` before any data are read:

* an analysis's `estimand` names an entry of the plan's `estimands`;
* at most one primary analysis per estimand; analyses without an estimand form one group, so a plan
  without estimands has at most one primary analysis. `role` left out means primary, as it always
  has: a plan of one analysis keeps working unchanged, and a plan of several analyses that never
  said which one is primary now gets a located error instead of passing silently;
* a sensitivity analysis names the estimand it probes;
* a bootstrap analysis whose `role: primary` is written out lists its `intervals` (the first one is
  the pre-specified interval, the others are supplementary).

`planned_intervals` is the one place that decides the intervals of a bootstrap analysis that lists
none (compile uses it; the record marks the first as pre-specified).
"""

from __future__ import annotations

from typing import Any

from planrunner.engines.statistics import STATISTICS
from planrunner.plan.problems import Problem, did_you_mean
from planrunner.plan.schema import Plan

# the intervals of a bootstrap analysis whose role is left out and that lists none (unchanged since
# before roles mattered, so old plans give the same numbers); the first one is the pre-specified one
LEGACY_DEFAULT = ("percentile", "bca")


def stated_primary(analysis: Any) -> bool:
    return "role" in analysis.model_fields_set and analysis.role == "primary"


def planned_intervals(analysis: Any) -> tuple[str, ...]:
    """The interval methods a bootstrap analysis computes, the pre-specified one first.

    Listed in the plan: exactly those. Not listed: for dependent (order) or parametric draws only the
    percentile interval (BCa's jackknife acceleration assumes independent rows); with the role left
    out, percentile then BCa (the default before roles mattered); for the other roles one interval
    suited to the statistic: BCa for a smooth statistic (second-order accurate), percentile for a
    non-smooth one (a median or quantile, whose jackknife acceleration is unreliable).
    """
    if "intervals" in analysis.model_fields_set:
        return tuple(analysis.intervals)
    if analysis.order is not None or analysis.parametric is not None:
        return ("percentile",)
    if "role" not in analysis.model_fields_set:
        return LEGACY_DEFAULT
    statistic = STATISTICS.get(analysis.statistic)
    return ("bca",) if statistic is not None and statistic.smooth else ("percentile",)


def _where_role(i: int, analysis: Any) -> tuple:
    """The plan path to point at: the role key when written, else the analysis's id."""
    return ("analyses", i, "role") if "role" in analysis.model_fields_set else ("analyses", i, "id")


def estimand_problems(plan: Plan) -> list[Problem]:
    """Every problem of estimands, roles and pre-specified intervals, with its plan path."""
    out: list[Problem] = []
    names = list(plan.estimands)
    declare = "declare it under estimands: (population, treatment, endpoint, intercurrent_events, summary)"
    first_primary: dict[str | None, int] = {}
    for i, a in enumerate(plan.analyses):
        if a.estimand is not None and a.estimand not in plan.estimands:
            out.append(Problem(("analyses", i, "estimand"), f"no estimand is named '{a.estimand}'",
                               did_you_mean(a.estimand, names) or
                               (f"declared: {', '.join(names)}" if names else declare)))
        if a.role == "sensitivity" and a.estimand is None:
            out.append(Problem(("analyses", i, "role"), "a sensitivity analysis names the estimand it probes",
                               "add estimand: NAME, the estimand of the primary analysis it tests"
                               + ("" if names else f"; {declare}")))
        if a.role == "primary":
            if a.estimand in first_primary:
                out.append(_second_primary(plan, i, a, first_primary[a.estimand]))
            else:
                first_primary[a.estimand] = i
        if a.method == "bootstrap" and stated_primary(a) and "intervals" not in a.model_fields_set:
            out.append(Problem(("analyses", i, "role"), "a primary bootstrap analysis lists its intervals; "
                               "the first one listed is the pre-specified interval",
                               "add intervals: [METHOD, ...], e.g. intervals: [bca] or [bca, percentile] "
                               "(the others are supplementary)"))
    return out


def _second_primary(plan: Plan, i: int, a: Any, first: int) -> Problem:
    other = plan.analyses[first]
    implicit = "" if "role" in a.model_fields_set else " (an analysis without role is primary)"
    if a.estimand is None:
        where = ("a plan without estimands has one primary analysis" if not plan.estimands
                 else "the analyses that name no estimand have one primary analysis")
        return Problem(_where_role(i, a),
                       f"a second primary analysis{implicit}: '{other.id}' (analyses[{first}]) is primary too, "
                       f"and {where}",
                       "give the others role: secondary, sensitivity or supplementary, or declare estimands: "
                       "and give each primary analysis its own estimand: NAME")
    return Problem(_where_role(i, a),
                   f"estimand '{a.estimand}' already has a primary analysis{implicit}: '{other.id}' "
                   f"(analyses[{first}])",
                   "one primary analysis per estimand: give this one role: secondary, sensitivity or "
                   "supplementary, or its own estimand")
