"""Resampling schemes of the bootstrap: how each resample is drawn from the stream.

Every scheme reads uniform rows from :class:`~planrunner.engines.streams.UniformRows` (resample r
is row r of the stream, whatever the batch), so its numbers never depend on the batch size.
The draw contract of each scheme (changing it changes every number):

* cells (one group, groups, strata, pairs): N positions laid out group-major, stratum code
  ascending, original order within a cell; ``u = gen.random(N)``; position j takes observation
  ``cell_start[j] + floor(u[j] * cell_size[j])``. Pairs are one sample of (first, second) rows.
* clusters: the C clusters laid out group-major, stratum ascending, cluster code ascending;
  ``u = gen.random(C)``; slot j takes cluster ``cell_start[j] + floor(u[j] * cell_size[j])`` of its
  (group, stratum) cell; a resampled group is the rows of its chosen clusters, slot by slot.
* blocks (data in time order, each group separately, block length L, n observations):
  moving: ``k = ceil(n/L)`` uniforms, block starts ``floor(u * (n − L + 1))``, blocks of L
  consecutive observations joined and cut to n; circular: starts ``floor(u * n)``, indices wrap
  modulo n; stationary (Politis & Romano 1994, mean block length L): 2n uniforms, position i
  starts a new block when ``u[i] < 1/L`` (always at i = 0) at ``floor(u[n + i] * n)``, otherwise
  continues the previous block circularly.
* parametric: ``u = gen.random(N)`` mapped into (0, 1) as ``u (1 − 2⁻⁵³) + 2⁻⁵⁴`` and sent through
  the inverse CDF of the fitted model of each group. Two columns (normal only): 2n uniforms per
  group, ``z = Φ⁻¹(u)`` read as (2, n) (the first n for the first column), rows ``μ + L z`` with L
  the lower Cholesky factor of the maximum-likelihood covariance (divisor n).
* exhaustive: no draws; every distinct resample (multiset) of every cell once, with its
  multinomial probability n!/(∏ c_i! nⁿ), cells combined as a product.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.engines.lazy import gammaln
from planrunner.engines.lazy import stats as _dist
from planrunner.engines.statistics import Statistic, take_observations
from planrunner.engines.streams import Stream, UniformRows
from planrunner.engines.survival import SurvivalFastPath
from planrunner.errors import EngineError

__all__ = [
    "BLOCK_SCHEMES",
    "EXHAUSTIVE_LIMIT",
    "MODELS",
    "MODEL_SE",
    "Layout",
    "count_multisets",
    "draw_blocks",
    "draw_cells",
    "draw_clusters",
    "draw_parametric",
    "enumerate_cells",
    "evaluate",
    "fast_path_applies",
    "fit_model",
    "layout",
    "model_se",
]

# draws per batch when nothing else bounds it: about 1 MB of doubles, so that a batch's uniforms,
# indices and gathered values stay in the processor's cache between the steps that use them
CACHE_ELEMENTS = 131_072
EXHAUSTIVE_LIMIT = 200_000  # most distinct resamples (product over cells) enumerated exhaustively
BLOCK_SCHEMES = ("moving", "circular", "stationary")
MODELS = ("normal", "exponential", "poisson", "binomial")
_OPEN = 2.0 ** -53  # maps [0, 1) into (0, 1) for inverse CDFs


# ------------------------------------------------------------------ evaluation, with an inner SE


def _jackknife_se_rows(statistic: Statistic, gathered: Sequence[np.ndarray]) -> np.ndarray:
    """Delete-one jackknife SE of each resample (rows), within each group (V-CONV-JACK)."""
    total = None
    for g, a in enumerate(gathered):
        m = a.shape[-1]
        keep = np.arange(m - 1)
        idx = keep[None, :] + (keep[None, :] >= np.arange(m)[:, None])  # (m, m-1): row i drops i
        deleted = a[..., idx]  # (rows, m, m-1) or (rows, k, m, m-1)
        if a.ndim == 3:
            deleted = np.moveaxis(deleted, -3, -2)  # (rows, m, k, m-1)
        args = [deleted if h == g else np.expand_dims(b, 1) for h, b in enumerate(gathered)]
        reps = statistic.compute(*args)  # (rows, m)
        part = (m - 1) / m * np.sum((reps - reps.mean(axis=-1, keepdims=True)) ** 2, axis=-1)
        total = part if total is None else total + part
    assert total is not None
    return np.sqrt(total)


def evaluate(statistic: Statistic, gathered: Sequence[np.ndarray],
             inner: str | None) -> tuple[np.ndarray, np.ndarray | None]:
    """The statistic of each resample and, for studentized intervals, its standard error."""
    theta = statistic.compute(*gathered)
    if inner is None:
        return theta, None
    if inner == "analytic":
        assert statistic.se is not None
        return theta, statistic.se(*gathered)
    return theta, _jackknife_se_rows(statistic, gathered)


def _inner_factor(inner: str | None, n_max: int) -> int:
    return n_max if inner == "jackknife" else 1


# ------------------------------------------------------------------ cells (groups, strata, pairs)


@dataclass(frozen=True)
class Layout:
    """Observations laid out cell by cell (see the draw contract)."""

    groups: tuple[np.ndarray, ...]  # each group's observations in cell order (observation axis first)
    bounds: tuple[tuple[int, int], ...]  # [start, stop) of each group among the N positions
    cell_start: np.ndarray  # (N,) group-local position of the first observation of j's cell
    cell_size: np.ndarray  # (N,) float, size of j's cell
    cells: tuple[tuple[int, np.ndarray], ...]  # (group, original indices) of every cell


def layout(data: tuple[np.ndarray, ...], strata: tuple[np.ndarray, ...] | None) -> Layout:
    groups, bounds, starts, sizes = [], [], [], []
    cells: list[tuple[int, np.ndarray]] = []
    offset = 0
    for g, a in enumerate(data):
        n = a.shape[0]
        codes = np.zeros(n, dtype=np.int64) if strata is None else strata[g]
        order = np.argsort(codes, kind="stable")
        _, first, counts = np.unique(codes[order], return_index=True, return_counts=True)
        groups.append(a[order])
        bounds.append((offset, offset + n))
        starts.append(np.repeat(first, counts))
        sizes.append(np.repeat(counts, counts).astype(np.float64))
        cells.extend((g, order[f:f + c]) for f, c in zip(first, counts))
        offset += n
    return Layout(tuple(groups), tuple(bounds), np.concatenate(starts).astype(np.int64),
                  np.concatenate(sizes), tuple(cells))


def _rows_per_batch(batch_elements: int, width: int) -> int:
    return max(1, batch_elements // max(1, width))


INNER_LABEL = 2 ** 40  # child label of the nested bootstrap's stream (beyond any draw-block index)


def _nested_se(lay: Layout, statistic: Statistic, gathered: list[np.ndarray], reader: UniformRows,
               inner_resamples: int) -> np.ndarray:
    """Bootstrap SE of each outer resample from ``inner_resamples`` inner resamples of it.

    Inner resample j of outer resample r is row r·M + j of the inner stream; it is drawn from the
    outer resample's positions by the same cells contract (so strata and pairs are respected).
    """
    rows = gathered[0].shape[0]
    u = reader.take(rows * inner_resamples).reshape(rows, inner_resamples, -1)
    index = lay.cell_start + (u * lay.cell_size).astype(np.int64)  # (rows, M, N)
    inner = []
    for a, (start, stop) in zip(gathered, lay.bounds):
        local = index[:, :, start:stop]
        rows_axis = np.arange(rows)[:, None, None]
        if a.ndim == 2:
            inner.append(a[rows_axis, local])  # (rows, M, n)
        else:
            inner.append(np.moveaxis(a[rows_axis, :, local], -1, -2))  # (rows, M, k, n)
    theta = statistic.compute(*inner)  # (rows, M)
    return np.std(theta, axis=-1, ddof=1)


WINDOW_SDS = 6.0  # half-width of the counting window of _order_positions, in binomial sds


def _order_positions(ranks: np.ndarray, ks: Sequence[int], n: int) -> np.ndarray:
    """``np.partition(ranks, ks, axis=1)[:, ks]`` for rows of n ranks in [0, n), by counting.

    The k-th smallest of a resample's ranks lies, but with a chance of about 1e-9 per row, within
    WINDOW_SDS binomial standard deviations of k (the number of draws below a rank p is
    Binomial(n, p/n)). So each row counts the draws below that window and the draws at each rank
    inside it (a few per cent of the draws), and reads the order statistics off the cumulative
    counts. Rows whose order statistics fall outside the window are partitioned in full. The
    positions are integers, so the result is exactly the partition's.
    """
    rows = ranks.shape[0]
    centre = (ks[0] + ks[-1]) / 2.0
    q = min(max((centre + 0.5) / n, 0.0), 1.0)
    half = WINDOW_SDS * math.sqrt(n * q * (1.0 - q)) + 2.0
    lo, hi = max(0, int(ks[0] - half)), min(n, int(ks[-1] + half) + 1)
    window = hi - lo
    shifted = ranks - ranks.dtype.type(lo)
    below = np.count_nonzero(shifted < 0, axis=1)
    inside = shifted.view(np.dtype(f"u{shifted.itemsize}")) < window  # negatives wrap to large
    shifted += (np.arange(rows, dtype=shifted.dtype) * window)[:, None]  # one counting row per resample
    counts = np.bincount(shifted[inside], minlength=rows * window).reshape(rows, window)
    cumulative = np.cumsum(counts, axis=1)
    cumulative += below[:, None]
    out = np.empty((rows, len(ks)), dtype=np.int64)
    for j, k in enumerate(ks):
        out[:, j] = lo + np.count_nonzero(cumulative <= k, axis=1)  # first rank whose count passes k
    missed = np.flatnonzero((below > ks[0]) | (cumulative[:, -1] <= ks[-1]))
    if missed.size:
        out[missed] = np.partition(ranks[missed], list(ks), axis=1)[:, list(ks)]
    return out


class _OrderFastPath:
    """Median and quantile statistics over the once-sorted data (DEVELOPERS.md: fast paths).

    Each group is sorted once; a resample's draws become integer ranks, and the order statistics a
    location needs are found by counting those ranks (:func:`_order_positions`; no per-resample
    float gather or sort). The value is then formed with numpy's own formulas (median: mean of the
    two middle values; linear quantile: numpy's lerp with γ = (n − 1)q − floor((n − 1)q)), so the
    replicates are identical to the plain computation (tested).
    """

    def __init__(self, statistic: Statistic, groups: tuple[np.ndarray, ...]):
        self.statistic = statistic
        self.sorted = []
        self.rank = []
        for a in groups:
            order = np.argsort(a, kind="stable")
            rank = np.empty(a.shape[0], dtype=np.int32 if a.shape[0] < 2 ** 31 else np.int64)
            rank[order] = np.arange(a.shape[0])
            self.sorted.append(a[order])
            self.rank.append(rank)

    @staticmethod
    def applies(statistic: Statistic, inner: str | None) -> bool:
        return inner is None and statistic.columns == 1 and statistic.form in ("median", "quantile")

    def _location(self, g: int, index: np.ndarray) -> np.ndarray:
        s = self.sorted[g]
        n = index.shape[1]
        ranks = self.rank[g][index]
        if self.statistic.form == "median":
            k = n // 2
            if n % 2:
                return s[_order_positions(ranks, [k], n)[:, 0]]
            part = _order_positions(ranks, [k - 1, k], n)
            return (s[part[:, 0]] + s[part[:, 1]]) / 2.0
        q = self.statistic.value
        assert q is not None
        virtual = (n - 1) * np.float64(q)
        j = int(np.floor(virtual))
        gamma = virtual - j
        if j + 1 >= n:
            return s[_order_positions(ranks, [n - 1], n)[:, 0]]
        part = _order_positions(ranks, [j, j + 1], n)
        low, high = s[part[:, 0]], s[part[:, 1]]
        # numpy's _lerp: a + (b − a)γ, or b − (b − a)(1 − γ) when γ ≥ 0.5
        diff = high - low
        return high - diff * (1 - gamma) if gamma >= 0.5 else low + diff * gamma

    def compute(self, index_by_group: list[np.ndarray]) -> np.ndarray:
        values = [self._location(g, idx) for g, idx in enumerate(index_by_group)]
        return values[0] if len(values) == 1 else values[0] - values[1]


def fast_path_applies(statistic: Statistic, inner: str | None) -> bool:
    """Whether :func:`draw_cells` evaluates ``statistic`` by a fast path rather than by ``compute``."""
    return _OrderFastPath.applies(statistic, inner) or SurvivalFastPath.applies(statistic, inner)


def draw_cells(lay: Layout, statistic: Statistic, resamples: int, stream: Stream, batch_elements: int,
               inner: str | None, inner_resamples: int = 0, *, fast: bool = True,
               start: int = 0) -> tuple[np.ndarray, np.ndarray | None]:
    """Run the cells draw contract; the B replicates (and inner SEs) in resample order.

    ``fast``: medians and quantiles over the once-sorted data (identical numbers; see _OrderFastPath), and
    Kaplan–Meier statistics from counts per distinct time (``survival.SurvivalFastPath``).
    ``start``: the first resample drawn (resamples [start, start + resamples)), so that ranges of
    resamples can be computed apart and joined (see ``engines.blocks``).
    """
    order_path: _OrderFastPath | SurvivalFastPath | None = None
    if fast and _OrderFastPath.applies(statistic, inner):
        order_path = _OrderFastPath(statistic, lay.groups)
    elif fast and SurvivalFastPath.applies(statistic, inner):
        order_path = SurvivalFastPath(statistic, lay.groups)  # counts per distinct time, no per-resample sort
    width = int(lay.cell_start.shape[0])
    n_max = max(b - a for a, b in lay.bounds)
    factor = inner_resamples if inner == "bootstrap" else _inner_factor(inner, n_max)
    rows_per_batch = _rows_per_batch(batch_elements, width * statistic.columns * factor)
    if inner is None:
        # the numbers do not depend on the batch size, so a batch may stay inside the cache
        rows_per_batch = min(rows_per_batch, _rows_per_batch(CACHE_ELEMENTS, width * statistic.columns))
    reader = UniformRows(stream, width, start)
    # inner resample j of outer resample r is row r·M + j of the inner stream
    nested = (UniformRows(stream.child(INNER_LABEL), width, start * inner_resamples) if inner == "bootstrap"
              else None)
    out = np.empty(resamples, dtype=np.float64)
    se = np.empty(resamples, dtype=np.float64) if inner else None
    # buffers reused by every batch: allocating them afresh costs more than the arithmetic
    u_buffer = np.empty((min(rows_per_batch, resamples), width), dtype=np.float64)
    index_buffer = np.empty(u_buffer.shape, dtype=np.intp)
    offsets = lay.cell_start if np.any(lay.cell_start) else None
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        u = reader.take(rows, out=u_buffer[:rows])
        np.multiply(u, lay.cell_size, out=u)
        index = index_buffer[:rows]
        np.copyto(index, u, casting="unsafe")  # truncation is floor here because u * size >= 0
        if offsets is not None:
            np.add(index, offsets, out=index)
        if order_path is not None:
            out[done:done + rows] = order_path.compute([index[:, a:b] for a, b in lay.bounds])
            done += rows
            continue
        gathered = [take_observations(group, index[:, start:stop])
                    for group, (start, stop) in zip(lay.groups, lay.bounds)]
        # undefined values are detected and reported by the caller, not printed by numpy
        s: np.ndarray | None
        with np.errstate(invalid="ignore", divide="ignore"):
            if nested is not None:
                theta, s = statistic.compute(*gathered), _nested_se(lay, statistic, gathered, nested,
                                                                     inner_resamples)
            else:
                theta, s = evaluate(statistic, gathered, inner)
        out[done:done + rows] = theta
        if se is not None and s is not None:
            se[done:done + rows] = s
        done += rows
    return out, se


# ------------------------------------------------------------------ clusters


@dataclass(frozen=True)
class ClusterLayout:
    slot_group: np.ndarray  # (C,) group of each cluster slot
    cell_start: np.ndarray  # (C,) global index of the first cluster of the slot's cell
    cell_size: np.ndarray  # (C,) float, clusters in the slot's cell
    members: tuple[np.ndarray, ...]  # rows (group-local) of each cluster, in cluster order
    codes: np.ndarray  # (C,) cluster code of each cluster
    cells: tuple[tuple[int, tuple[int, ...]], ...]  # (group, cluster numbers) of every cell


def cluster_layout(data: tuple[np.ndarray, ...], clusters: tuple[np.ndarray, ...],
                   strata: tuple[np.ndarray, ...] | None) -> ClusterLayout:
    slot_group, starts, sizes, cells, codes = [], [], [], [], []
    members: list[np.ndarray] = []
    for g, a in enumerate(data):
        c = clusters[g]
        s = np.zeros(a.shape[0], dtype=np.int64) if strata is None else strata[g]
        ids = np.unique(c)
        stratum_of = {}
        for k in ids:
            rows = np.flatnonzero(c == k)
            values = np.unique(s[rows])
            if values.size != 1:
                raise EngineError(f"cluster {int(k)} of group {g + 1} spans several strata",
                                  hint="a cluster must lie inside one stratum; check the strata and clusters columns")
            stratum_of[int(k)] = int(values[0])
        for stratum in sorted(set(stratum_of.values())):
            chosen = [k for k in ids if stratum_of[int(k)] == stratum]
            first = len(members)
            numbers = tuple(range(first, first + len(chosen)))
            for k in chosen:
                members.append(np.flatnonzero(c == k))
                codes.append(int(k))
                slot_group.append(g)
                starts.append(first)
                sizes.append(float(len(chosen)))
            cells.append((g, numbers))
    return ClusterLayout(np.array(slot_group, dtype=np.int64), np.array(starts, dtype=np.int64),
                         np.array(sizes, dtype=np.float64), tuple(members), np.array(codes, dtype=np.int64),
                         tuple(cells))


def draw_clusters(data: tuple[np.ndarray, ...], lay: ClusterLayout, statistic: Statistic, resamples: int,
                  stream: Stream, batch_elements: int, *, fast: bool = True, start: int = 0) -> np.ndarray:
    """Run the clusters draw contract for resamples [start, start + resamples).

    ``fast``: mean-form statistics from cluster sums and sizes; Kaplan–Meier statistics from each
    observation's multiplicity (the times its cluster was drawn) and counts per distinct time.
    """
    width = int(lay.cell_start.shape[0])
    reader = UniformRows(stream, width, start)
    out = np.empty(resamples, dtype=np.float64)
    if fast and SurvivalFastPath.applies(statistic, None):
        return _survival_clusters(data, lay, statistic, resamples, reader, batch_elements)
    use_sums = fast and statistic.form == "mean" and statistic.columns == 1
    if use_sums:
        sums = np.array([float(np.sum(data[lay.slot_group[k]][rows])) for k, rows in enumerate(lay.members)])
        sizes = np.array([float(rows.shape[0]) for rows in lay.members])
    # equal cluster sizes within every group: each resample has a fixed length, so the gather is
    # one array operation (rows in the same order as the slot-by-slot loop, hence the same numbers)
    slots = [np.flatnonzero(lay.slot_group == g) for g in range(len(data))]
    equal = fast and all(len({lay.members[k].shape[0] for k in group}) == 1 for group in slots)
    stacked = [np.stack([lay.members[k] for k in group]) for group in slots] if equal else []
    total_rows = sum(a.shape[0] for a in data)
    rows_per_batch = _rows_per_batch(batch_elements, max(width, total_rows * statistic.columns))
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        chosen = lay.cell_start + (reader.take(rows) * lay.cell_size).astype(np.int64)  # (rows, C)
        with np.errstate(invalid="ignore", divide="ignore"):
            if equal and not use_sums:
                gathered = []
                for g, a in enumerate(data):
                    local = chosen[:, slots[g]] - slots[g][0]  # cluster numbers within group g
                    gathered.append(take_observations(a, stacked[g][local].reshape(rows, -1)))
                out[done:done + rows] = statistic.compute(*gathered)
            elif use_sums:
                means = [np.sum(sums[chosen[:, lay.slot_group == g]], axis=1)
                         / np.sum(sizes[chosen[:, lay.slot_group == g]], axis=1) for g in range(len(data))]
                out[done:done + rows] = means[0] if len(data) == 1 else means[0] - means[1]
            else:
                for r in range(rows):
                    gathered = []
                    for g, a in enumerate(data):
                        picked = chosen[r, lay.slot_group == g]
                        index = np.concatenate([lay.members[k] for k in picked])
                        gathered.append(take_observations(a, index[None, :]))
                    out[done + r] = statistic.compute(*gathered)[0]
        done += rows
    return out


def _survival_clusters(data: tuple[np.ndarray, ...], lay: ClusterLayout, statistic: Statistic, resamples: int,
                       reader: UniformRows, batch_elements: int) -> np.ndarray:
    """The clusters draw contract for a Kaplan–Meier statistic: each observation weighted by how many
    times its cluster was drawn (the same resamples as the plain gather, counted instead)."""
    path = SurvivalFastPath(statistic, data)
    clusters = int(lay.cell_start.shape[0])
    owner = [np.empty(a.shape[0], dtype=np.int64) for a in data]  # cluster number of each observation
    for k, members in enumerate(lay.members):
        owner[int(lay.slot_group[k])][members] = k
    rows_per_batch = _rows_per_batch(batch_elements, max(clusters, sum(a.shape[0] for a in data)))
    out = np.empty(resamples, dtype=np.float64)
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        chosen = lay.cell_start + (reader.take(rows) * lay.cell_size).astype(np.int64)  # (rows, C)
        offsets = (np.arange(rows, dtype=np.int64) * clusters)[:, None]
        drawn = np.bincount((chosen + offsets).ravel(), minlength=rows * clusters).reshape(rows, clusters)
        out[done:done + rows] = path.compute_weighted([drawn[:, owner[g]] for g in range(len(data))])
        done += rows
    return out


# ------------------------------------------------------------------ blocks (time order)


def _block_index(u: np.ndarray, n: int, length: int, scheme: str) -> np.ndarray:
    rows = u.shape[0]
    if scheme == "stationary":
        new = u[:, :n] < 1.0 / length
        new[:, 0] = True
        starts = (u[:, n:] * n).astype(np.int64)
        positions = np.arange(n)
        last = np.maximum.accumulate(np.where(new, positions, 0), axis=1)
        return (np.take_along_axis(starts, last, axis=1) + positions - last) % n
    starts = (u * ((n - length + 1) if scheme == "moving" else n)).astype(np.int64)  # (rows, k)
    index = (starts[:, :, None] + np.arange(length)).reshape(rows, -1)[:, :n]
    return index % n if scheme == "circular" else index


def block_width(n: int, length: int, scheme: str) -> int:
    return 2 * n if scheme == "stationary" else math.ceil(n / length)


def check_blocks(data: tuple[np.ndarray, ...], scheme: str, length: int) -> None:
    """Refuse a block scheme the data cannot carry (before any draw: ranges may run on workers)."""
    if scheme not in BLOCK_SCHEMES:
        raise EngineError(f"unknown block scheme {scheme!r}", hint=f"one of: {', '.join(BLOCK_SCHEMES)}")
    if length < 1:
        raise EngineError(f"the block length must be at least 1, got {length}")
    for g, a in enumerate(data):
        if scheme == "moving" and length > a.shape[0]:
            raise EngineError(f"the block length {length} exceeds the {a.shape[0]} observations of group {g + 1}",
                              hint="use a shorter block, or the circular or stationary scheme")


def draw_blocks(data: tuple[np.ndarray, ...], statistic: Statistic, resamples: int, stream: Stream,
                batch_elements: int, *, scheme: str, length: int, start: int = 0) -> np.ndarray:
    """Run the blocks draw contract (each group separately, in its time order) for resamples
    [start, start + resamples); ``check_blocks`` first."""
    widths = [block_width(a.shape[0], length, scheme) for a in data]
    edges = np.concatenate([[0], np.cumsum(widths)])
    reader = UniformRows(stream, int(edges[-1]), start)
    out = np.empty(resamples, dtype=np.float64)
    values = sum(a.shape[0] for a in data) * statistic.columns
    # the numbers do not depend on the batch size, so a batch may stay inside the cache
    rows_per_batch = min(_rows_per_batch(batch_elements, values), _rows_per_batch(CACHE_ELEMENTS, values))
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        u = reader.take(rows)
        gathered = [take_observations(a, _block_index(u[:, edges[g]:edges[g + 1]], a.shape[0], length, scheme))
                    for g, a in enumerate(data)]
        with np.errstate(invalid="ignore", divide="ignore"):
            out[done:done + rows] = statistic.compute(*gathered)
        done += rows
    return out


# ------------------------------------------------------------------ parametric


def fit_model(x: np.ndarray, model: str, trials: int | None, group: int) -> dict[str, float]:
    """Maximum-likelihood fit of one group: normal (mean, sd with divisor n), exponential (mean),
    Poisson (rate), binomial (p = mean / trials, trials known)."""
    where = f"group {group + 1}"
    if x.ndim == 2:
        if model != "normal":
            raise EngineError(f"the {model} model describes one column; two columns need the normal model")
        covariance = np.cov(x.T, bias=True)  # maximum likelihood: divisor n
        try:
            np.linalg.cholesky(covariance)
        except np.linalg.LinAlgError:
            raise EngineError(f"{where}: the two columns are collinear, so no bivariate normal can be fitted") from None
        return {"mean": [float(v) for v in x.mean(axis=0)], "covariance": covariance.tolist()}
    if model == "normal":
        return {"mean": float(np.mean(x)), "sd": float(np.std(x))}
    if model in ("poisson", "binomial") and not np.all(x == np.round(x)):
        raise EngineError(f"{where} has non-integer values; the {model} model needs counts")
    if np.any(x < 0):
        raise EngineError(f"{where} has negative values; the {model} model needs values >= 0")
    if model == "exponential":
        if np.mean(x) <= 0:
            raise EngineError(f"{where} has mean 0; the exponential model cannot be fitted")
        return {"mean": float(np.mean(x))}
    if model == "poisson":
        return {"rate": float(np.mean(x))}
    assert trials is not None
    if np.any(x > trials):
        raise EngineError(f"{where} has counts above trials = {trials}")
    return {"p": float(np.mean(x)) / trials, "trials": float(trials)}


MODEL_SE = {  # the standard error of a group mean under each fitted model, from the group's values
    "normal": "sd (divisor n, maximum likelihood) / sqrt(n)",
    "exponential": "mean / sqrt(n) (the exponential's sd is its mean)",
    "poisson": "sqrt(mean / n) (the Poisson's variance is its mean)",
    "binomial": "sqrt(mean (1 - mean / trials) / n) (the binomial's variance is trials p (1 - p))",
}


def model_se(model: str, groups: Sequence[np.ndarray], fits: Sequence[dict[str, float]]) -> np.ndarray:
    """The model's own standard error of a mean (one group) or of a difference of means (two,
    independent: the root of the summed variances), along the last axis of each group's values:
    the parametric bootstrap-t's se* of each resample and ŝe of the data (``MODEL_SE``)."""
    variance = None
    for x, fit in zip(groups, fits):
        n = x.shape[-1]
        mean = np.mean(x, axis=-1)
        if model == "normal":
            v = np.var(x, axis=-1) / n
        elif model == "exponential":
            v = mean * mean / n
        elif model == "poisson":
            v = mean / n
        else:
            v = mean * (1.0 - mean / fit["trials"]) / n
        variance = v if variance is None else variance + v
    assert variance is not None
    return np.sqrt(np.maximum(variance, 0.0))  # a binomial mean at 0 or trials has variance 0, not −0


