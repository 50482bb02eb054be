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
means. A rows_where filter or set that keeps the outcome on one side of a number (`y < 1440`) truncates
a continuous family to (low, high): its median is the quantile at F(low) + (F(high) − F(low))/2 and its
mean (E[X; X ≤ high] − E[X; X ≤ low]) / (F(high) − F(low)), with the partial expectations in closed
form (normal: μΦ(z) − σφ(z); lognormal: e^(μ+σ²/2)Φ((ln x − μ − σ²)/σ); gamma and exponential:
kθ·P(k + 1, x/θ); Weibull: λΓ(1 + 1/k)·P(1 + 1/k, (x/λ)^k), P the regularised lower incomplete
gamma function). Pairs and cluster effects leave these values as they are: every statistic here is a
mean or median of each group's rows, which depends on the rows' own laws only, not on their joint law,
and the generator keeps each row's law (paired rows: correlated normal scores mapped through the
family's own quantile function; clusters: normal and lognormal a random intercept that keeps the total
sd, bernoulli a beta-distributed cluster probability with mean p, poisson a gamma cluster rate with mean
1, so each row is negative binomial with the same mean; its median is discrete, so not used; gamma a
shared gamma part, each row still Gamma(shape, scale); binomial a beta cluster probability, each row
beta-binomial with mean size·p). A gamma frailty of variance θ on an exponential or Weibull time changes
its law: its survival is (1 + θ(t/scale)^shape)^(−1/θ), Burr XII (Lomax for an exponential), whose
median, mean (finite for θ < shape) and partial means have closed forms (`frailty_law`).
Anything else is "not defined", with the reason, rather than a guess: covariates or censoring (their
marginal distributions depend on how they are drawn), any other filter or set that reads the outcome or
a column with covariates, a derived outcome, a statistic without a formula here.
"""

from __future__ import annotations

import math
import re
from typing import Any

from planrunner.plan.derived import derivations, needed_by
from planrunner.plan.expr import parse_expression
from planrunner.plan.schema import Plan
from planrunner.simulate.families import FAMILIES, ClusterEffect, cluster_effect

MEAN_STATISTICS = {"mean_difference": "difference", "risk_difference": "difference", "ratio_of_means": "ratio",
                   "risk_ratio": "ratio", "mean": "one", "proportion": "one"}
MEDIAN_STATISTICS = {"median_difference": "difference", "median": "one"}


def not_defined(reason: str) -> dict[str, Any]:
    return {"value": None, "reason": reason}


def frailty_law(family: str, p: dict[str, float]) -> tuple[float, float, float]:
    """(c, d, λ) of the Burr XII law of an exponential or Weibull time under a gamma frailty of variance
    θ = p["frailty"]: S(t) = (1 + θ·(t/scale)^shape)^(−1/θ) = (1 + (t/λ)^c)^(−d) with c = shape,
    d = 1/θ, λ = scale·θ^(−1/shape) (an exponential: shape 1, scale its mean; the Lomax law)."""
    shape, scale = (1.0, p["mean"]) if family == "exponential" else (p["shape"], p["scale"])
    theta = p["frailty"]
    return shape, 1.0 / theta, scale * theta ** (-1.0 / shape)


def _burr_partial_mean(c: float, d: float, lam: float, x: float) -> float:
    """E[T · 1(T ≤ x)] of Burr XII(c, d, λ): λ·d·B(1 + 1/c, d − 1/c)·I_w(1 + 1/c, d − 1/c) with
    w = y/(1 + y), y = (x/λ)^c (substituting y, then w, in ∫ t f(t) dt); needs d > 1/c."""
    from scipy import special

    a, b = 1.0 + 1.0 / c, d - 1.0 / c
    whole = lam * d * float(special.beta(a, b))
    if x == math.inf:
        return whole
    y = (x / lam) ** c
    return whole * float(special.betainc(a, b, y / (1.0 + y)))


def family_mean(family: str, p: dict[str, float]) -> float | None:
    if p.get("frailty", 0.0) > 0:  # the marginal mean under a gamma frailty (infinite unless θ < shape)
        c, d, lam = frailty_law(family, p)
        return _burr_partial_mean(c, d, lam, math.inf) if d * c > 1 else math.inf
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
    if p.get("frailty", 0.0) > 0:  # S(m) = 1/2 under a gamma frailty
        c, d, lam = frailty_law(family, p)
        return lam * (2.0 ** (1.0 / d) - 1.0) ** (1.0 / c)
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


CONTINUOUS = ("normal", "lognormal", "gamma", "exponential", "weibull")
# a row filter a closed form can follow: the outcome against one number ("y < 1440")
_BOUND = re.compile(r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*(<=|>=|<|>)\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*$")


def _law(family: str, p: dict[str, float]) -> Any:
    from scipy import stats

    if p.get("frailty", 0.0) > 0:
        c, d, lam = frailty_law(family, p)
        return stats.burr12(c, d, scale=lam)
    return {"normal": lambda: stats.norm(p["mean"], p["sd"]),
            "lognormal": lambda: stats.lognorm(p["sdlog"], scale=math.exp(p["meanlog"])),
            "gamma": lambda: stats.gamma(p["shape"], scale=p["scale"]),
            "exponential": lambda: stats.expon(scale=p["mean"]),
            "weibull": lambda: stats.weibull_min(p["shape"], scale=p["scale"])}[family]()


def _partial_mean(family: str, p: dict[str, float], x: float) -> float:
    """E[X · 1(X ≤ x)] in closed form (x may be ±inf)."""
    from scipy import special, stats

    if x == -math.inf or (x <= 0 and family != "normal"):
        return 0.0
    if p.get("frailty", 0.0) > 0:
        c, d, lam = frailty_law(family, p)
        return _burr_partial_mean(c, d, lam, x)
    if family == "normal":
        z = (x - p["mean"]) / p["sd"]
        return p["mean"] * float(stats.norm.cdf(z)) - p["sd"] * float(stats.norm.pdf(z))
    if family == "lognormal":
        mu, sigma = p["meanlog"], p["sdlog"]
        return math.exp(mu + sigma ** 2 / 2.0) * float(stats.norm.cdf((math.log(x) - mu - sigma ** 2) / sigma))
    if family in ("gamma", "exponential"):
        shape, scale = (p["shape"], p["scale"]) if family == "gamma" else (1.0, p["mean"])
        return shape * scale * float(special.gammainc(shape + 1.0, x / scale))
    shape, scale = p["shape"], p["scale"]  # weibull
    return scale * math.gamma(1.0 + 1.0 / shape) * float(special.gammainc(1.0 + 1.0 / shape, (x / scale) ** shape))


def truncated(of: str, family: str, p: dict[str, float], low: float, high: float) -> float | None:
    """The mean or median of the family's law restricted to (low, high): the median is the quantile at
    F(low) + (F(high) − F(low))/2, the mean (E[X; X ≤ high] − E[X; X ≤ low]) / (F(high) − F(low))."""
    if family not in CONTINUOUS:
        return None
    if of == "mean" and p.get("frailty", 0.0) > 0:
        c, d, _ = frailty_law(family, p)
        if not c * d > 1:
            return None  # the partial mean's beta integral needs θ < shape
    law = _law(family, p)
    f_low, f_high = float(law.cdf(low)), float(law.cdf(high))
    if not f_high > f_low:
        return None
    if of == "median":
        return float(law.ppf(f_low + (f_high - f_low) / 2.0))
    return (_partial_mean(family, p, high) - _partial_mean(family, p, low)) / (f_high - f_low)


def outcome_bounds(condition: str, outcome: str) -> tuple[float, float] | None:
    """(low, high) when a filter keeps the rows whose outcome is on one side of a number, else None."""
    found = _BOUND.match(condition)
    if found is None or found.group(1) != outcome:
        return None
    value = float(found.group(3))
    return (-math.inf, value) if found.group(2) in ("<", "<=") else (value, math.inf)


def group_parameters(column: Any, level: str | None, frailty: float = 0.0) -> dict[str, float]:
    """The column's family parameters in one group: the model's, with the group's changes (and, for a
    time under a gamma frailty, its variance as "frailty")."""
    written = {k: v for k, v in column.model.model_dump().items() if k != "family" and v is not None}
    extra = {"frailty": frailty} if frailty > 0 else {}
    return {**written, **(column.by_group.get(level, {}) if level is not None else {}), **extra}


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
    conditions = [c for c in (spec.rows_where, spec.sets.get(analysis.set) if analysis.set is not None else None)
                  if c is not None]
    bounds = [b for b in (outcome_bounds(c, outcome) for c in conditions) if b is not None]
    why = _blocking(analysis, spec, model, column)
    if why is not None:
        return not_defined(why)
    what = "mean" if analysis.statistic in MEAN_STATISTICS else "median"
    family = column.model.family
    low, high = max([-math.inf, *(b[0] for b in bounds)]), min([math.inf, *(b[1] for b in bounds)])
    if bounds and family not in CONTINUOUS:
        return not_defined(f"a filter on the outcome of a {family} column")

    summary = what
    effect = _effect(model, column)
    frailty = effect.value if effect.kind == "frailty" else 0.0

    def of(family: str, p: dict[str, float]) -> float | None:
        if not bounds:
            return family_mean(family, p) if summary == "mean" else family_median(family, p)
        return truncated(summary, family, p, low, high)

    def params(level: str | None) -> dict[str, float]:
        return group_parameters(column, level, frailty)

    if frailty > 0 and summary == "mean":
        levels = [None] if model.rows.groups is None else list(model.rows.groups.sizes)
        shapes = {params(level).get("shape", 1.0) for level in levels}
        if frailty >= min(shapes):
            return not_defined(f"under a gamma frailty of variance {frailty:g} the mean of a {family} time is "
                               f"finite only when the variance is below its shape ({min(shapes):g}), and so is "
                               "the closed form of a filtered mean")

    if bounds:
        what = f"{what} of the rows kept ({' and '.join(c for c in conditions if outcome_bounds(c, outcome))})"
    note = design_note(model, column)
    if note and family == "poisson" and summary == "median":
        return not_defined("the median of a clustered poisson column (negative binomial rows) is not used (discrete)")
    groups = model.rows.groups
    if analysis.groups is not None:
        first, second = analysis.groups.compare[:2] if len(analysis.groups.compare) == 2 else (None, None)
        if first is None or groups is None or groups.column != analysis.groups.by:
            return not_defined("the analysis's groups are not the scenario's groups")
        a, b = of(family, params(first)), of(family, params(second))
        if a is None or b is None:
            return not_defined(f"the {family} family's {what} is not used (discrete)")
        if kind == "ratio":
            return ({"value": a / b, "formula": f"{what} in {first} / {what} in {second} ({family}){note}"}
                    if b != 0 else not_defined(f"the {what} in {second} is 0"))
        return {"value": a - b, "formula": f"{what} in {first} − {what} in {second} ({family}){note}"}
    if kind != "one":
        return not_defined("a two-group statistic without groups")
    levels = list(groups.sizes) if groups is not None else [None]
    values = [of(family, params(level)) for level in levels]
    if any(v is None for v in values):
        return not_defined(f"the {family} family's {what} is not used (discrete)")
    if len(set(values)) == 1:
        return {"value": values[0], "formula": f"{what} ({family}){note}"}
    if what != "mean":
        return not_defined("the median of a mixture of groups (or a filtered mean) has no closed form here")
    sizes = [groups.sizes[level] for level in levels]
    return {"value": sum(v * n for v, n in zip(values, sizes)) / sum(sizes),
            "formula": f"group-size-weighted mean of the group means ({family}){note}"}


# How a cluster effect leaves each row's own law (simulate/generate.py, `_clustered`, `_clustered_apart`):
# the statistics here depend on the rows' laws only (a mean or median of each group, not of pairs or clusters)
CLUSTERED_ROW_LAW = {"normal": "a random intercept that keeps the total sd: each row the family's law",
                     "lognormal": "a random intercept on the log scale that keeps the total sdlog: each row the "
                                  "family's law",
                     "gamma": "a shared gamma part of shape icc·shape plus the row's own: each row the family's "
                              "law",
                     "bernoulli": "a beta-distributed cluster probability with mean p: each row Bernoulli(p)",
                     "binomial": "a beta-distributed cluster probability with mean p: each row beta-binomial with "
                                 "mean size·p",
                     "poisson": "a gamma cluster rate with mean 1: each row negative binomial with the same mean",
                     "exponential": "a gamma frailty of mean 1: each row's survival (1 + θ·t/mean)^(−1/θ) (Lomax)",
                     "weibull": "a gamma frailty of mean 1: each row's survival (1 + θ·(t/scale)^shape)^(−1/θ) "
                                "(Burr XII)"}


def _effect(model: Any, column: Any) -> ClusterEffect:
    return cluster_effect(FAMILIES[column.model.family], column, model.rows.clusters)


def design_note(model: Any, column: Any) -> str:
    """Why a pairing or cluster effect leaves the true value as for independent rows, or how a frailty
    changes it ("" without one)."""
    if model.rows.pairs is not None and model.rows.pairs.correlation != 0:
        return ("; pairs: correlated normal scores through the family's own quantile function keep each row's "
                "law")
    effect = _effect(model, column)
    if effect.value > 0:
        law = CLUSTERED_ROW_LAW[column.model.family]
        return f"; clusters: {law.replace('θ', f'θ = {effect.value:g}') if effect.kind == 'frailty' else law}"
    return ""


def _blocking(analysis: Any, spec: Any, model: Any, column: Any) -> str | None:
    """Why the outcome's distribution in the analysed rows is not the family's, or None."""
    if column.covariates:
        return "the outcome's model has covariates"
    if column.censoring is not None:
        return "the outcome is censored"
    linked = {analysis.outcome} | {name for name, c in model.columns.items() if c.covariates}
    for what, condition in (("rows_where", spec.rows_where),
                            ("set", spec.sets.get(analysis.set) if analysis.set is not None else None)):
        if condition is None or outcome_bounds(condition, analysis.outcome) is not None:
            continue  # none, or the outcome on one side of a number: the truncated law has a closed form
        named = parse_expression(condition).columns
        derived = derivations(spec)
        read = set(named) | {c for d in needed_by(spec, named) for c in derived[d].columns}
        touched = sorted(read & linked)
        if touched:
            return f"the dataset's {what} reads {', '.join(touched)} (it truncates the outcome's distribution)"
    return None
