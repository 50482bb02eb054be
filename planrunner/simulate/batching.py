"""Simulated data sets of one batch through the batched engines (README: Simulation speed).

A batch of data sets first compiles its jobs (``simulate/run.py``). The jobs the batched engines
can carry (``engines/batched.py``: the Monte Carlo label-shuffle null of a difference of means or
proportions; the cells bootstrap of a one-column statistic without an inner standard error) are
grouped by analysis and shape, and each group's replicates are computed in shared passes, every
data set from its own stream. The data sets then run their engines one at a time, exactly as
without batching, under a range mapper (``engines.blocks``) that answers an engine's range task
from a batch only when it is the very task that was batched (same function, stream, data and
settings); any other task is computed as before. So batching can change no number (the tests
compare the two paths with ==), only how many numpy calls make them.

Memory: a pass holds at most ``batched.BATCH_ELEMENTS`` draws, and the observations and replicates
a batch keeps until its data sets have read them are at most ``BATCH_ELEMENTS`` doubles
(``simulate/run.batches`` closes a batch before they would exceed them; a batch holds one data set
at least).
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.compile.jobs import Job
from planrunner.engines import batched, schemes
from planrunner.engines.blocks import RangeMapper, RangeTask, mapping_ranges
from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import monte_carlo_mean_difference
from planrunner.engines.statistics import check_samples, check_strata
from planrunner.engines.streams import Stream
from planrunner.errors import PlanrunnerError


@dataclass(frozen=True)
class _Member:
    """One data set's job in a group, and what its batched task must match."""

    stream: Stream
    arrays: tuple[np.ndarray, ...]  # permutation: (pooled values,); bootstrap: its groups in cell order
    job: Job


@dataclass(frozen=True)
class _Shape:
    """What the jobs of one group share: the analysis, the computation and its layout."""

    analysis: int  # position in the plan (each data set compiles its jobs in plan order)
    kind: str  # "permutation" or "bootstrap"
    resamples: int
    blocks: Any = None  # permutation: the stratum blocks
    lay: schemes.Layout | None = None  # bootstrap: the cells (data set's own groups are in the members)


def _permutation_member(job: Job) -> tuple[Any, tuple[np.ndarray, ...]] | None:
    options = job.options
    # a shift interval and a decision's shifted nulls draw from a child stream: their own tasks, not batched
    if (job.method != "permutation" or job.design or not isinstance(options, PermutationOptions)
            or options.precision is not None):
        return None
    found = monte_carlo_mean_difference(job.samples, job.statistic, options, job.strata)
    if found is None:
        return None
    values, blocks = found
    return blocks, (values,)


def _bootstrap_member(job: Job) -> tuple[schemes.Layout, tuple[np.ndarray, ...]] | None:
    options = job.options
    if (type(options) is not BootstrapOptions or options.precision is not None or options.exhaustive
            or options.parametric is not None or options.blocks is not None or job.clusters is not None
            or job.paired or "studentized" in options.intervals or job.statistic.columns != 1
            or job.statistic.form == "model" or schemes.fast_path_applies(job.statistic, None)):
        return None
    data = check_samples(job.samples, job.statistic, method="the bootstrap")
    lay = schemes.layout(data, check_strata(job.strata, data))
    return lay, lay.groups


def _shape_and_member(position: int, job: Job) -> tuple[_Shape, _Member] | None:
    """The group a job joins and its member entry, or None when no batched engine carries it (or its
    data would be refused: the one-at-a-time engine then gives the refusal, as without batching)."""
    try:
        found = _permutation_member(job)
        if found is not None:
            blocks, arrays = found
            assert isinstance(job.options, PermutationOptions)
            shape = _Shape(position, "permutation", job.options.resamples, blocks=blocks)
            return shape, _Member(job.stream, arrays, job)
        laid = _bootstrap_member(job)
    except PlanrunnerError:
        return None
    if laid is None:
        return None
    lay, arrays = laid
    assert isinstance(job.options, BootstrapOptions)
    return _Shape(position, "bootstrap", job.options.resamples, lay=lay), _Member(job.stream, arrays, job)


