"""Record adapter of permutation-type results (`PermutationResult`) and of the shift interval.

Every p-value keeps the counts behind it: ``count_greater_equal`` and ``count_less_equal`` (and
``count_absolute`` for the absolute two-sided rule) out of ``arrangements`` (exact) or
``resamples`` (Monte Carlo). Counts, the number of arrangements and the entry's ``resamples`` are JSON
integers up to 2⁵³ − 1 and strings of decimal digits beyond (exact integers that a JSON reader
might round: RFC 7493, I-JSON, section 2.2; dynamic programming counts past 2⁵³ come from the
exact integer programme of ``exactdist``). Only where that programme would cost more than its
bound, or an integer has more than 4000 digits, are they decimal text in scientific notation with
13 significant digits (and ``details.counts_exact`` is false for such counts).
"""

from __future__ import annotations

import hashlib
import math
from typing import Any

import numpy as np

from planrunner.engines.permcore import power_of_ten_text, unscaled
from planrunner.engines.results import PermutationResult
from planrunner.record.canonical import plain_number as _f
from planrunner.record.fields import MethodFields, precision_fields, support

# the largest integer every JSON reader keeps exact: RFC 7493 (I-JSON), section 2.2, allows
# integers in [-(2**53) + 1, 2**53 - 1]; beyond it a double cannot tell n from n + 1
JSON_EXACT = 2 ** 53 - 1
# Python refuses to write an int of more digits than this as text (sys.get_int_max_str_digits)
INT_DIGITS_WRITTEN = 4000


def exact_count(n: int) -> int | str:
    """A whole number as the record writes it: a JSON integer up to 2**53 - 1, its exact decimal digits
    up to 4000 digits (e.g. C(N, n)), beyond that (n! at n ≈ 1450 and up) decimal text in scientific
    notation with 13 significant digits."""
    n = int(n)
    if abs(n) <= JSON_EXACT:
        return n
    return str(n) if abs(n) < 10**INT_DIGITS_WRITTEN else power_of_ten_text(math.log10(abs(n)))


def _count(x: Any) -> Any:
    """A count as the record writes it: an integer as `exact_count` writes it; a float count (DP counts
    past 2**53 beyond the exact programme's bound) as decimal text in scientific notation, 13
    significant digits (beyond 1.8e308 the engine already gives that text, e.g. '1.660842939376e+1202')."""
    if isinstance(x, str):
        return x
    if isinstance(x, (int, np.integer)) and not isinstance(x, bool):
        return exact_count(int(x))
    if isinstance(x, float) and x.is_integer() and abs(x) <= JSON_EXACT:
        return int(x)
    if isinstance(x, float) and math.isfinite(x):
        return f"{x:.12e}"
    return _f(x)


def count_value(x: Any) -> int | None:
    """The exact whole number a record's count field holds (a JSON integer or a string of its decimal
    digits, as records write it now or wrote it before); None for decimal text in scientific notation."""
    if isinstance(x, bool):
        return None
    if isinstance(x, int):
        return x
    if isinstance(x, str) and x.isdigit() and len(x) <= INT_DIGITS_WRITTEN:
        return int(x)
    return None


