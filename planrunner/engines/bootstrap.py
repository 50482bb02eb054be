"""Nonparametric bootstrap: standard error, bias, percentile and BCa intervals.

Resampling scheme. Each group is always resampled separately (the group is a stratum); with
``strata`` every (group, stratum) cell is resampled separately, keeping its size.

Draw contract (with :mod:`planrunner.engines.streams`; changing it changes every number):

1. Lay all N observations out cell by cell: group-major, then stratum code in increasing order,
   then the original order within the cell. Position j has ``cell_start[j]`` (the position of its
   cell's first observation) and ``cell_size[j]``.
2. Resample r is row r of the stream's uniform rows (row r % DRAW_BLOCK of block r // DRAW_BLOCK):
   ``u = gen.random(N)``; a batch of consecutive rows is ``gen.random((rows, N))``, identical.
3. Position j of the resample takes observation ``cell_start[j] + floor(u[j] * cell_size[j])``.
   (For u < 1 in doubles, ``u * size`` never rounds up to ``size``, so no clipping is needed.)
4. The statistic is computed on the gathered groups, vectorised over the rows of a batch.

Memory: a batch holds at most about ``batch_elements`` draws (at least one row); the numbers do
not depend on the batch size.

Conventions (also returned in ``BootstrapResult.conventions``):

* standard error: sd of the B replicates with divisor B − 1 (E&T eq. 6.6); bias: mean(θ*) − θ̂.
* quantiles: inverse of the empirical CDF, ``np.quantile(..., method="inverted_cdf")``,
  i.e. the smallest replicate whose empirical CDF reaches the level (level·B within 1e-9 of an
  integer is snapped to it, so float rounding of 1 − confidence cannot shift an endpoint).
* BCa (E&T ch. 14): z0 = Φ⁻¹((#{θ* < θ̂} + #{θ* ≤ θ̂}) / (2B)) (mid-rank, as scipy), with ties
  judged to a relative tolerance; adjusted levels Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α))).
* acceleration from the delete-one jackknife. One sample: E&T eq. 14.15,
  a = Σ(θ̄ − θ_(i))³ / (6 [Σ(θ̄ − θ_(i))²]^{3/2}). Several independently resampled samples
  (groups, or group × stratum cells): E&T eq. 15.36 as in scipy.stats.bootstrap,
  U_ji = (n_j − 1)(θ̄_j − θ_(j,i)), a = Σ_j Σ_i U³/n_j³ / (6 [Σ_j Σ_i U²/n_j²]^{3/2}),
  which reduces to eq. 14.15 for one sample.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr, ndtri

from planrunner.errors import EngineError
from planrunner.engines.jackknife import SMALL_SAMPLE, jackknife_replicates
from planrunner.engines.results import BootstrapResult, EngineWarning, Interval, frozen_array
from planrunner.engines.statistics import (
    Statistic,
    check_samples,
    check_strata,
    take_observations,
    to_compute_layout,
)
from planrunner.engines.blocks import bind, map_resamples
from planrunner.engines.fastpaths import batch_rows, median_of_draws, median_window, window_codes
from planrunner.engines.streams import Stream, UniformRows

__all__ = [
    "BootstrapResult",
    "INTERVAL_METHODS",
    "bca_acceleration",
    "bca_levels",
    "bootstrap",
    "percentile_of_score",
    "quantile_rank",
]

TIE_TOLERANCE = 1e-10  # relative; values this close to θ̂ count as ties (rounding, not data)
TAIL_MINIMUM = 10  # common practice: an endpoint with fewer replicates beyond it is mostly noise

CONVENTIONS = {
    "standard_error": "sd of the replicates, divisor B-1",
    "bias": "mean of the replicates minus the estimate",
    "quantile": "inverse empirical CDF (numpy method 'inverted_cdf'): smallest replicate whose "
                "empirical CDF reaches the level; level*B within 1e-9 of an integer is snapped to it",
    "bca_z0": "mid-rank: inverse normal of (#{theta* < theta_hat} + #{theta* <= theta_hat}) / (2B), "
              "ties to relative tolerance 1e-10",
    "bca_acceleration": "delete-one jackknife, E&T eq. 14.15 for one sample; for several independently "
                        "resampled samples (groups or group x stratum cells) E&T eq. 15.36 as in "
                        "scipy.stats.bootstrap",
    "bca_levels": "Phi(z0 + (z0 + z_alpha) / (1 - a (z0 + z_alpha)))",
    "draws": "one uniform row per resample; observation cell_start + floor(u * cell_size)",
}


@dataclass(frozen=True)
class _Context:
    """What an interval method may read."""

    estimate: float
    distribution: np.ndarray  # sorted replicates
    confidence: float
    z0: float | None
    acceleration: float | None
    bca_problem: str | None  # why BCa is undefined, if it is


IntervalMethod = Callable[[_Context], Interval]


def bca_levels(z0: float, acceleration: float, levels: np.ndarray | Sequence[float] | float) -> np.ndarray:
    """BCa adjusted quantile levels Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α))), E&T eq. 14.10.

    With z0 = 0 and a = 0 they equal the nominal levels (identity 12).
    """
    z = z0 + ndtri(np.asarray(levels, dtype=np.float64))
    return ndtr(z0 + z / (1.0 - acceleration * z))


def bca_acceleration(replicates: Sequence[np.ndarray]) -> float:
    """Acceleration from delete-one replicates of one or more independently resampled samples.

    One sample: a = Σ(θ̄ − θ_(i))³ / (6 [Σ(θ̄ − θ_(i))²]^{3/2}) (E&T eq. 14.15). Several: with
    U_ji = (n_j − 1)(θ̄_j − θ_(j,i)), a = Σ U³/n_j³ / (6 [Σ U²/n_j²]^{3/2}) (E&T eq. 15.36, scipy).
    NaN when every replicate equals its sample's mean (no spread to measure skewness with).
    """
    num = 0.0
    den = 0.0
    for reps in replicates:
        r = np.asarray(reps, dtype=np.float64)
        n = r.shape[0]
        if n < 2:
            continue  # a single observation cannot move: U = 0
        u = (n - 1) * (np.mean(r) - r)
        num += float(np.sum(u ** 3)) / n ** 3
        den += float(np.sum(u ** 2)) / n ** 2
    scale = 6.0 * den ** 1.5
    if scale == 0.0 or not math.isfinite(scale):
        return math.nan  # no spread (or one too small to square and cube in floating point)
    return num / scale


def percentile_of_score(distribution: np.ndarray, score: float, tolerance: float) -> float:
    """Mid-rank (#{θ* < score} + #{θ* ≤ score}) / (2B), ties judged within ``tolerance``."""
    below = np.count_nonzero(distribution < score - tolerance)
    at_or_below = np.count_nonzero(distribution <= score + tolerance)
    return (below + at_or_below) / (2.0 * distribution.shape[0])


def quantile_rank(level: float, resamples: int) -> int:
    """1-based rank k of the inverse-CDF quantile: the smallest k with k/B ≥ level.

    Equals ``np.quantile(..., method="inverted_cdf")`` except that level·B within 1e-9 of an
    integer is snapped to it, so that rounding in 1 − confidence (0.025000000000000022 for 95%)
    cannot move an endpoint by one replicate.
    """
    position = level * resamples
    nearest = round(position)
    k = nearest if abs(position - nearest) <= 1e-9 * max(1.0, position) else math.ceil(position)
    return min(max(int(k), 1), resamples)


def _read(ordered: np.ndarray, level: float) -> float:
    return float(ordered[quantile_rank(level, ordered.shape[0]) - 1])


def _percentile(ctx: _Context) -> Interval:
    alpha = 1.0 - ctx.confidence
    levels = (alpha / 2, 1 - alpha / 2)
    return Interval("percentile", ctx.confidence, _read(ctx.distribution, levels[0]),
                    _read(ctx.distribution, levels[1]), quantile_levels=levels)


def _bca(ctx: _Context) -> Interval:
    if ctx.bca_problem is not None:
        return Interval("bca", ctx.confidence, None, None, note=ctx.bca_problem)
    alpha = 1.0 - ctx.confidence
    assert ctx.z0 is not None and ctx.acceleration is not None
    lo, hi = (float(v) for v in bca_levels(ctx.z0, ctx.acceleration, [alpha / 2, 1 - alpha / 2]))
    return Interval("bca", ctx.confidence, _read(ctx.distribution, lo), _read(ctx.distribution, hi),
                    quantile_levels=(lo, hi))


# basic, normal and studentized intervals slot in here
INTERVAL_METHODS: dict[str, IntervalMethod] = {"percentile": _percentile, "bca": _bca}


@dataclass(frozen=True)
class _Layout:
    """Observations laid out cell by cell (see the draw contract)."""

    groups: tuple[np.ndarray, ...]  # each group's observations in cell order (observation axis first)
    bounds: tuple[tuple[int, int], ...]  # [start, stop) of each group among the N positions
    cell_start: np.ndarray  # (N,) group-local position of the first observation of j's cell
    cell_size: np.ndarray  # (N,) float, size of j's cell
    cells: tuple[tuple[int, np.ndarray], ...]  # (group, original indices) of every cell


def _layout(data: tuple[np.ndarray, ...], strata: tuple[np.ndarray, ...] | None) -> _Layout:
    groups, bounds, starts, sizes, cells = [], [], [], [], []
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
    return _Layout(tuple(groups), tuple(bounds), np.concatenate(starts).astype(np.int64),
                   np.concatenate(sizes), tuple(cells))


def bootstrap(samples: Sequence[np.ndarray], statistic: Statistic, *, resamples: int, confidence: float,
              intervals: Sequence[str], stream: Stream, strata: Sequence[np.ndarray] | None = None,
              batch_elements: int = 2_000_000) -> BootstrapResult:
    """Bootstrap ``statistic`` over ``resamples`` resamples drawn from ``stream``.

    ``samples``: one array per group, shape (n_g,) or (n_g, columns), observation axis first.
    ``strata``: optional integer codes per group; resampling is then within (group, stratum) cells.
    """
    if resamples < 2:
        raise EngineError(f"resamples must be at least 2, got {resamples}", hint="use 999 or more")
    if not 0.0 < confidence < 1.0:
        raise EngineError(f"confidence must lie strictly between 0 and 1, got {confidence}")
    unknown = [m for m in intervals if m not in INTERVAL_METHODS]
    if unknown:
        raise EngineError(f"unknown interval method(s) {', '.join(map(repr, unknown))}",
                          hint=f"known: {', '.join(INTERVAL_METHODS)}")
    if batch_elements < 1:
        raise ValueError("batch_elements must be >= 1")
    data = check_samples(samples, statistic, method="the bootstrap")
    codes = check_strata(strata, data)
    layout = _layout(data, codes)
    n = tuple(int(a.shape[0]) for a in data)

    estimate = float(statistic.compute(*[to_compute_layout(a) for a in data]))
    if not math.isfinite(estimate):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")

    distribution = _draw(layout, statistic, resamples, stream, batch_elements)

    warnings = _data_warnings(n, layout, codes is not None)
    if codes is None:
        scheme = "rows resampled" if len(data) == 1 else "each group resampled separately"
    else:
        scheme = "within group × stratum cells"

    def finish(standard_error: float | None, bias: float | None, found: tuple[Interval, ...],
               z0: float | None = None, acceleration: float | None = None) -> BootstrapResult:
        return BootstrapResult(
            estimate=estimate, standard_error=standard_error, bias=bias, intervals=found,
            resamples=resamples, scheme=scheme, n=n, distribution=frozen_array(distribution),
            z0=z0, acceleration=acceleration, conventions=dict(CONVENTIONS), warnings=tuple(warnings))

    def no_intervals(note: str) -> tuple[Interval, ...]:
        return tuple(Interval(m, confidence, None, None, note=note) for m in intervals)

    finite = np.isfinite(distribution)
    if not finite.all():
        bad = int((~finite).sum())
        warnings.append(EngineWarning(
            "non-finite-replicates",
            f"the statistic is not finite on {bad} of {resamples} resamples; no standard error, "
            "bias or interval is reported"))
        return finish(None, None, no_intervals(f"{bad} of {resamples} replicates are not finite"))

    standard_error = float(np.std(distribution, ddof=1))
    bias = float(np.mean(distribution)) - estimate
    lowest, highest = float(distribution.min()), float(distribution.max())

    # all replicates equal up to rounding: constant data (or constant cells); no interval
    if highest - lowest <= 1e-12 * max(abs(lowest), abs(highest)):
        warnings.append(EngineWarning(
            "degenerate-distribution",
            f"all {resamples} bootstrap replicates are equal ({lowest!r}): the data do not vary within "
            "the resampled groups or cells, so no interval can be formed"))
        return finish(standard_error, bias, no_intervals(f"all {resamples} replicates equal {lowest!r}"))

    ordered = np.sort(distribution)
    z0 = acceleration = problem = None
    if "bca" in intervals:
        # ties judged relative to the data's magnitude: rounding, not data, separates such values
        tolerance = TIE_TOLERANCE * max(abs(estimate), max(float(np.max(np.abs(a))) for a in data))
        z0, acceleration, problem = _bca_constants(data, statistic, layout, ordered, estimate,
                                                   tolerance, confidence, batch_elements)
        if problem is not None:
            warnings.append(EngineWarning("bca-undefined", f"no BCa interval: {problem}"))
        if not statistic.smooth:
            warnings.append(EngineWarning(
                "bca-non-smooth",
                f"the BCa interval is doubtful for the {statistic.label}, which is not a smooth statistic: "
                "its jackknife acceleration and the bias correction from a discrete bootstrap "
                "distribution are unreliable; compare with the percentile interval"))

    ctx = _Context(estimate, ordered, confidence, z0, acceleration, problem)
    found = tuple(INTERVAL_METHODS[m](ctx) for m in intervals)
    warnings.extend(_tail_warnings(found, ordered))
    return finish(standard_error, bias, found, z0, acceleration)


def _data_warnings(n: tuple[int, ...], layout: _Layout, stratified: bool) -> list[EngineWarning]:
    warnings = []
    small = [f"group {g + 1} (n = {k})" for g, k in enumerate(n) if k < SMALL_SAMPLE]
    if small:
        warnings.append(EngineWarning(  # common practice
            "small-sample",
            f"fewer than {SMALL_SAMPLE} observations in {', '.join(small)}: the bootstrap distribution "
            "is coarse and its intervals tend to be too narrow"))
    lonely = sum(1 for _, members in layout.cells if members.shape[0] == 1)
    if stratified and lonely:
        warnings.append(EngineWarning(
            "single-observation-cell",
            f"{lonely} group × stratum cell(s) hold a single observation; such a cell is the same in "
            "every resample and adds no variability"))
    return warnings


def _tail_warnings(found: tuple[Interval, ...], ordered: np.ndarray) -> list[EngineWarning]:
    """Common practice: an endpoint with fewer than TAIL_MINIMUM replicates beyond it is mostly noise."""
    warnings = []
    for iv in found:
        if iv.lower is None or iv.upper is None:
            continue
        below = int(np.count_nonzero(ordered < iv.lower))
        above = int(np.count_nonzero(ordered > iv.upper))
        if min(below, above) < TAIL_MINIMUM:
            warnings.append(EngineWarning(
                "few-resamples-in-tail",
                f"only {below} replicate(s) lie below and {above} above the {iv.method} interval "
                f"(fewer than {TAIL_MINIMUM} in a tail): the endpoint is poorly determined by "
                f"{ordered.shape[0]} resamples; use more resamples"))
    return warnings


def _draw(layout: _Layout, statistic: Statistic, resamples: int, stream: Stream,
          batch_elements: int) -> np.ndarray:
    """Run the draw contract; returns the B replicates in resample order.

    The resamples may be split into ranges computed elsewhere (``blocks.map_resamples``); each
    range runs the fast kernels of ``_draw_range``, equal bit for bit to ``_draw_plain``.
    """
    task = bind(_draw_range, layout, statistic, stream, batch_elements)
    return map_resamples(task, resamples)


def _draw_range(layout: _Layout, statistic: Statistic, stream: Stream, batch_elements: int,
                start: int, stop: int) -> np.ndarray:
    """Replicates of resamples [start, stop): the draw contract with cache-sized batches, in-place
    arithmetic, and the median from a window of the sorted data (``fastpaths``)."""
    width = int(layout.cell_start.shape[0])
    rows_per_batch = batch_rows(width * statistic.columns, batch_elements)
    reader = UniformRows(stream, width, start)
    total = stop - start
    out = np.empty(total, dtype=np.float64)
    median = statistic.form == "median" and statistic.columns == 1
    codes = [window_codes(group, median_window(np.sort(group))) for group in layout.groups] if median else []
    index_buffer = np.empty((min(rows_per_batch, total), width), dtype=np.int64)
    offsets = bool(layout.cell_start.any())  # False when every group is a single cell
    done = 0
    while done < total:
        rows = min(rows_per_batch, total - done)
        u = reader.take(rows)
        index = index_buffer[:rows]
        # the double product u * size cast to integers on output, as .astype: truncation, i.e. floor
        if offsets:
            np.multiply(u, layout.cell_size, out=index, casting="unsafe")
            index += layout.cell_start
        else:  # one cell per group: its size is one number (the same product, less memory traffic)
            for lo, hi in layout.bounds:
                np.multiply(u[:, lo:hi], float(hi - lo), out=index[:, lo:hi], casting="unsafe")
        if median:
            # form "median": the group's median, or the first group's minus the second's
            located = [median_of_draws(group, index[:, lo:hi], c)
                       for group, (lo, hi), c in zip(layout.groups, layout.bounds, codes)]
            out[done:done + rows] = located[0] if len(located) == 1 else located[0] - located[1]
        else:
            gathered = [take_observations(group, index[:, lo:hi])
                        for group, (lo, hi) in zip(layout.groups, layout.bounds)]
            with np.errstate(invalid="ignore", divide="ignore"):
                out[done:done + rows] = statistic.compute(*gathered)
        done += rows
    return out


def _draw_plain(layout: _Layout, statistic: Statistic, resamples: int, stream: Stream,
                batch_elements: int) -> np.ndarray:
    """The draw contract as written, without fast kernels: the reference the fast paths are tested
    against."""
    width = int(layout.cell_start.shape[0])
    rows_per_batch = max(1, batch_elements // (width * statistic.columns))
    reader = UniformRows(stream, width)
    out = np.empty(resamples, dtype=np.float64)
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        u = reader.take(rows)
        # truncation is floor here because u * size >= 0
        index = layout.cell_start + (u * layout.cell_size).astype(np.int64)
        gathered = [take_observations(group, index[:, start:stop])
                    for group, (start, stop) in zip(layout.groups, layout.bounds)]
        # undefined values are detected and reported by the caller, not printed by numpy
        with np.errstate(invalid="ignore", divide="ignore"):
            out[done:done + rows] = statistic.compute(*gathered)
        done += rows
    return out


def _bca_constants(data: tuple[np.ndarray, ...], statistic: Statistic, layout: _Layout,
                   ordered: np.ndarray, estimate: float, tolerance: float, confidence: float,
                   batch_elements: int) -> tuple[float | None, float | None, str | None]:
    """z0, acceleration, and the reason BCa is undefined (None when it is defined)."""
    share = percentile_of_score(ordered, estimate, tolerance)
    z0 = float(ndtri(share))
    if not math.isfinite(z0):
        side = "above" if share == 0.0 else "below"
        return None, None, f"every replicate lies {side} the estimate, so the bias correction z0 is infinite"
    if any(a.shape[0] < 2 for a in data):
        return z0, None, "a group has a single observation, so the jackknife acceleration is undefined"
    replicates = jackknife_replicates(data, statistic, batch_elements=batch_elements)
    # each independently resampled cell is one sample of E&T eq. 15.36
    per_cell = [replicates[g][members] for g, members in layout.cells]
    acceleration = bca_acceleration(per_cell)
    if not math.isfinite(acceleration):
        return z0, None, ("the delete-one jackknife values do not vary, so the acceleration is undefined")
    alpha = 1.0 - confidence
    z = z0 + ndtri(np.array([alpha / 2, 1 - alpha / 2]))
    if np.any(1.0 - acceleration * z <= 0.0):
        return z0, acceleration, (f"the acceleration {acceleration:.4g} is so large that the level "
                                  "adjustment is not monotone")
    return z0, acceleration, None
