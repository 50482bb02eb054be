"""The true value of an analysis's statistic under a scenario's generating model, where it has a
closed form (README: Simulating the plan before the data, *True values*).

For a column modelled by one family per group (parameters as written, with the group's `by_group`
changes), the population mean and median are

    family        mean                      median
    normal        mean                      mean
    lognormal     exp(meanlog + sdlog²/2)   exp(meanlog)
    gamma         shape · scale             gamma quantile at 1/2 (scipy.stats.gamma.ppf)
    bernoulli     p                         not defined
    binomial      size · p                  not defined
    poisson       mean                      not defined
    exponential   mean                      mean · ln 2
    weibull       scale · Γ(1 + 1/shape)    scale · (ln 2)^(1/shape)

and the statistic's true value follows from them: a difference of the two groups' means or
medians (first minus second, as `groups.compare` orders them), a ratio of means, or the mean of one
group; an analysis without groups on a dataset with groups has the size-weighted mean of the group
means. Anything else is "not defined", with the reason, rather than a guess: covariates, a cluster
effect, pairs or censoring (their marginal distributions depend on how they are drawn), a
rows_where filter or analysis set that reads the outcome or a column with covariates (it truncates
the outcome), a derived outcome, a statistic without a formula here.
"""

from __future__ import annotations

import math
from typing import Any

from planrunner.plan.derived import derivations, needed_by
from planrunner.plan.expr import parse_expression
from planrunner.plan.schema import Plan

MEAN_STATISTICS = {"mean_difference": "difference", "risk_difference": "difference", "ratio_of_means": "ratio",
                   "risk_ratio": "ratio", "mean": "one", "proportion": "one"}
MEDIAN_STATISTICS = {"median_difference": "difference", "median": "one"}


def not_defined(reason: str) -> dict[str, Any]:
    return {"value": None, "reason": reason}


def family_mean(family: str, p: dict[str, float]) -> float | None:
    if family in ("normal", "poisson", "exponential"):
        return p["mean"]
    if family == "lognormal":
        return math.exp(p["meanlog"] + p["sdlog"] ** 2 / 2.0)
    if family == "gamma":
        return p["shape"] * p["scale"]
    if family == "bernoulli":
        return p["p"]
    if family == "binomial":
        return p["size"] * p["p"]
    if family == "weibull":
        return p["scale"] * math.gamma(1.0 + 1.0 / p["shape"])
    return None


def family_median(family: str, p: dict[str, float]) -> float | None:
    if family == "normal":
        return p["mean"]
    if family == "lognormal":
        return math.exp(p["meanlog"])
    if family == "exponential":
        return p["mean"] * math.log(2.0)
    if family == "weibull":
        return p["scale"] * math.log(2.0) ** (1.0 / p["shape"])
    if family == "gamma":
        from scipy import stats
        return float(stats.gamma.ppf(0.5, p["shape"], scale=p["scale"]))
    return None  # a discrete family: a sample median of ties has no single population value


def group_parameters(column: Any, level: str | None) -> dict[str, float]:
    """The column's family parameters in one group: the model's, with the group's changes."""
    written = {k: v for k, v in column.model.model_dump().items() if k != "family" and v is not None}
    return {**written, **(column.by_group.get(level, {}) if level is not None else {})}


def true_value(analysis: Any, plan: Plan, datasets: Any) -> dict[str, Any]:
    """{"value": θ, "formula": how} or {"value": None, "reason": why not}."""
    kind = MEAN_STATISTICS.get(analysis.statistic) or MEDIAN_STATISTICS.get(analysis.statistic)
    if kind is None:
        return not_defined(f"no closed form is used for the statistic {analysis.statistic}")
    model = datasets.get(analysis.data)
    spec = plan.datasets[analysis.data]
    outcome = analysis.outcome
    column = None if model is None else model.columns.get(outcome)
    if column is None:
        return not_defined(f"'{outcome}' has no model in the scenario (it is derived or filled from rows)")
    why = _blocking(analysis, spec, model, column)
    if why is not None:
        return not_defined(why)
    of = family_mean if analysis.statistic in MEAN_STATISTICS else family_median
    what = "mean" if of is family_mean else "median"
    family = column.model.family
    groups = model.rows.groups
    if analysis.groups is not None:
        first, second = analysis.groups.compare[:2] if len(analysis.groups.compare) == 2 else (None, None)
        if first is None or groups is None or groups.column != analysis.groups.by:
            return not_defined("the analysis's groups are not the scenario's groups")
        a, b = of(family, group_parameters(column, first)), of(family, group_parameters(column, second))
        if a is None or b is None:
            return not_defined(f"the {family} family's {what} is not used (discrete)")
        if kind == "ratio":
            return ({"value": a / b, "formula": f"{what} in {first} / {what} in {second} ({family})"}
                    if b != 0 else not_defined(f"the {what} in {second} is 0"))
        return {"value": a - b, "formula": f"{what} in {first} − {what} in {second} ({family})"}
    if kind != "one":
        return not_defined("a two-group statistic without groups")
    levels = list(groups.sizes) if groups is not None else [None]
    values = [of(family, group_parameters(column, level)) for level in levels]
    if any(v is None for v in values):
        return not_defined(f"the {family} family's {what} is not used (discrete)")
    if len(set(values)) == 1:
        return {"value": values[0], "formula": f"{what} ({family})"}
    if what == "median":
        return not_defined("the median of a mixture of groups has no closed form")
    sizes = [groups.sizes[level] for level in levels]
    return {"value": sum(v * n for v, n in zip(values, sizes)) / sum(sizes),
            "formula": f"group-size-weighted mean of the group means ({family})"}


def _blocking(analysis: Any, spec: Any, model: Any, column: Any) -> str | None:
    """Why the outcome's distribution in the analysed rows is not the family's, or None."""
    if column.covariates:
        return "the outcome's model has covariates"
    if column.censoring is not None:
        return "the outcome is censored"
    clusters = model.rows.clusters
    if (column.icc or 0) > 0 or (column.icc is None and clusters is not None and clusters.icc > 0):
        return "the outcome has a cluster effect"
    if model.rows.pairs is not None:
        return "the rows are paired"
    linked = {analysis.outcome} | {name for name, c in model.columns.items() if c.covariates}
    for what, condition in (("rows_where", spec.rows_where),
                            ("set", spec.sets.get(analysis.set) if analysis.set is not None else None)):
        if condition is None:
            continue
        named = parse_expression(condition).columns
        derived = derivations(spec)
        read = set(named) | {c for d in needed_by(spec, named) for c in derived[d].columns}
        touched = sorted(read & linked)
        if touched:
            return f"the dataset's {what} reads {', '.join(touched)} (it truncates the outcome's distribution)"
    return None