def _same(a: _Shape, b: _Shape) -> bool:
    if (a.analysis, a.kind, a.resamples, a.blocks) != (b.analysis, b.kind, b.resamples, b.blocks):
        return False
    return a.lay is None or (b.lay is not None and batched.same_cells(a.lay, b.lay))


def groups_of(jobsets: Sequence[Sequence[Job] | None]) -> list[tuple[_Shape, list[_Member]]]:
    """The batchable jobs of the data sets (None: a data set that failed before its jobs), grouped by
    analysis and shape, in order of first appearance."""
    groups: list[tuple[_Shape, list[_Member]]] = []
    for jobs in jobsets:
        for position, job in enumerate(jobs or ()):
            found = _shape_and_member(position, job)
            if found is None:
                continue
            shape, member = found
            home = next((members for known, members in groups if _same(known, shape)), None)
            if home is None:
                groups.append((shape, [member]))
            else:
                home.append(member)
    return groups


def _compute(shape: _Shape, members: Sequence[_Member]) -> np.ndarray:
    streams = [m.stream for m in members]
    if shape.kind == "permutation":
        values = np.stack([m.arrays[0] for m in members])
        return batched.mean_difference_nulls(values, shape.blocks, streams, shape.resamples)
    assert shape.lay is not None
    groups = [np.stack([m.arrays[g] for m in members]) for g in range(len(shape.lay.bounds))]
    return batched.cells_replicates(groups, shape.lay, members[0].job.statistic, streams, shape.resamples)


def _answers(shape: _Shape, member: _Member, task: RangeTask, total: int) -> bool:
    if shape.kind == "permutation":
        return batched.permutation_answers(task, total, member.stream, member.arrays[0], shape.blocks,
                                           shape.resamples)
    assert shape.lay is not None
    return batched.cells_answers(task, total, member.stream, member.job.statistic, member.arrays, shape.lay,
                                 shape.resamples)


def batch_mapper(jobsets: Sequence[Sequence[Job] | None]) -> RangeMapper:
    """A range mapper for the engines of these data sets' jobs: the batched replicates of a task
    that was batched, any other task computed as without a mapper."""
    found: dict[Stream, tuple[_Shape, _Member, np.ndarray]] = {}
    for shape, members in groups_of(jobsets):
        for member, values in zip(members, _compute(shape, members)):
            found[member.stream] = (shape, member, values)
    return _mapper(found)


# each thread's batch mapper: the engines read the one mapper installed last (engines.blocks keeps
# one stack for the process), so every simulating thread installs the same dispatcher, which hands
# a range task to the mapper of the thread that runs it
_by_thread: dict[int, RangeMapper] = {}


def _dispatch(task: RangeTask, total: int) -> list[np.ndarray]:
    mine = _by_thread.get(threading.get_ident())
    return [task(0, total)] if mine is None else mine(task, total)


@contextmanager
def answering(jobsets: Sequence[Sequence[Job] | None]) -> Iterator[None]:
    """``with answering(jobsets): ...`` runs the engines inside with this thread's batch mapper."""
    me = threading.get_ident()
    _by_thread[me] = batch_mapper(jobsets)
    try:
        with mapping_ranges(_dispatch):
            yield
    finally:
        del _by_thread[me]


def _mapper(found: dict[Stream, tuple[_Shape, _Member, np.ndarray]]) -> Callable[[RangeTask, int], list[np.ndarray]]:
    def mapper(task: RangeTask, total: int) -> list[np.ndarray]:
        stream = next((a for a in getattr(task, "args", ()) if isinstance(a, Stream)), None)
        entry = None if stream is None else found.get(stream)
        if entry is not None and _answers(entry[0], entry[1], task, total):
            return [entry[2]]
        return [task(0, total)]

    return mapper
