"""Plan rules for permutation analyses and max-T families (called from `planrunner.plan.load.cross_check`).

The design decides the scheme: groups → labels shuffled (within strata); pairs → sign-flip within
pairs; clusters → cluster labels shuffled; predictor without groups → outcome shuffled against the
predictor; covariates → Freedman–Lane or ter Braak (``covariate_permutation``), residuals permuted
over all rows, within strata or as whole clusters' blocks. A combination without a valid scheme is
refused here, before any data are read (what only the data show, e.g. unequal cluster sizes, the
engine refuses; ``check`` runs that refusal too).
"""

from __future__ import annotations

from typing import Any

from planrunner.engines.association import TER_BRAAK, TER_BRAAK_NOT_EXACT
from planrunner.engines.statistics import Statistic
from planrunner.engines.teststats import K_GROUP, PAIRED_ONLY
from planrunner.plan.problems import Problem

SHIFT_STATISTICS = ("mean_difference", "median_difference", "rank_sum", "t_pooled", "t_welch")


def statistic_checks(at: tuple, a: Any) -> list[Problem]:
    """Rules of the test statistics that hold for every method."""

    if a.statistic in PAIRED_ONLY and a.pairs is None:
        return [Problem(at + ("statistic",), f"'{a.statistic}' is a statistic of pairs but the analysis "
                        "declares no pairs", "add pairs: COLUMN (the column naming each pair)")]
    return []


def permutation_checks(at: tuple, a: Any, statistic: Statistic) -> list[Problem]:
    out: list = []
    if statistic.samples == 1 and statistic.columns == 1:
        out.append(Problem(at + ("statistic",), f"'{a.statistic}' describes one sample; a permutation test "
                           "compares groups, pairs, or a predictor with the outcome",
                           "use a two-group statistic such as mean_difference (with pairs: for a paired "
                           "design), or a two-column statistic such as correlation"))
    if a.pairs is not None:
        if a.strata is not None or a.clusters is not None:
            out.append(Problem(at + ("pairs",), "pairs cannot be combined with strata or clusters",
                               "each pair is its own stratum; remove strata/clusters"))
        if statistic.samples != 2:
            out.append(Problem(at + ("pairs",), "pairs need a two-group statistic (first minus second)",
                               "use mean_difference or signed_rank"))
    residuals = a.covariates is not None  # Freedman–Lane or ter Braak: residuals permuted
    if a.clusters is not None:
        if a.strata is not None:
            out.append(Problem(at + ("clusters",), "clusters within strata are not supported by the permutation test",
                               "remove strata, or analyse each stratum separately"))
        if (statistic.samples != 2 or statistic.columns != 1) and not residuals:
            out.append(Problem(at + ("clusters",), "clusters need a two-group statistic of one column",
                               "use e.g. mean_difference"))
    if statistic.columns == 2 and a.strata is not None and statistic.outcome != "censored" and not residuals:
        out.append(Problem(at + ("strata",), "an association test shuffles the outcome over all rows; "
                           "shuffling within strata is not supported",
                           "remove strata, or adjust for numeric covariates with Freedman–Lane (statistic: slope)"))
    out += _covariate_permutation_checks(at, a)
    if a.statistic == "adjusted_mean_difference":
        if a.pairs is not None:
            out.append(Problem(at + ("pairs",), "the residual permutation of adjusted_mean_difference permutes "
                               "residuals over rows, strata or clusters; pairs are not supported",
                               "remove pairs, or bootstrap the statistic"))
        if a.intervals:
            out.append(Problem(at + ("intervals",), "the shift interval inverts a test of labels, not of an "
                               "adjusted difference", "remove intervals, or bootstrap the statistic"))
    elif a.covariates is not None:
        if a.groups is not None:
            out.append(Problem(at + ("covariates",), "covariates with a group comparison would need a naive shuffle "
                               "of the labels that ignores them, which is not a valid test; it is refused",
                               "use statistic: adjusted_mean_difference (Freedman–Lane residual "
                               "permutation of the group coefficient)"))
        elif a.statistic != "slope":
            out.append(Problem(at + ("covariates",), f"with covariates the test is Freedman–Lane on the partial "
                               f"slope; '{a.statistic}' cannot be adjusted by shuffling",
                               "use statistic: slope"))
        if a.pairs is not None:
            out.append(Problem(at + ("covariates",), "covariates cannot be combined with pairs",
                               "remove pairs (residuals are permuted over rows, strata or whole clusters)"))
    if a.statistic in K_GROUP and a.alternative not in (None, "greater"):
        out.append(Problem(at + ("alternative",), f"'{a.statistic}' is large when groups differ; its test is "
                           "one-sided by construction", "remove alternative, or write alternative: greater"))
    if a.statistic == "risk_ratio" and a.two_sided == "absolute":
        out.append(Problem(at + ("two_sided",), "a ratio has no centre for the absolute two-sided rule",
                           "use two_sided: doubled, or risk_difference"))
    if a.intervals is not None:
        if a.statistic not in SHIFT_STATISTICS or a.pairs is not None or a.clusters is not None or a.strata is not None:
            out.append(Problem(at + ("intervals",), "the shift interval inverts a two-group test of location "
                               "without strata, pairs or clusters",
                               f"use one of {', '.join(SHIFT_STATISTICS)} on two plain groups"))
    return out


def _covariate_permutation_checks(at: tuple, a: Any) -> list[Problem]:
    """``covariate_permutation`` needs covariates; ter Braak has no exact null (engines/association.py)."""
    method = getattr(a, "covariate_permutation", None)
    if method is None:
        return []
    if a.covariates is None:
        return [Problem(at + ("covariate_permutation",), "covariate_permutation chooses whose residuals a test "
                        "with covariates permutes, but the analysis declares no covariates",
                        "add covariates: [..], or remove covariate_permutation")]
    if method == TER_BRAAK and a.exact == "always":
        return [Problem(at + ("exact",), *TER_BRAAK_NOT_EXACT)]
    return []


def max_t_checks(at: tuple, members: list) -> list[Problem]:
    """Westfall–Young max-T needs the same permutations for every endpoint: one dataset, one design."""

    first = members[0]
    out: list = []

    def design(a: Any) -> tuple:
        groups = None if a.groups is None else (a.groups.by, tuple(a.groups.compare))
        return (a.data, groups, a.strata, a.pairs, a.clusters, a.predictor, tuple(a.covariates or ()))

    for a in members:
        if a.method != "permutation":
            out.append(Problem(at + ("method",), f"max-t adjusts permutation tests; '{a.id}' is a {a.method}",
                               "use another method for this family, or make every member a permutation test"))
            return out
    for a in members[1:]:
        if design(a) != design(first):
            out.append(Problem(at + ("family",), f"max-t needs one dataset and one design; '{a.id}' differs from "
                               f"'{first.id}' in data, groups, strata, pairs, clusters or predictor",
                               "only the outcome and the statistic may differ between members"))
        if (a.resamples, a.exact) != (first.resamples, first.exact):
            out.append(Problem(at + ("family",), f"max-t uses one set of permutations; '{a.id}' asks for other "
                               f"resamples or exact settings than '{first.id}'", "give every member the same"))
    if first.pairs is not None or first.clusters is not None or first.covariates is not None or first.groups is None:
        out.append(Problem(at + ("family",), "max-t is computed for label shuffles of groups (within strata)",
                           "use holm or another method for paired, cluster or association tests"))
    return out
