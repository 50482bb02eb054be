"""The Kaplan–Meier curve of every group of a censored analysis, for the record (and the report's
figure, which draws only numbers found here)."""

from __future__ import annotations

from typing import Any

import numpy as np

from planrunner.compile.jobs import Job
from planrunner.engines.survival import curve
from planrunner.record.canonical import plain_number as _f

MAX_POINTS = 1000  # distinct times kept per group; beyond it every k-th (the record says so)


def kaplan_meier_details(job: Job) -> dict[str, Any] | None:
    """``details.kaplan_meier`` of a censored analysis (None otherwise).

    Right censoring: per group the distinct times t with S(t) after t, the number at risk, events
    and censorings at t. Left censoring: the distinct values x = M − t with the estimated proportion
    of values at or below x, P(X ≤ x) = S(t⁻) on the flipped scale, and the counts at x.
    """
    if job.censoring is None:
        return None
    kind, largest = job.censoring
    groups = []
    for label, sample in zip(job.group_labels, job.samples):
        found = curve(sample[:, 0], sample[:, 1])
        previous = np.concatenate([[1.0], found.survival[:-1]])
        if kind == "left":
            assert largest is not None
            order = np.arange(found.times.shape[0])[::-1]  # values ascending
            xs, ys = largest - found.times[order], previous[order]
        else:
            order = np.arange(found.times.shape[0])
            xs, ys = found.times, found.survival
        step = max(1, -(-order.shape[0] // MAX_POINTS))
        keep = np.arange(0, order.shape[0], step)
        if keep[-1] != order.shape[0] - 1:
            keep = np.append(keep, order.shape[0] - 1)
        groups.append({
            "group": label, "n": int(sample.shape[0]), "events": int(found.events.sum()),
            "censored": int(found.censored.sum()), "thinned_every": step,
            "points": [[_f(xs[k]), _f(ys[k]), int(found.at_risk[order[k]]), int(found.events[order[k]]),
                        int(found.censored[order[k]])] for k in keep]})
    return {"censoring": kind, "flipped_at": _f(largest) if largest is not None else None,
            "columns": ["value", "proportion_at_or_below", "at_risk", "detected", "below_limit"] if kind == "left"
            else ["time", "survival", "at_risk", "events", "censored"], "groups": groups}