def _inverse_cdf(u: np.ndarray, model: str, fit: dict[str, float]) -> np.ndarray:
    if model == "normal":
        return fit["mean"] + fit["sd"] * _dist.norm.ppf(u)
    if model == "exponential":
        return -fit["mean"] * np.log1p(-u)
    if model == "poisson":
        return _dist.poisson.ppf(u, fit["rate"])
    return _dist.binom.ppf(u, int(fit["trials"]), fit["p"])


def draw_parametric(data: tuple[np.ndarray, ...], statistic: Statistic, resamples: int, stream: Stream,
                    batch_elements: int, *, model: str, fits: Sequence[dict[str, float]],
                    inner: str | None, start: int = 0) -> tuple[np.ndarray, np.ndarray | None]:
    """Run the parametric draw contract for resamples [start, start + resamples): each group drawn
    from its fitted model."""
    sizes = [a.shape[0] * (1 if a.ndim == 1 else a.shape[1]) for a in data]
    edges = np.concatenate([[0], np.cumsum(sizes)])
    reader = UniformRows(stream, int(edges[-1]), start)
    out = np.empty(resamples, dtype=np.float64)
    se = np.empty(resamples, dtype=np.float64) if inner else None
    rows_per_batch = _rows_per_batch(batch_elements, int(edges[-1]) * _inner_factor(inner, max(sizes)))
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        u = reader.take(rows) * (1.0 - _OPEN) + _OPEN / 2
        gathered = []
        for g, a in enumerate(data):
            block = u[:, edges[g]:edges[g + 1]]
            if a.ndim == 1:
                gathered.append(np.ascontiguousarray(_inverse_cdf(block, model, fits[g])))
            else:
                # bivariate normal: z = Φ⁻¹(u) read as (columns, n), rows μ + L z (L: Cholesky factor)
                z = _dist.norm.ppf(block).reshape(rows, a.shape[1], a.shape[0])
                factor = np.linalg.cholesky(np.array(fits[g]["covariance"]))
                mean = np.array(fits[g]["mean"])[:, None]
                gathered.append(np.ascontiguousarray(mean + np.einsum("ij,rjn->rin", factor, z)))
        with np.errstate(invalid="ignore", divide="ignore"):
            theta, s = evaluate(statistic, gathered, None if inner == "model" else inner)
            if inner == "model":  # the fitted model's own standard error of each resample's mean(s)
                s = model_se(model, gathered, fits)
        out[done:done + rows] = theta
        if se is not None and s is not None:
            se[done:done + rows] = s
        done += rows
    return out, se


