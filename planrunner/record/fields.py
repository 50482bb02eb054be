"""What a result contributes to its analysis entry, typed, and the summaries the adapters share.

Each result type has one record adapter (`record/bootstrap.py`, `record/jackknife.py`,
`record/permutation.py`) that turns the engine's frozen result into `MethodFields`; the builder
(`record/build.py`) adds the fields that come from the plan and the job and makes the JSON once.
A field a method does not produce keeps its default, so every analysis entry has the same shape.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from planrunner.record.canonical import plain_number as _f


@dataclass(frozen=True)
class MethodFields:
    """The result's part of an analysis entry (names as in the record)."""

    estimate: float | None = None
    standard_error: float | None = None
    bias: float | None = None
    intervals: tuple[dict[str, Any], ...] = ()
    p_value: float | None = None
    alternative: str | None = None
    exact: bool | None = None
    resamples: int | str | None = None  # a count past 2**53 - 1 as its decimal digits (record.permutation.exact_count)
    monte_carlo: dict[str, Any] = field(default_factory=dict)
    details: dict[str, Any] = field(default_factory=dict)
    distribution: dict[str, Any] | None = None
    # for the multiplicity families: the smallest p-value the test can give (permutation-type only)
    smallest_p: float | None = None
    # resamples chosen to a stated precision (engines.precision): rule, parameters, resamples used,
    # why it stopped, and what was achieved; None with a fixed number of resamples
    precision: dict[str, Any] | None = None

    def entry_fields(self) -> dict[str, Any]:
        """The fields in the record's order (`smallest_p` is in `details`, not a field of its own)."""
        return {"estimate": self.estimate, "standard_error": self.standard_error, "bias": self.bias,
                "intervals": list(self.intervals), "p_value": self.p_value, "alternative": self.alternative,
                "exact": self.exact, "resamples": self.resamples, "monte_carlo": self.monte_carlo,
                "details": self.details, "distribution": self.distribution, "precision": self.precision}


def precision_fields(outcome: Any) -> dict[str, Any] | None:
    """The record's ``precision`` entry of an engine's ``PrecisionOutcome`` (None: fixed resamples)."""
    if outcome is None:
        return None
    return {"rule": outcome.rule, "parameters": {k: _f(v) if isinstance(v, float) else v
                                                 for k, v in outcome.parameters.items()},
            "resamples_used": int(outcome.resamples_used), "stopped_because": outcome.stopped_because,
            "decisions": [dict(d) for d in outcome.decisions],
            "achieved": {k: _f(v) for k, v in outcome.achieved.items()}}


def histogram(values: np.ndarray, bins: int) -> dict[str, Any]:
    """Equal-width counts over the finite range (a single value gets a range of width 1)."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return {"edges": [], "counts": []}
    lo, hi = float(finite.min()), float(finite.max())
    if lo == hi:
        lo, hi = lo - 0.5, hi + 0.5
    counts, edges = np.histogram(finite, bins=bins, range=(lo, hi))
    return {"edges": [float(e) for e in edges], "counts": [int(c) for c in counts]}


# a distribution with at most this many distinct values is also recorded value by value (`support`)
SUPPORT_LIMIT = 100


def support(values: np.ndarray, weights: np.ndarray | None = None, total: float | None = None) -> dict[str, Any] | None:
    """The distinct finite values and the share of the distribution at each, when there are at most
    SUPPORT_LIMIT of them (a discrete distribution: an exact null, a 0/1 outcome, a median of a few
    integers), else None. Values closer than 2**-40 of the largest magnitude are one point: the same
    arrangement total reached by sums in another order differs only in its last bits. ``total`` is
    the whole distribution's weight (non-finite values included), so the shares are of all of it."""
    values = np.asarray(values, dtype=float)
    w = np.ones(values.size) if weights is None else np.asarray(weights, dtype=float)
    finite = np.isfinite(values)
    v, w = values[finite], w[finite]
    if v.size == 0:
        return None
    order = np.argsort(v, kind="stable")
    v, w = v[order], w[order]
    gap = max(abs(float(v[0])), abs(float(v[-1]))) * 2.0**-40
    starts = np.flatnonzero(np.concatenate(([True], np.diff(v) > gap)))
    if starts.size > SUPPORT_LIMIT:
        return None
    mass = np.add.reduceat(w, starts)
    whole = float(values.size if weights is None else np.sum(weights)) if total is None else total
    return {"values": [_f(x) for x in v[starts]], "probabilities": [_f(m / whole) for m in mass]}


def distribution_summary(kind: str, values: np.ndarray, bins: int) -> dict[str, Any]:
    """Size, moments, range, histogram and SHA-256 of a set of replicates (or pseudo-values)."""
    values = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore"):  # ±∞ replicates (a median not reached) give no moments: null
        mean = _f(values.mean()) if values.size else None
        sd = _f(values.std(ddof=1)) if values.size > 1 else None
    return {
        "kind": kind,
        "size": int(values.size),
        "mean": mean,
        "sd": sd,
        "min": _f(values.min()) if values.size else None,
        "max": _f(values.max()) if values.size else None,
        # the hash lets anyone holding the full distribution prove it is the one behind the numbers
        "sha256": array_sha256(values),
        "histogram": histogram(values, bins),
        "support": support(values),
    }


def array_sha256(values: np.ndarray) -> str:
    """SHA-256 of the values as little-endian doubles."""
    return hashlib.sha256(np.ascontiguousarray(values, dtype="<f8").tobytes()).hexdigest()


def jsonable(value: Any) -> Any:
    """Engine details (dicts, lists, tuples, numpy numbers) as plain JSON values."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, (str, type(None))):
        return value
    return _f(value)
