"""Many data sets of one shape through one engine pass (README: Simulation speed).

A simulation runs the same analysis on hundreds of small data sets. Here the resamples of several
data sets share the numpy calls of one pass, while each data set keeps its own stream: its uniform
rows are read from its stream exactly as its own range task reads them (``UniformRows`` from
resample 0), and every reduction stays a reduction of one row, in the same order, so each data
set's replicates are bit-identical to those of the one-at-a-time engine
(``permutation.mean_difference_task``'s task, ``schemes.cells_range``; tests/test_batched.py compares
with ==).

A pass holds at most ``batch_elements`` draws (and no more than the one-at-a-time engines keep in
cache), whatever the number of data sets: rows of data sets × resamples are cut into passes in
order (data set, then resample), never all at once.

Two computations are batched: the Monte Carlo label-shuffle null of a difference of means or
proportions (the first group's sums, ``permutation.first_group_sums``) and the cells bootstrap
(groups, within strata) of a one-column statistic without an inner standard error.
``permutation_answers`` and ``cells_answers`` say whether an engine's range task is the one a
batch computed, so that a caller answers only that task from the batch.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np

from planrunner.engines import permutation, schemes
from planrunner.engines.blocks import RangeTask
from planrunner.engines.blocks import bind as range_task
from planrunner.engines.statistics import Statistic
from planrunner.engines.streams import Stream, UniformRows

__all__ = ["BATCH_ELEMENTS", "cells_answers", "cells_replicates", "mean_difference_nulls", "pass_segments",
           "permutation_answers", "same_cells"]

BATCH_ELEMENTS = 2_000_000  # draws a pass holds at most: the engines' default batch_elements
# keys a pass of the label-shuffle null holds: with its masks, buckets and products about 1 MB in
# all, so they stay in a 2-core machine's cache (measured there: 3.8 ms per data set of n = 100 per
# group and 999 resamples at 32,768 keys a pass, 6.3 ms at the one-at-a-time engine's 131,072)
PASS_KEYS = 32_768
MIN_PASS_ROWS = 64  # fewer rows than this a pass (wide data sets): the one-at-a-time engine's pass size
# (data set, first row, stop row) of the rows of one pass that belong to one data set
RowSegment = tuple[int, int, int]
Blocks = tuple[tuple[int, int, tuple[int, ...]], ...]


def pass_segments(datasets: int, resamples: int, rows_per_pass: int) -> Iterator[tuple[tuple[int, int, int], ...]]:
    """The rows of ``datasets`` × ``resamples`` in order (data set, then resample), cut into passes
    of at most ``rows_per_pass`` rows; each pass as its (data set, first resample, stop resample)
    pieces."""
    pieces: list[tuple[int, int, int]] = []
    room = rows_per_pass
    for dataset in range(datasets):
        first = 0
        while first < resamples:
            stop = min(resamples, first + room)
            pieces.append((dataset, first, stop))
            room -= stop - first
            first = stop
            if room == 0:
                yield tuple(pieces)
                pieces, room = [], rows_per_pass
    if pieces:
        yield tuple(pieces)


def _read_pass(readers: Sequence[UniformRows], pieces: tuple[tuple[int, int, int], ...],
               buffer: np.ndarray) -> tuple[np.ndarray, tuple[RowSegment, ...]]:
    """The uniform rows of one pass, each piece from its data set's reader (which reads its
    resamples in order), and where each data set's rows lie in the pass."""
    segments = []
    row = 0
    for dataset, first, stop in pieces:
        assert readers[dataset].next_row == first  # pieces of a data set come in resample order
        readers[dataset].take(stop - first, out=buffer[row:row + stop - first])
        segments.append((dataset, row, row + stop - first))
        row += stop - first
    return buffer[:row], tuple(segments)