# ------------------------------------------------------------------ exhaustive


def count_multisets(n: int) -> int:
    """Distinct resamples of n observations: C(2n − 1, n) (identity 10)."""
    return math.comb(2 * n - 1, n)


def _multisets(n: int) -> tuple[np.ndarray, np.ndarray]:
    """All multisets of size n from n observations (sorted index rows) and their log-probabilities."""
    index = np.array(list(itertools.combinations_with_replacement(range(n), n)), dtype=np.int64)
    counts = np.zeros((index.shape[0], n), dtype=np.int64)
    np.add.at(counts, (np.repeat(np.arange(index.shape[0]), n), index.ravel()), 1)
    log_p = gammaln(n + 1) - gammaln(counts + 1).sum(axis=1) - n * math.log(n)
    return index, log_p


@dataclass(frozen=True)
class Enumeration:
    """Every distinct resample of every cell: resample k is the k-th of the cells' product, in C order."""

    tables: tuple[tuple[np.ndarray, np.ndarray], ...]  # per cell: multiset index rows, their log-probabilities
    shape: tuple[int, ...]  # multisets per cell
    total: int  # distinct resamples (product over cells)


def enumeration(lay: Layout) -> Enumeration:
    """The cells' multisets, refused beyond ``EXHAUSTIVE_LIMIT`` distinct resamples."""
    sizes = [int(members.shape[0]) for _, members in lay.cells]
    total = math.prod(count_multisets(k) for k in sizes)
    if total > EXHAUSTIVE_LIMIT:
        raise EngineError(f"exhaustive enumeration needs {total} distinct resamples, more than the limit "
                          f"{EXHAUSTIVE_LIMIT}", hint="remove exhaustive: true and draw resamples instead")
    tables = tuple(_multisets(k) for k in sizes)
    return Enumeration(tables, tuple(t[0].shape[0] for t in tables), total)