def weighted_distribution(kind: str, values: np.ndarray, weights: np.ndarray | None, bins: int,
                          weight_exponent: int = 0, exact_weights: tuple[int, ...] | None = None) -> dict[str, Any]:
    """Size, moments, range, histogram and hash of a null given by values (and exact weights).

    ``weights`` held as ``w · 2**weight_exponent`` (a DP null beyond the float range): the size is
    written as decimal text and the histogram as the share of arrangements per bar
    (``histogram.counts_are = "probability"``), since the counts themselves exceed what a float holds.
    ``exact_weights`` (the same weights as Python integers) give the size and the infinite count exactly.
    """
    values_in = values = np.asarray(values, dtype=float)
    w = np.ones(values.size) if weights is None else np.asarray(weights, dtype=float)
    infinite = float(w[~np.isfinite(values)].sum())  # e.g. a ratio over an empty denominator
    w, values = w[np.isfinite(values)], values[np.isfinite(values)]
    total = float(w.sum())
    mean = float(np.sum(w * values) / total)
    var = float(np.sum(w * (values - mean) ** 2) / total)
    rescaled = weight_exponent != 0
    lo, hi = float(values.min()), float(values.max())
    if lo == hi:
        lo, hi = lo - 0.5, hi + 0.5
    counts, edges = np.histogram(values, bins=bins, range=(lo, hi),
                                 weights=w / (total + infinite) if rescaled else w)
    digest = hashlib.sha256(np.ascontiguousarray(values, dtype="<f8").tobytes())
    if weights is not None:
        digest.update(np.ascontiguousarray(w, dtype="<f8").tobytes())
    if rescaled:
        digest.update(str(weight_exponent).encode())
    histogram: dict[str, Any] = {"edges": [float(e) for e in edges],
                                 "counts": [float(c) if weights is not None else int(c) for c in counts]}
    if rescaled:
        histogram["counts_are"] = "probability"
    # unscaled(x, 0) is x: only a rescaled null's counts are turned back into true counts
    size = _count(unscaled(total + infinite, weight_exponent)) if weights is not None else int(values.size + infinite)
    infinite_count = _count(unscaled(infinite, weight_exponent))
    if exact_weights is not None:
        size = _count(sum(exact_weights))
        infinite_count = _count(sum(w for w, v in zip(exact_weights, values_in) if not math.isfinite(v)))
    return {"kind": kind, "size": size, "support_points": int(values.size), "mean": mean,
            # beyond the float range the divisor total − 1 is total itself
            "sd": math.sqrt(var) if rescaled else math.sqrt(var * total / (total - 1)) if total > 1 else None,
            "min": float(values.min()), "max": float(values.max()), "sha256": digest.hexdigest(),
            "weighted": weights is not None, "infinite": infinite_count,
            "histogram": histogram, "support": support(values, w, total + infinite)}


def permutation_fields(result: PermutationResult, bins: int) -> MethodFields:
    """The analysis-entry fields of a permutation-type test (labels shuffled, signs flipped, clusters
    shuffled, association), with the shift interval when the test was inverted for one."""
    exact = bool(result.exact)
    interval = result.p_interval
    details: dict[str, Any] = {
        "observed": _f(result.observed), "count_greater_equal": _count(result.count_greater),
        "count_less_equal": _count(result.count_less), "count_absolute": _count(result.count_absolute),
        "p_greater": _f(result.p_greater), "p_less": _f(result.p_less), "centre": _f(result.centre),
        "arrangements": exact_count(result.arrangements), "computation": result.computation,
        "counts_exact": bool(result.counts_exact),
        "two_sided_rule": result.two_sided_rule, "tolerance": _f(result.tolerance),
        "smallest_p": _f(result.smallest_p),
        "p_value_rule": "count / arrangements (exact)" if exact
        else "(count + 1) / (resamples + 1) (Monte Carlo)",
        "design": {k: _f(v) for k, v in result.design.items()},
        "conventions": dict(result.conventions),
    }
    intervals: tuple[dict[str, Any], ...] = ()
    if result.intervals:
        intervals, shift_details = shift_interval_fields(result)
        details.update(shift_details)
    return MethodFields(
        estimate=_f(result.observed), p_value=_f(result.p_value), alternative=result.alternative,
        exact=exact, resamples=exact_count(result.resamples), intervals=intervals,
        precision=precision_fields(result.precision),
        monte_carlo={"p_value_sd": 0.0 if exact else _f(result.monte_carlo_se),
                     "p_value_interval": None if interval is None else
                     {"method": "Clopper–Pearson", "level": 0.99, "lower": interval[0], "upper": interval[1]}},
        details=details,
        distribution=weighted_distribution("permutation null", result.null, result.null_weights, bins,
                                           result.null_weight_exponent, result.null_exact_weights),
        smallest_p=_f(result.smallest_p),
    )


def shift_interval_fields(result: PermutationResult) -> tuple[tuple[dict[str, Any], ...], dict[str, Any]]:
    """Record adapter of the shift interval (the two-group test inverted): its intervals and the
    details it adds (the shift estimate)."""
    intervals = tuple({"method": i.method, "level": _f(i.level), "side": i.side, "lower": _f(i.lower),
                       "upper": _f(i.upper), "note": i.note} for i in result.intervals)
    return intervals, {"shift_estimate": _f(result.shift_estimate)}