def _rows_per_pass(width: int, batch_elements: int, cache_elements: int, most: int | None = None) -> int:
    rows = max(1, min(batch_elements, cache_elements) // max(1, width))
    return rows if most is None else min(rows, most)


def mean_difference_nulls(values: np.ndarray, blocks: Blocks, streams: Sequence[Stream], resamples: int, *,
                          batch_elements: int = BATCH_ELEMENTS) -> np.ndarray:
    """The Monte Carlo null T = S1/n1 − (Σx − S1)/n2 of resamples [0, resamples) of every data set,
    (D, resamples): ``values`` (D, N) holds each data set's pooled values (stratum-major, group
    1 first; ``permutation.monte_carlo_mean_difference``), all with the same stratum ``blocks``, and
    ``streams`` each data set's stream. Row d equals ``permutation._random_range`` of data set d."""
    count, width = values.shape
    n1 = sum(sizes[0] for _, _, sizes in blocks)
    n2 = width - n1
    grand = [float(values[d].sum()) for d in range(count)]  # each data set's own 1-D sum, as its engine
    readers = [UniformRows(stream, width) for stream in streams]
    rows_per_pass = _rows_per_pass(width, batch_elements, PASS_KEYS, permutation.KEY_ROWS)
    if rows_per_pass < MIN_PASS_ROWS:  # wide data sets: the per-call cost of tiny passes outweighs the cache
        rows_per_pass = _rows_per_pass(width, batch_elements, permutation.KEY_CACHE_ELEMENTS, permutation.KEY_ROWS)
    buffer = np.empty((min(rows_per_pass, count * resamples), width))
    out = np.empty((count, resamples))
    for pieces in pass_segments(count, resamples, rows_per_pass):
        keys, segments = _read_pass(readers, pieces, buffer)
        first = permutation.first_group_sums(keys, values, blocks, segments)
        for (dataset, row, stop_row), (_, start, stop) in zip(segments, pieces):
            part = first[row:stop_row]
            out[dataset, start:stop] = part / n1 - (grand[dataset] - part) / n2
    return out


def permutation_answers(task: RangeTask, total: int, stream: Stream, values: np.ndarray, blocks: Blocks,
                        resamples: int) -> bool:
    """Whether ``task`` is the Monte Carlo range task of a label-shuffle test of a difference of
    means over these pooled ``values`` and ``blocks`` on ``stream``, asked for [0, resamples)."""
    found = permutation.mean_difference_task(task)
    if found is None or total != resamples:
        return False
    task_values, task_blocks, task_stream = found
    return task_stream == stream and task_blocks == blocks and np.array_equal(task_values, values)


def cells_replicates(groups: Sequence[np.ndarray], lay: schemes.Layout, statistic: Statistic,
                     streams: Sequence[Stream], resamples: int, *,
                     batch_elements: int = BATCH_ELEMENTS) -> np.ndarray:
    """The bootstrap replicates of resamples [0, resamples) of every data set under the cells
    contract, (D, resamples): ``groups`` holds per group the data sets' observations in cell order,
    (D, n_g) (each data set's ``schemes.layout(...).groups``), all with ``lay``'s cells, and
    ``statistic`` has one column and no fast path. Row d equals ``schemes.cells_range`` of data set d."""
    assert statistic.columns == 1 and not schemes.fast_path_applies(statistic, None)
    count = groups[0].shape[0]
    width = int(lay.cell_start.shape[0])
    readers = [UniformRows(stream, width) for stream in streams]
    rows_per_pass = _rows_per_pass(width, batch_elements, schemes.CACHE_ELEMENTS)
    u_buffer = np.empty((min(rows_per_pass, count * resamples), width))
    index_buffer = np.empty(u_buffer.shape, dtype=np.intp)
    gathered_buffers = [np.empty((u_buffer.shape[0], stop - start)) for start, stop in lay.bounds]
    offsets = lay.cell_start if np.any(lay.cell_start) else None
    out = np.empty((count, resamples))
    for pieces in pass_segments(count, resamples, rows_per_pass):
        u, segments = _read_pass(readers, pieces, u_buffer)
        rows = u.shape[0]
        np.multiply(u, lay.cell_size, out=u)
        index = index_buffer[:rows]
        np.copyto(index, u, casting="unsafe")  # truncation is floor here because u * size >= 0
        if offsets is not None:
            np.add(index, offsets, out=index)
        gathered = [buffer[:rows] for buffer in gathered_buffers]
        for group, (start, stop), into in zip(groups, lay.bounds, gathered):
            for dataset, row, stop_row in segments:  # each row from its own data set's observations
                # "clip" only so that numpy writes into ``out`` unbuffered: the indices are in range
                np.take(group[dataset], index[row:stop_row, start:stop], out=into[row:stop_row], mode="clip")
        with np.errstate(invalid="ignore", divide="ignore"):  # reported by the engine that reads them
            theta = statistic.compute(*gathered)
        for (dataset, row, stop_row), (_, start, stop) in zip(segments, pieces):
            out[dataset, start:stop] = theta[row:stop_row]
    return out


def cells_answers(task: RangeTask, total: int, stream: Stream, statistic: Statistic, groups: Sequence[np.ndarray],
                  lay: schemes.Layout, resamples: int) -> bool:
    """Whether ``task`` is the cells bootstrap range task of ``statistic`` (no inner standard
    error) over observations ``groups`` (one data set's, in cell order) laid out as ``lay``, on
    ``stream``, asked for [0, resamples)."""
    if not (isinstance(task, range_task) and task.function is schemes.cells_range and total == resamples):
        return False
    task_lay, task_statistic, task_stream, _, inner, _ = task.args
    return (inner is None and task_stream == stream and task_statistic is statistic
            and same_cells(task_lay, lay)
            and all(np.array_equal(a, b) for a, b in zip(task_lay.groups, groups, strict=True)))


def same_cells(a: schemes.Layout, b: schemes.Layout) -> bool:
    """Whether two layouts have the same cells (so that one pass can draw both)."""
    return (a.bounds == b.bounds and np.array_equal(a.cell_start, b.cell_start)
            and np.array_equal(a.cell_size, b.cell_size))
