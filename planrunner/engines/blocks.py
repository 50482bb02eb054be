"""Splitting an engine's resamples into ranges that can be computed anywhere.

Resample r depends only on row r of its stream (see :mod:`planrunner.engines.streams`), so the
replicates of resamples [start, stop) can be computed in another process or on another machine
and concatenated in order: the numbers are the same whatever the split.

An engine hands a picklable ``task(start, stop) -> np.ndarray`` (see :class:`bind`) and the number of resamples to
:func:`map_resamples`. By default the task runs once over everything, in the calling thread. An
executor (``planrunner.execute.executors``) may install a :data:`RangeMapper` with :class:`mapping_ranges` around its
engine calls; it then decides where the ranges run. The engines never learn which executor
runs them, and their signatures stay the same.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["RangeMapper", "RangeTask", "bind", "map_resamples", "mapping_ranges", "resample_ranges"]

RangeTask = Callable[[int, int], np.ndarray]
# (task, total) -> the task's results over consecutive ranges covering [0, total), in order
RangeMapper = Callable[[RangeTask, int], list[np.ndarray]]

# the executor's mapper; engines run in the thread that installed it (executors keep it that way)
_installed: list[RangeMapper | None] = [None]


@dataclass(frozen=True)
class bind:
    """``bind(f, *args)(start, stop) == f(*args, start, stop)``; picklable when ``f`` is a module-level
    function and ``args`` are picklable, so that a worker process can run it."""

    function: Callable[..., np.ndarray]
    args: tuple[Any, ...]

    def __init__(self, function: Callable[..., np.ndarray], *args: Any):
        object.__setattr__(self, "function", function)
        object.__setattr__(self, "args", args)

    def __call__(self, start: int, stop: int) -> np.ndarray:
        # non-finite values are found and reported by the engines; numpy's own warnings about them
        # would reach stderr from whichever thread or process runs the range
        with np.errstate(all="ignore"):
            return self.function(*self.args, start, stop)


def map_resamples(task: RangeTask, total: int) -> np.ndarray:
    """``task(0, total)``, or the concatenation of the installed mapper's ranges (the same numbers)."""
    mapper = _installed[-1]
    if mapper is None or total == 0:
        return task(0, total)
    parts = mapper(task, total)
    return np.concatenate(parts) if parts else np.empty(0, dtype=np.float64)


class mapping_ranges:
    """``with mapping_ranges(mapper): ...`` installs ``mapper`` for the engine calls inside."""

    def __init__(self, mapper: RangeMapper | None):
        self._mapper = mapper

    def __enter__(self) -> None:
        _installed.append(self._mapper)

    def __exit__(self, *exc: Any) -> None:
        _installed.pop()


def resample_ranges(total: int, pieces: int) -> list[tuple[int, int]]:
    """``pieces`` consecutive ranges of nearly equal size covering [0, total) (fewer when total is
    smaller). A range may start inside a draw block: its generator is then advanced to the row
    (see :mod:`planrunner.engines.streams`), so equal shares keep every worker equally busy."""
    pieces = max(1, min(pieces, total))
    return [(total * i // pieces, total * (i + 1) // pieces) for i in range(pieces)]
