"""The distribution families a scenarios file may give a column: their parameters, the ranges those may
take, the scale on which covariates move them, the values they can produce and the column types that
can hold them. Pure data and small checks; the draws are in `planrunner.simulate.generate`."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Family:
    name: str
    parameters: tuple[str, ...]
    # the parameter covariates move, and how: "identity" adds the linear predictor to it, "log"
    # multiplies it by exp(predictor), "logit" adds the predictor to its log-odds
    location: str
    link: str
    column_types: tuple[str, ...]  # plan column types that can hold its values
    lowest: float  # the smallest value it can produce (an upper end depends on `size` for binomial)
    # how a cluster shares its effect (README: clusters): "icc", an intraclass correlation, or
    # "frailty", the variance of a gamma frailty that multiplies the hazard of every row of the cluster
    cluster_effect: str
    survival: bool  # a positive continuous time that censoring can cut


FAMILIES: dict[str, Family] = {f.name: f for f in (
    Family("normal", ("mean", "sd"), "mean", "identity", ("number",), -math.inf, "icc", False),
    Family("lognormal", ("meanlog", "sdlog"), "meanlog", "identity", ("number",), 0.0, "icc", True),
    Family("gamma", ("shape", "scale"), "scale", "log", ("number",), 0.0, "icc", True),
    Family("bernoulli", ("p",), "p", "logit", ("boolean", "integer", "number"), 0.0, "icc", False),
    Family("binomial", ("size", "p"), "p", "logit", ("integer", "number"), 0.0, "icc", False),
    Family("poisson", ("mean",), "mean", "log", ("integer", "number"), 0.0, "icc", False),
    Family("exponential", ("mean",), "mean", "log", ("number",), 0.0, "frailty", True),
    Family("weibull", ("shape", "scale"), "scale", "log", ("number",), 0.0, "frailty", True),
)}
PARAMETER_NAMES = ("mean", "sd", "meanlog", "sdlog", "shape", "scale", "p", "size")
MAX_BINOMIAL_SIZE = 1_000_000_000

CENSORING_PARAMETERS = {"uniform": ("low", "high"), "exponential": ("rate",)}
# the largest frailty variance (Kendall's tau 10/11): at 20 a tenth of the frailties (shape 1/20) are
# already below 1e-20, which puts their clusters' times far beyond any data's scale
MAX_FRAILTY = 20.0


@dataclass(frozen=True)
class ClusterEffect:
    """What a column's cluster effect is: `kind` "icc" or "frailty" and its value (0: none);
    `missing` when the file gives the column no value of its kind (the checks refuse that)."""

    kind: str
    value: float
    missing: bool = False


def cluster_effect(family: Family, column: Any, clusters: Any) -> ClusterEffect:
    """A column's cluster effect: its own `icc` or `frailty`, else that of rows.clusters (README:
    clusters). A time column (frailty family) with `icc: 0` has none. A column whose kind rows.clusters
    does not give, while it gives the other kind above 0, is `missing`: an icc does not say how strongly
    times share a frailty, nor a frailty how values correlate. Both objects are read by attribute
    (`ColumnModel`, `ClusterRows`), so this stays pure data."""
    kind = family.cluster_effect
    if clusters is None:
        return ClusterEffect(kind, 0.0)
    own = getattr(column, kind)
    if own is not None:
        return ClusterEffect(kind, float(own))
    if kind == "frailty" and column.icc == 0:
        return ClusterEffect(kind, 0.0)
    shared = getattr(clusters, kind)
    if shared is not None:
        return ClusterEffect(kind, float(shared))
    other = getattr(clusters, "icc" if kind == "frailty" else "frailty")
    # rows.clusters gives only the other kind (giving neither is a problem of rows.clusters itself)
    return ClusterEffect(kind, 0.0, missing=other is not None and other != 0)


def highest(family: Family, parameters: dict[str, float]) -> float:
    """The largest value the family can produce with these parameters."""
    if family.name == "bernoulli":
        return 1.0
    if family.name == "binomial":
        return float(parameters.get("size", math.inf))
    return math.inf


def parameter_problem(family: Family, name: str, value: float) -> tuple[str, str | None] | None:
    """(what is wrong, what to do) for one parameter value outside its family's range, else None."""
    if name == "p" and not 0.0 <= value <= 1.0:
        return f"p is a probability and must lie in [0, 1] (got {value:g})", "write a share such as 0.35"
    if name == "size" and (value != int(value) or not 1 <= value <= MAX_BINOMIAL_SIZE):
        return (f"size is the number of trials, a whole number from 1 to {MAX_BINOMIAL_SIZE:,} (got {value:g})",
                "write a whole number such as 10")
    positive = name in ("sd", "sdlog", "shape", "scale") or (name == "mean" and family.name != "normal")
    if positive and not value > 0:
        return f"{name} must be more than 0 for a {family.name} column (got {value:g})", None
    return None


def association_problem(key: str, value: float) -> str | None:
    """What is wrong with a cluster effect's value (`icc` or `frailty`), else None."""
    if key == "icc" and not 0 <= value < 1:
        return f"icc must lie in [0, 1) (got {value:g})"
    if key == "frailty" and not 0 <= value <= MAX_FRAILTY:
        return f"frailty (the gamma frailty's variance) must lie in [0, {MAX_FRAILTY:g}] (got {value:g})"
    return None


def censoring_problem(family: str, parameters: dict[str, float]) -> tuple[str, str, str | None] | None:
    """(parameter, what is wrong, what to do) for censoring parameters out of range, else None."""
    if family == "uniform":
        low, high = parameters.get("low"), parameters.get("high")
        if low is not None and low < 0:
            return "low", f"a censoring time cannot be negative (got {low:g})", "write low: 0 or more"
        if low is not None and high is not None and not low < high:
            return "high", f"high ({high:g}) must be above low ({low:g})", None
    rate = parameters.get("rate")
    if family == "exponential" and rate is not None and not rate > 0:
        return "rate", f"rate must be more than 0 (got {rate:g})", "the censoring times' mean is 1/rate"
    return None
