"""Plan rules of censored outcomes (Kaplan–Meier statistics and the log-rank test): the event column,
the direction of censoring, and the designs these statistics can honour. Called from
`planrunner.plan.load.cross_check` for every analysis; problems carry their plan path."""

from __future__ import annotations

from typing import Any

from planrunner.engines.statistics import STATISTICS
from planrunner.engines.survival import LEFT_REFUSED
from planrunner.plan.problems import Problem, did_you_mean

EVENT_TYPES = ("integer", "boolean", "number")
CENSORED_STATISTICS = "km_median, km_quantile, survival_at, rmst, km_mean or a two-group form, or logrank"


def censoring_checks(at: tuple, a: Any, columns: dict) -> list[Problem]:
    statistic = STATISTICS.get(a.statistic)
    if statistic is None:
        return []
    out: list[Problem] = []
    if statistic.outcome != "censored":
        for key in ("event", "censoring"):
            if getattr(a, key) is not None:
                out.append(Problem(at + (key,), f"'{a.statistic}' is not a statistic of censored data, so {key} "
                                   "does not apply", f"remove the key, or use {CENSORED_STATISTICS}"))
        return out
    if a.event is None:
        out.append(Problem(at + ("statistic",), f"'{a.statistic}' needs the event column of the censored outcome",
                           "add event: COLUMN (1 = event observed, 0 = censored; for censoring: left, "
                           "1 = detected, 0 = below the reported limit)"))
    elif a.event not in columns:
        out.append(Problem(at + ("event",), f"dataset '{a.data}' declares no column '{a.event}'",
                           did_you_mean(a.event, columns) or f"declared: {', '.join(columns)}"))
    elif columns[a.event].type not in EVENT_TYPES:
        out.append(Problem(at + ("event",), f"column '{a.event}' is of type {columns[a.event].type}, which cannot "
                           "hold 0/1 event indicators", "declare it as integer or boolean"))
    elif a.event in (a.outcome, a.groups.by if a.groups else None, a.strata):
        out.append(Problem(at + ("event",), f"'{a.event}' is already the outcome, groups or strata",
                           "name the column holding 1 (event observed) or 0 (censored)"))
    if a.censoring == "left" and a.statistic in LEFT_REFUSED:
        out.append(Problem(at + ("censoring",), f"'{a.statistic}' reads the curve at a time or up to a horizon, "
                           "which has no meaning on the flipped scale of left-censored values",
                           "use km_median, km_quantile or km_mean (and their two-group forms) or logrank"))
    for key in ("predictor", "pairs", "order", "covariates", "parametric"):
        if getattr(a, key, None) is not None:
            out.append(Problem(at + (key,), f"{key} cannot be combined with a censored outcome ('{a.statistic}')",
                               "remove the key: Kaplan–Meier statistics are resampled by rows, strata or "
                               "clusters"))
    if a.statistic == "logrank" and a.method != "permutation":
        out.append(Problem(at + ("method",), "the log-rank statistic is a test statistic",
                           "use method: permutation, or a Kaplan–Meier statistic such as km_median_difference "
                           "for a bootstrap"))
    if a.method == "permutation" and statistic.samples == 1:
        out.append(Problem(at + ("statistic",), f"'{a.statistic}' describes one group; a permutation test "
                           "compares two", "use logrank, or a two-group form such as km_median_difference"))
    return out
