"""Record adapter of a `BootstrapResult`: estimate, standard error, bias, intervals and their
Monte Carlo error, and the distribution of the replicates."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from planrunner.engines.results import BootstrapResult, Interval, NullTest
from planrunner.record.bands import RULE as MC_INTERVAL_RULE
from planrunner.record.bands import interval_bands
from planrunner.record.canonical import plain_number as _f
from planrunner.record.fields import (
    MethodFields,
    array_sha256,
    distribution_summary,
    jsonable,
    precision_fields,
    support,
)


def bootstrap_fields(result: BootstrapResult, bins: int, *, save_distribution: bool = False) -> MethodFields:
    """The analysis-entry fields of a bootstrap; ``save_distribution`` keeps every replicate."""
    distribution = replicate_distribution(result, bins)
    if save_distribution:
        # every replicate in resample order; its SHA-256 (of little-endian doubles) is `sha256`
        distribution["values"] = [float(v) for v in result.distribution]
        if result.weights is not None:
            distribution["weights"] = [float(v) for v in result.weights]
    null = result.null_test
    return MethodFields(
        estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
        intervals=tuple(_interval(i) for i in result.intervals),
        p_value=None if null is None else _f(null.p_value),
        resamples=int(result.resamples), exact=bool(result.exact), alternative=result.alternative,
        precision=precision_fields(result.precision),
        monte_carlo={
            **({} if null is None else null_test_monte_carlo(null)),
            # MC s.d. of a B-replicate SE: SE·sqrt((κ−1)/(4B)) (V-TOL); of the bias: SE/√B
            "standard_error_sd": _f(result.standard_error_sd),
            "bias_sd": _f(result.bias_sd),
            "kurtosis": _f(_kurtosis(result.distribution)),
            # Monte Carlo band and s.d. of each interval endpoint, the same as intervals[i].monte_carlo
            "intervals": interval_bands(result.intervals),
            "interval_rule": MC_INTERVAL_RULE,
        },
        details={"z0": _f(result.z0), "acceleration": _f(result.acceleration),
                 "conventions": dict(result.conventions), **jsonable(result.details),
                 **({} if null is None else {"null_test": null_test_details(null, result)})},
        distribution=distribution,
    )


def _interval(i: Interval) -> dict[str, Any]:
    # a one-sided bound's open end (−inf or +inf in the engine) is written as null beside `side`
    # (JSON has no infinity): side "lower" means upper = +inf, side "upper" means lower = −inf
    lower = None if i.side == "upper" else _f(i.lower)
    upper = None if i.side == "lower" else _f(i.upper)
    return {"method": i.method, "level": _f(i.level), "side": i.side, "lower": lower, "upper": upper,
            "note": i.note,
            "quantile_levels": None if i.quantile_levels is None else [_f(v) for v in i.quantile_levels],
            # about 95% Monte Carlo ranges of each endpoint (null when exact, undefined or open)
            "monte_carlo": None if i.monte_carlo is None else
            {"lower": _pair(i.monte_carlo[0]), "upper": _pair(i.monte_carlo[1])}}


def _pair(band: tuple[float, float] | None) -> list[Any] | None:
    return None if band is None else [_f(v) for v in band]


def replicate_distribution(result: BootstrapResult, bins: int) -> dict[str, Any]:
    """The replicates' summary; with exhaustive enumeration every distinct resample once, weighted
    by its probability."""
    kind = "bootstrap replicates"
    values = np.asarray(result.distribution, dtype=float)
    out = distribution_summary(kind, values, bins)
    weights = result.weights
    if weights is None:
        return out
    mean = float(np.sum(weights * values))
    counts, _ = np.histogram(values, bins=len(out["histogram"]["counts"]) or 1,
                             range=(out["histogram"]["edges"][0], out["histogram"]["edges"][-1]), weights=weights)
    out.update(kind=f"{kind} (every distinct resample, weighted by its probability)", mean=mean,
               sd=math.sqrt(float(np.sum(weights * (values - mean) ** 2))), weights_sha256=array_sha256(weights),
               histogram={"edges": out["histogram"]["edges"], "probabilities": [float(c) for c in counts],
                          "counts": [int(round(c * values.size)) for c in counts]},
               support=support(values, weights, float(np.sum(weights))))
    return out


def _kurtosis(values: np.ndarray) -> float | None:
    values = np.asarray(values, dtype=float)
    if not np.isfinite(values).all():
        return None  # not-estimable replicates (e.g. a median not reached) have no moments
    centred = values - values.mean()
    m2 = float(np.mean(centred ** 2))
    return float(np.mean(centred ** 4) / m2 ** 2) if m2 > 0 else None


NULL_TEST_METHOD = ("inversion of the pre-specified interval's one-sided bounds: p_greater is the smallest alpha "
                    "whose 1 - alpha lower bound lies above the null value, p_less the smallest alpha whose upper "
                    "bound lies below it; two-sided: min(1, 2 min(p_greater, p_less))")
NULL_TEST_SOURCE = ("Efron & Tibshirani (1993), An Introduction to the Bootstrap, section 15.4 (achieved significance "
                    "levels of the percentile and BCa intervals); Davison & Hinkley (1997), Bootstrap Methods and "
                    "their Application, section 4.4 (tests from confidence limits)")


IMPOSED_NULL = "imposed-null bootstrap-t"  # the NullTest.method of a wild (cluster) bootstrap with the null imposed
IMPOSED_NULL_METHOD = ("bootstrap-t with the null imposed: resamples drawn from the fit whose target coefficient is "
                       "fixed at the null value; t = (estimate - null value)/se_hat against t* = (theta* - null "
                       "value)/se* (robust standard errors); p_greater the share of t* >= t, p_less of t* <= t, "
                       "two-sided the share of |t*| >= |t|")
IMPOSED_NULL_SOURCE = ("Cameron, Gelbach & Miller (2008), Bootstrap-based improvements for inference with clustered "
                       "errors, Review of Economics and Statistics 90(3)")


def null_test_details(null: NullTest, result: BootstrapResult) -> dict[str, Any]:
    """`details.null_test`: the null value, the interval family inverted (or the imposed null's
    bootstrap-t), both one-sided p-values."""
    imposed = null.method == IMPOSED_NULL
    return {"null_value": _f(null.null_value), "method": IMPOSED_NULL_METHOD if imposed else NULL_TEST_METHOD,
            "source": IMPOSED_NULL_SOURCE if imposed else NULL_TEST_SOURCE,
            "interval_inverted": None if imposed else null.method, "rule": null.rule, "alternative": result.alternative,
            "p_greater": _f(null.p_greater), "p_less": _f(null.p_less), "floored": null.floored, "note": null.note,
            # the alpha whose side of the p-value the reports never round across: 1 - confidence
            "alpha": round(1.0 - (result.intervals[0].level if result.intervals else 0.95), 12)}


def null_test_monte_carlo(null: NullTest) -> dict[str, Any]:
    """The p-value's Monte Carlo s.d. and interval (null when exact), as `monte_carlo` states them."""
    return {"p_value_sd": _f(null.monte_carlo_sd),
            "p_value_interval": None if null.monte_carlo_interval is None else
            [_f(v) for v in null.monte_carlo_interval],
            "p_value_interval_rule": null.interval_rule}