def enumeration_weights(enum: Enumeration) -> np.ndarray:
    """The multinomial probability of every distinct resample, cells combined as a product."""
    which = np.unravel_index(np.arange(enum.total), enum.shape)
    log_p = np.zeros(enum.total, dtype=np.float64)
    for c, (_, lp) in enumerate(enum.tables):
        log_p += lp[which[c]]
    return np.exp(log_p)


def enumerate_cells(lay: Layout, enum: Enumeration, statistic: Statistic, batch_elements: int, inner: str | None,
                    start: int, stop: int) -> tuple[np.ndarray, np.ndarray | None]:
    """The replicates (and inner SEs) of distinct resamples [start, stop) of ``enum``."""
    width = int(lay.cell_start.shape[0])
    # positions of each cell among the N laid-out positions (cells are consecutive)
    starts = np.concatenate([[0], np.cumsum([t[0].shape[1] for t in enum.tables])])
    n_max = max(b - a for a, b in lay.bounds)
    step = _rows_per_batch(batch_elements, width * statistic.columns * _inner_factor(inner, n_max))
    values = np.empty(stop - start, dtype=np.float64)
    se = np.empty(stop - start, dtype=np.float64) if inner else None
    for begin in range(start, stop, step):
        flat = np.arange(begin, min(stop, begin + step))
        which = np.unravel_index(flat, enum.shape)
        index = np.empty((flat.size, width), dtype=np.int64)
        for c, (idx, _) in enumerate(enum.tables):
            index[:, starts[c]:starts[c + 1]] = lay.cell_start[starts[c]] + idx[which[c]]
        gathered = [take_observations(group, index[:, a:b]) for group, (a, b) in zip(lay.groups, lay.bounds)]
        with np.errstate(invalid="ignore", divide="ignore"):
            theta, s = evaluate(statistic, gathered, inner)
        values[flat - start] = theta
        if se is not None and s is not None:
            se[flat - start] = s
    return values, se


