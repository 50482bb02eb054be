"""Monte Carlo band and s.d. of bootstrap interval endpoints, for the record.

Both come from the engine (`engines/intervals.py`, rule `MC_RULE`, written into every record as
`monte_carlo.interval_rule`): `monte_carlo.intervals[i]` and `intervals[i].monte_carlo` are the same
bands, read from one computation, so they can never disagree.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from planrunner.engines.intervals import MC_RULE as RULE
from planrunner.engines.results import Interval

__all__ = ["RULE", "interval_bands"]


def interval_bands(intervals: Sequence[Interval]) -> list[dict[str, Any]]:
    """One entry per interval (same order as the record's `intervals`): bands and s.d. of both ends."""
    out: list[dict[str, Any]] = []
    for interval in intervals:
        entry: dict[str, Any] = {"method": interval.method, "lower_band": None, "upper_band": None,
                                 "lower_sd": None, "upper_sd": None}
        if interval.monte_carlo is not None and interval.monte_carlo_sd is not None:
            # the open end of a one-sided bound has no band (null)
            lower, upper = interval.monte_carlo
            entry.update(lower_band=None if lower is None else list(lower),
                         upper_band=None if upper is None else list(upper),
                         lower_sd=interval.monte_carlo_sd[0], upper_sd=interval.monte_carlo_sd[1])
        out.append(entry)
    return out
