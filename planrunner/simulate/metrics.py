"""Operating characteristics of one analysis under one scenario, from its simulated data sets
(README: Simulating the plan before the data, *What is reported*).

With R data sets the analysis ran on (failures counted apart, never dropped):

    rejection rate    k / R, k = data sets that rejected the null at α (see `run.rejects`), with the
                      exact 95% Clopper–Pearson interval of the binomial proportion
    coverage          of each interval: the share of data sets whose interval holds the true value θ,
                      with its 95% Clopper–Pearson interval; mean width over the two-sided ones
    bias              mean(θ̂) − θ, Monte Carlo SE sd(θ̂)/√R
    RMSE              sqrt(mean((θ̂ − θ)²)), Monte Carlo SE sd((θ̂ − θ)²) / (2 RMSE √R) (delta method)
    verdicts          the shares of met, not met and unresolved
    warnings          how many data sets gave each warning code

Coverage, bias and RMSE need θ, the estimand's true value under the generating model
(`truth.true_value`); without one they are "not defined", with the reason.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from typing import Any

import numpy as np

from planrunner.engines.pvalues import clopper_pearson
from planrunner.record.canonical import plain_number as _f
from planrunner.simulate.run import AnalysisOutcome, IntervalOutcome

MC_LEVEL = 0.95  # the level of every Monte Carlo interval of a simulated share
SHOW_FAILED = 5  # data-set indices listed per failure reason
VERDICTS = ("met", "not met", "unresolved")


def share(count: int, total: int) -> dict[str, Any]:
    """A share with its exact Clopper–Pearson interval at MC_LEVEL (null without data sets)."""
    if total == 0:
        return {"count": 0, "of": 0, "rate": None, "interval": None}
    low, high = clopper_pearson(count, total, MC_LEVEL)
    return {"count": int(count), "of": int(total), "rate": _f(count / total), "interval": [_f(low), _f(high)]}


def analysis_metrics(outcomes: Sequence[AnalysisOutcome], indices: Sequence[int], alpha: float,
                     truth: dict[str, Any], family: bool) -> dict[str, Any]:
    """Every metric of one analysis under one scenario (``outcomes`` in data-set order, ``indices``
    their data-set numbers); ``truth`` is `truth.true_value`'s entry."""
    ran = [o for o in outcomes if o.failure is None]
    failures: dict[str, list[int]] = {}
    for o, index in zip(outcomes, indices):
        if o.failure is not None:
            failures.setdefault(o.failure, []).append(int(index))
    tested = [o.rejected for o in ran if o.rejected is not None]
    estimates = np.array([o.estimate for o in ran if o.estimate is not None and math.isfinite(o.estimate)],
                         dtype=float)
    theta = truth.get("value")
    out: dict[str, Any] = {
        "datasets": len(outcomes),
        "ran": len(ran),
        "failed": {"count": len(outcomes) - len(ran),
                   "reasons": [{"message": m, "datasets": len(ix), "first": ix[:SHOW_FAILED]}
                               for m, ix in sorted(failures.items(), key=lambda kv: kv[1][0])]},
        "alpha": alpha,
        "rejection": None if not tested else {**share(sum(tested), len(tested)),
                                              "rule": "p-value ≤ α, else the pre-specified interval leaves "
                                                      "out the null value"},
        "rejection_in_family": None,
        "true_value": truth,
        "estimate": _estimate_summary(estimates),
        "bias": None,
        "rmse": None,
        "intervals": _coverage([o.intervals for o in ran], theta),
        "verdicts": _verdicts(ran),
        "warnings": dict(sorted(Counter(code for o in ran for code in set(o.warnings)).items())),
    }
    if family:
        adjusted = [o.adjusted_p_value for o in ran if o.adjusted_p_value is not None]
        out["rejection_in_family"] = None if not adjusted else {
            **share(sum(p <= alpha for p in adjusted), len(adjusted)), "rule": "family-adjusted p-value ≤ α"}
    if theta is not None and estimates.size:
        out["bias"], out["rmse"] = _bias_rmse(estimates, float(theta))
    return out


def _estimate_summary(estimates: np.ndarray) -> dict[str, Any] | None:
    if estimates.size == 0:
        return None
    sd = float(estimates.std(ddof=1)) if estimates.size > 1 else None
    return {"count": int(estimates.size), "mean": _f(estimates.mean()), "sd": _f(sd)}


def _bias_rmse(estimates: np.ndarray, theta: float) -> tuple[dict[str, Any], dict[str, Any]]:
    r = estimates.size
    errors = estimates - theta
    squared = errors ** 2
    rmse = float(np.sqrt(squared.mean()))
    bias_se = float(errors.std(ddof=1) / np.sqrt(r)) if r > 1 else None
    rmse_se = (float(squared.std(ddof=1) / (2.0 * rmse * np.sqrt(r))) if r > 1 and rmse > 0 else None)
    return ({"value": _f(errors.mean()), "monte_carlo_se": _f(bias_se)},
            {"value": _f(rmse), "monte_carlo_se": _f(rmse_se)})


def _coverage(per_dataset: Sequence[tuple[IntervalOutcome, ...]], theta: float | None) -> list[dict[str, Any]]:
    """One entry per interval of the analysis (the pre-specified one first): how often it was formed,
    its mean width (two-sided only), and its coverage of θ."""
    if not per_dataset or not per_dataset[0]:
        return []
    out = []
    for k, first in enumerate(per_dataset[0]):
        found = [d[k] for d in per_dataset if len(d) > k]
        formed = [i for i in found if i.formed]
        widths = [i.upper - i.lower for i in formed
                  if i.side == "two-sided" and i.lower is not None and i.upper is not None]
        entry: dict[str, Any] = {"method": first.method, "level": first.level, "side": first.side,
                                 "prespecified": k == 0, "formed": len(formed), "not_formed": len(found) - len(formed),
                                 "mean_width": _f(float(np.mean(widths))) if widths else None, "coverage": None}
        if theta is not None and formed:
            covered = sum((i.lower is None or i.lower <= theta) and (i.upper is None or theta <= i.upper)
                          for i in formed)
            entry["coverage"] = share(covered, len(formed))
        out.append(entry)
    return out


def _verdicts(ran: Sequence[AnalysisOutcome]) -> dict[str, Any] | None:
    given = [o.verdict for o in ran if o.verdict is not None]
    if not given:
        return None
    return {v: share(given.count(v), len(given)) for v in VERDICTS}
