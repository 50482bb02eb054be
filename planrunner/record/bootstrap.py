"""Record adapter of a `BootstrapResult`: estimate, standard error, bias, intervals and their
Monte Carlo error, and the distribution of the replicates."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from planrunner.engines.results import BootstrapResult, Interval
from planrunner.record.bands import RULE as MC_INTERVAL_RULE
from planrunner.record.bands import interval_bands
from planrunner.record.canonical import plain_number as _f
from planrunner.record.fields import MethodFields, array_sha256, distribution_summary, jsonable, support


def bootstrap_fields(result: BootstrapResult, bins: int, *, save_distribution: bool = False) -> MethodFields:
    """The analysis-entry fields of a bootstrap; ``save_distribution`` keeps every replicate."""
    distribution = replicate_distribution(result, bins)
    if save_distribution:
        # every replicate in resample order; its SHA-256 (of little-endian doubles) is `sha256`
        distribution["values"] = [float(v) for v in result.distribution]
        if result.weights is not None:
            distribution["weights"] = [float(v) for v in result.weights]
    return MethodFields(
        estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
        intervals=tuple(_interval(i) for i in result.intervals),
        resamples=int(result.resamples), exact=bool(result.exact), alternative=result.alternative,
        monte_carlo={
            # MC s.d. of a B-replicate SE: SE·sqrt((κ−1)/(4B)) (V-TOL); of the bias: SE/√B
            "standard_error_sd": _f(result.standard_error_sd),
            "bias_sd": _f(result.bias_sd),
            "kurtosis": _f(_kurtosis(result.distribution)),
            # Monte Carlo band and s.d. of each interval endpoint, the same as intervals[i].monte_carlo
            "intervals": interval_bands(result.intervals),
            "interval_rule": MC_INTERVAL_RULE,
        },
        details={"z0": _f(result.z0), "acceleration": _f(result.acceleration),
                 "conventions": dict(result.conventions), **jsonable(result.details)},
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
