"""Splitting an engine's resamples into ranges that can be computed anywhere.

Resample r depends only on row r of its stream (see :mod:`planrunner.engines.streams`), so the
replicates of resamples [start, stop) can be computed in another process or on another machine
and concatenated in order: the numbers are the same whatever the split.

An engine hands a picklable ``task(start, stop) -> np.ndarray`` and the number of resamples to
:func:`map_resamples`. By default the task runs once over everything, in the calling thread. An
executor (``planrunner.execute``) may install a :data:`RangeMapper` for the current context with
:func:`mapping_ranges`; it then decides where the ranges run. The engines never learn which executor
runs them, and their signatures stay the same.
"""

from __future__ import annotations

import contextvars
import copyreg
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import numpy as np

from planrunner.engines.statistics import STATISTICS, Statistic, get_statistic
from planrunner.engines.streams import DRAW_BLOCK

__all__ = ["RangeMapper", "RangeTask", "block_ranges", "map_resamples", "mapping_ranges"]

RangeTask = Callable[[int, int], np.ndarray]
# (task, total) -> the task's results over consecutive ranges covering [0, total), in order
RangeMapper = Callable[[RangeTask, int], list[np.ndarray]]

_MAPPER: contextvars.ContextVar[RangeMapper | None] = contextvars.ContextVar("planrunner_range_mapper",
                                                                           default=None)


def map_resamples(task: RangeTask, total: int) -> np.ndarray:
    """``task(0, total)``, or the concatenation of the installed mapper's ranges (the same numbers)."""
    mapper = _MAPPER.get()
    if mapper is None or total == 0:
        return task(0, total)
    parts = mapper(task, total)
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.float64)


@contextmanager
def mapping_ranges(mapper: RangeMapper | None) -> Iterator[None]:
    """Install ``mapper`` for engine calls made in this context (thread)."""
    token = _MAPPER.set(mapper)
    try:
        yield
    finally:
        _MAPPER.reset(token)


def block_ranges(total: int, pieces: int) -> list[tuple[int, int]]:
    """About ``pieces`` consecutive ranges covering [0, total), each a whole number of draw blocks
    (except the last), so that no generator is started twice for one block."""
    blocks = -(-total // DRAW_BLOCK)
    per = max(1, -(-blocks // max(1, pieces)))
    step = per * DRAW_BLOCK
    return [(start, min(total, start + step)) for start in range(0, total, step)]


def _reduce_statistic(statistic: Statistic) -> tuple:
    """Registered statistics travel to worker processes by name (their functions may be closures)."""
    if STATISTICS.get(statistic.name) is statistic:
        return get_statistic, (statistic.name,)
    return object.__reduce_ex__(statistic, 4)  # by value, whatever fields it has


copyreg.pickle(Statistic, _reduce_statistic)
