"""Plan rules of the resampling design (bootstrap and jackknife): which schemes, statistics and
intervals go together. Called from `planrunner.plan.load.cross_check` for every analysis; returns problems
with the plan path so that they are reported as FILE:LINE:COL like every other plan error."""

from __future__ import annotations

from typing import Any

from planrunner.engines.statistics import Statistic
from planrunner.plan.problems import Problem
from planrunner.plan.roles import planned_intervals


def check_resampling_design(at: tuple, a: Any, statistic: Statistic) -> list[Problem]:
    out: list[Problem] = []
    if a.pairs is not None and a.method == "bootstrap":
        if statistic.samples != 2 or statistic.columns != 1:
            out.append(Problem(at + ("pairs",), f"pairs need a two-group statistic of one column; "
                               f"'{a.statistic}' is not", "use e.g. mean_difference or median_difference"))
        if a.clusters is not None:
            out.append(Problem(at + ("clusters",), "pairs and clusters cannot be combined",
                               "declare the unit that is resampled: pairs or clusters"))
    if a.method != "bootstrap":
        return out
    explicit = "intervals" in a.model_fields_set
    intervals = list(planned_intervals(a))

    def refuse_interval(name: str, why: str, hint: str) -> None:
        if name in intervals and (explicit or name != "bca"):
            out.append(Problem(at + ("intervals", intervals.index(name)), f"{name} is refused: {why}", hint))

    # time order
    if (a.order is None) != (a.blocks is None):
        if a.order is None:
            out.append(Problem(at + ("blocks",), "blocks need the time order of the rows",
                               "add order: COLUMN"))
        else:
            out.append(Problem(at + ("order",), "time-ordered rows need a block scheme",
                               "add blocks: {scheme: moving, length: L} (or circular, stationary)"))
    if a.order is not None:
        for key in ("strata", "clusters", "pairs"):
            if getattr(a, key) is not None:
                out.append(Problem(at + (key,), f"{key} cannot be combined with order (block resampling)",
                                   "remove one of the two keys"))
        refuse_interval("bca", "the iid jackknife acceleration ignores the time dependence",
                        "use percentile, basic or normal")
        refuse_interval("studentized", "a per-resample standard error would assume independent rows",
                        "use percentile, basic or normal")
    # parametric
    if a.parametric is not None:
        for key in ("strata", "clusters", "pairs", "order"):
            if getattr(a, key) is not None:
                out.append(Problem(at + (key,), f"{key} cannot be combined with parametric",
                                   "remove one of the two keys"))
        if statistic.columns != 1 and a.parametric != "normal":
            out.append(Problem(at + ("parametric",), f"the {a.parametric} model describes one column",
                               "use parametric: normal (bivariate) for a statistic of two columns"))
        if a.parametric == "binomial" and a.trials is None:
            out.append(Problem(at + ("parametric",), "the binomial model needs the number of trials",
                               "add trials: N (trials per observation)"))
        if a.exhaustive:
            out.append(Problem(at + ("exhaustive",), "exhaustive enumeration is for the nonparametric bootstrap",
                               "remove exhaustive or parametric"))
        refuse_interval("bca", "the parametric bootstrap has no nonparametric jackknife acceleration",
                        "use percentile, basic, normal or studentized")
    if a.trials is not None and a.parametric != "binomial":
        out.append(Problem(at + ("trials",), "trials apply only to parametric: binomial", "remove the key"))
    # exhaustive
    if a.exhaustive:
        for key in ("clusters", "order"):
            if getattr(a, key) is not None:
                out.append(Problem(at + ("exhaustive",), f"exhaustive enumeration cannot be combined with {key}",
                                   "remove exhaustive"))
    # studentized
    if "studentized" in intervals:
        if a.clusters is not None:
            out.append(Problem(at + ("intervals", intervals.index("studentized")),
                               "studentized intervals are not available with clusters",
                               "use percentile, basic, normal or bca"))
        # with pairs only mean-like statistics keep an analytic SE (that of the paired differences)
        has_se = statistic.se is not None and (a.pairs is None or statistic.form == "mean")
        if a.studentized_se == "bootstrap":
            for key in ("clusters", "order", "parametric"):
                if getattr(a, key) is not None:
                    out.append(Problem(at + ("studentized_se",),
                                       f"the nested bootstrap SE cannot be combined with {key}",
                                       "use studentized_se: jackknife"))
            if a.exhaustive:
                out.append(Problem(at + ("studentized_se",),
                                   "the nested bootstrap SE would make exhaustive results random",
                                   "use studentized_se: jackknife or analytic"))
        if a.studentized_se == "model":
            if a.parametric is None:
                out.append(Problem(at + ("studentized_se",),
                                   "studentized_se: model is the parametric model's own standard error",
                                   "declare parametric: MODEL, or use studentized_se: analytic or jackknife"))
            elif statistic.form != "mean" or statistic.columns != 1:
                out.append(Problem(at + ("studentized_se",),
                                   f"the model's standard error is defined for means and differences of means; "
                                   f"'{a.statistic}' is neither", "use studentized_se: analytic or jackknife"))
        if not has_se and a.studentized_se not in ("jackknife", "bootstrap", "model"):
            out.append(Problem(at + ("intervals", intervals.index("studentized")),
                               f"'{a.statistic}' has no analytic standard error for the studentized interval",
                               "declare studentized_se: jackknife (B x n extra evaluations) or bootstrap "
                               "(B x inner_resamples)"))
        if not has_se and a.studentized_se == "analytic":
            out.append(Problem(at + ("studentized_se",), f"'{a.statistic}' has no analytic standard error",
                               "use studentized_se: jackknife"))
    if a.inner_resamples is not None and a.studentized_se != "bootstrap":
        out.append(Problem(at + ("inner_resamples",), "inner_resamples apply only with studentized_se: bootstrap",
                           "remove the key, or declare studentized_se: bootstrap"))
    if "studentized" not in intervals and a.studentized_se is not None:
        out.append(Problem(at + ("studentized_se",), "studentized_se applies only with a studentized interval",
                           "add studentized to intervals, or remove the key"))
    return out
