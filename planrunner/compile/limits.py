"""Resource limits checked before work starts: memory for reading the data and for the engines.

A run that would not fit in memory is refused with a message, rather than being killed by the
operating system half-way (or pushing the machine into swap). The estimates are deliberately
simple and on the high side; the rule is written in the README ("What planrunner refuses and why"):

- reading a data file holds, at its peak, about READ_FACTOR bytes per byte of the file (the file's
  bytes, the decoded text and one Python string per field);
- each analysis keeps its distribution until the record is built (8 bytes per resample, per
  enumerated arrangement, or per jackknife replicate), and sorting it for the intervals needs as
  much again while that analysis runs;
- the engines work in batches of about BATCH_ELEMENTS draws (at least one whole resample),
  each draw costing about BYTES_PER_DRAW bytes for indices, keys and gathered values.

The estimate is compared with LIMIT_SHARE of the memory available when the run starts (Linux:
MemAvailable in /proc/meminfo; elsewhere the physical memory; read by `pipeline.check.available_memory`,
since only the runner touches the system), so other processes keep room.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.modelboot import ModelBootstrapOptions
from planrunner.engines.permcore import ENUMERATION_LIMIT, PermutationOptions  # the engines' own limit
from planrunner.errors import DataError

READ_FACTOR = 40
BATCH_ELEMENTS = 2_000_000  # the engines' default batch_elements
BYTES_PER_DRAW = 32
LIMIT_SHARE = 0.8
MB = 1 << 20


def size_text(count: int) -> str:
    """A byte count for people: 1.6 kB, 63 MB."""
    for unit, scale in (("GB", 1 << 30), ("MB", MB), ("kB", 1 << 10)):
        if count >= scale:
            return f"{count / scale:.0f} {unit}" if count >= 10 * scale else f"{count / scale:.1f} {unit}"
    return f"{count} bytes"


def _limit(available: int | None) -> int | None:
    return None if available is None else int(available * LIMIT_SHARE)


def check_files(sizes: Iterable[tuple[str, int]], *, available: int | None) -> None:
    """Refuse a data file whose reading alone would not fit (checked before reading it)."""
    limit = _limit(available)
    if limit is None:
        return
    for shown, size in sizes:
        need = READ_FACTOR * size
        if need > limit:
            raise DataError(f"reading this file ({size_text(size)}) needs about {size_text(need)} of memory, "
                            f"more than the {size_text(limit)} this run may use", where=shown,
                            hint="run on a machine with more memory, or split the extract and keep only "
                                 "the columns the plan needs")


def arrangements(job: Any) -> int | None:
    """Distinct label arrangements of a plain two-group permutation test (within strata); None for
    the other schemes (pairs, clusters, association, k groups), whose engines count their own."""
    if len(job.samples) != 2 or getattr(job, "design", None):
        return None
    first, second = job.samples[0].shape[0], job.samples[1].shape[0]
    if job.strata is None:
        return math.comb(first + second, first)
    total = 1
    for level in set(job.strata[0].tolist()) | set(job.strata[1].tolist()):
        a = int((job.strata[0] == level).sum())
        b = int((job.strata[1] == level).sum())
        total *= math.comb(a + b, a)
    return total


def draws_kept(job: Any) -> int:
    """How many values the analysis's distribution holds (at most: an exact null may be shorter)."""
    if job.method == "jackknife":
        return sum(int(s.shape[0]) for s in job.samples)
    if isinstance(job.options, (BootstrapOptions, ModelBootstrapOptions)):
        return job.options.resamples
    if isinstance(job.options, PermutationOptions):
        resamples, exact = job.options.resamples, job.options.exact
        count = arrangements(job)
        if exact == "never" or count is None:
            return resamples
        if exact == "always":
            # the engine enumerates at most ENUMERATION_LIMIT arrangements (beyond that it uses an
            # exact dynamic-programming null where one applies, or refuses with the count)
            return min(count, ENUMERATION_LIMIT)
        return count if count <= resamples else resamples
    raise ValueError(f"no options for method {job.method!r}")  # the schema makes this unreachable


def estimate_run_bytes(jobs: Iterable[Any]) -> int:
    """The peak memory the engines need for all jobs, by the rule in the module docstring."""
    kept, peak_work = 0, 0
    for job in jobs:
        draws = draws_kept(job)
        rows = sum(int(s.shape[0]) for s in job.samples) * job.statistic.columns
        work = 8 * draws + BYTES_PER_DRAW * max(BATCH_ELEMENTS, rows)
        kept += 8 * draws
        peak_work = max(peak_work, work)
    return kept + peak_work


def check_jobs(jobs: list[Any], *, available: int | None) -> None:
    """Refuse work that would not fit. (An infeasible `exact: always` is refused by the permutation
    engine, which alone knows whether an exact dynamic-programming null applies.)"""
    limit = _limit(available)
    if limit is None:
        return
    need = estimate_run_bytes(jobs)
    if need > limit:
        biggest = max(jobs, key=draws_kept)
        raise DataError(f"the run needs about {size_text(need)} of memory, more than the {size_text(limit)} "
                        f"it may use (the largest part: analysis '{biggest.analysis_id}' keeps "
                        f"{draws_kept(biggest):,} values)", where="resources",
                        hint="lower resamples, split the plan into several runs, or run on a machine with "
                             "more memory")