# ------------------------------------------------------------------ range tasks
# Module-level functions of (arguments..., start, stop), bound with `blocks.bind` and handed to
# `blocks.map_resamples`, so that an executor may compute ranges of resamples on other workers. A
# scheme with an inner standard error returns (rows, 2): the replicate, then its standard error.


def _joined(theta: np.ndarray, se: np.ndarray | None) -> np.ndarray:
    return theta if se is None else np.column_stack((theta, se))


def cells_range(lay: Layout, statistic: Statistic, stream: Stream, batch_elements: int, inner: str | None,
                inner_resamples: int, start: int, stop: int) -> np.ndarray:
    return _joined(*draw_cells(lay, statistic, stop - start, stream, batch_elements, inner, inner_resamples,
                               start=start))


def clusters_range(data: tuple[np.ndarray, ...], lay: ClusterLayout, statistic: Statistic, stream: Stream,
                   batch_elements: int, start: int, stop: int) -> np.ndarray:
    return draw_clusters(data, lay, statistic, stop - start, stream, batch_elements, start=start)


def blocks_range(data: tuple[np.ndarray, ...], statistic: Statistic, stream: Stream, batch_elements: int,
                 scheme: str, length: int, start: int, stop: int) -> np.ndarray:
    return draw_blocks(data, statistic, stop - start, stream, batch_elements, scheme=scheme, length=length,
                       start=start)


def parametric_range(data: tuple[np.ndarray, ...], statistic: Statistic, stream: Stream, batch_elements: int,
                     model: str, fits: Sequence[dict[str, float]], inner: str | None, start: int,
                     stop: int) -> np.ndarray:
    return _joined(*draw_parametric(data, statistic, stop - start, stream, batch_elements, model=model,
                                    fits=fits, inner=inner, start=start))


def exhaustive_range(lay: Layout, enum: Enumeration, statistic: Statistic, batch_elements: int,
                     inner: str | None, start: int, stop: int) -> np.ndarray:
    return _joined(*enumerate_cells(lay, enum, statistic, batch_elements, inner, start, stop))
