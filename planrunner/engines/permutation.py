"""Permutation test of two or more groups (labels shuffled over all rows, or within strata).

Null: under exchangeability of the group labels (within each stratum), every assignment of the
observed group sizes to the rows of a stratum is equally likely. Arrangements =
∏_h N_h! / ∏_g n_gh! (identity 18; C(N_h, n1_h) for two groups).

Layout: observations are pooled stratum by stratum (stratum codes in increasing order, dense
index h = 0, 1, ...); within a stratum, group 1's observations, then group 2's, and so on, each in
original order. Slots of a stratum block are labelled: the first n1_h slots are group 1, the next
n2_h group 2, ... The observed arrangement puts every observation in its own slot.

Exact enumeration: for two groups the group-1 positions of each stratum run over
``itertools.combinations`` of the block in lexicographic order, strata combined by
``itertools.product``; for more groups each stratum's distinct label sequences are listed the same
way (group 1's positions, then group 2's among the rest, ...). Evaluated in bounded chunks. The
observed arrangement is one of them.

Exact by dynamic programming (:mod:`planrunner.engines.exactdist`): for a two-group statistic that
increases with the first group's score sum (``teststats.SUM_SCORES``: mean and proportion
differences, pooled t, rank sum) and integer-valued scores, the exact null of that sum replaces
enumeration whenever the programme visits fewer cells than enumeration would visit values
(arrangements × N), and when there are too many arrangements to list. ``fast=False`` keeps
enumeration wherever it is feasible (the tests compare the two).

Monte Carlo draw contract (with :mod:`planrunner.engines.streams`): resample r is row r of the
stream's uniform rows, ``keys = gen.random(N)``; ``np.argsort(keys + 2 * h, kind="stable")`` (h the
dense stratum index of each position) lists, block by block, the positions of each stratum in key
order, and slot s receives the observation at that position. Rows are drawn in order; memory
batches split rows, never change them.

Fast path: for a difference of means (or proportions) only the first group's sum S1 is gathered,
T = S1/n1 − (Σx − S1)/n2 (DEVELOPERS.md: fast paths). Monte Carlo draws then find group 1's positions without
sorting the keys (a window around the n1-th smallest key, :func:`_first_group_sums`): the same
arrangements as the argsort, summed in another order. The plain computation is kept
(``fast=False``) and tests check that both count the same arrangements.

p-values: see :mod:`planrunner.engines.pvalues` (exact count / arrangements; Monte Carlo
(b + 1)/(m + 1); two-sided ``doubled`` or ``absolute``). Comparisons allow
``tolerance = 2**-43 · max(|t|, scale)`` (scale = the largest absolute data value) so that values
equal in exact arithmetic count as equal.
"""
from __future__ import annotations

import itertools
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.engines.blocks import bind as range_task
from planrunner.engines.exactdist import (
    EXACT_FROM,
    WORK_LIMIT,
    dp_work,
    exact_sum_distribution,
    integer_scores,
    sum_distribution,
)
from planrunner.engines.permcore import (
    DYNAMIC_PROGRAMMING,
    ENUMERATION,
    ENUMERATION_LIMIT,
    MONTE_CARLO,
    ComputedNull,
    Description,
    Judge,
    PermutationOptions,
    all_ties,
    check_null,
    choose_computation,
    monte_carlo_null,
    observed_value,
    permutation_result,
    tie_tolerance,
)
from planrunner.engines.results import EngineWarning, PermutationResult
from planrunner.engines.statistics import (
    Statistic,
    check_samples,
    check_strata,
    take_observations,
    to_compute_layout,
)
from planrunner.engines.streams import Stream, UniformRows
from planrunner.engines.teststats import SUM_SCORES
from planrunner.errors import EngineError

__all__ = ["ENUMERATION_LIMIT", "PermutationOptions", "PermutationResult", "computation", "first_group_sums",
           "mean_difference_task", "monte_carlo_mean_difference",
           "permutation_test"]

FEW_ARRANGEMENTS = 20  # common practice: below 20 the smallest attainable p exceeds 0.05
TWO_SIDED_TEXT = {
    "doubled": "min(1, 2 min(p_greater, p_less))",
    "absolute": "|T* - c| >= |t - c| - tolerance, c the centre of the null (0 for differences)",
}


@dataclass(frozen=True)
class _Pooled:
    values: np.ndarray  # (N,) or (N, k), stratum-major then group-major
    stratum: np.ndarray  # (N,) dense stratum index of each position
    slots: tuple[np.ndarray, ...]  # slot positions of each group, increasing
    blocks: tuple[tuple[int, int, tuple[int, ...]], ...]  # (start, size, sizes of the groups) per stratum


def _pool(data: tuple[np.ndarray, ...], strata: tuple[np.ndarray, ...] | None) -> _Pooled:
    codes = [np.zeros(a.shape[0], dtype=np.int64) for a in data] if strata is None else list(strata)
    levels = np.unique(np.concatenate(codes))
    pieces, stratum, slot_group, blocks = [], [], [], []
    start = 0
    for h, level in enumerate(levels):
        sizes = []
        for g, (a, c) in enumerate(zip(data, codes)):
            part = a[c == level]
            pieces.append(part)
            sizes.append(part.shape[0])
            slot_group.append(np.full(part.shape[0], g))
        size = sum(sizes)
        stratum.append(np.full(size, h, dtype=np.int64))
        blocks.append((start, size, tuple(sizes)))
        start += size
    labels = np.concatenate(slot_group)
    values = np.ascontiguousarray(np.concatenate(pieces))
    values.flags.writeable = False
    return _Pooled(values, np.concatenate(stratum),
                   tuple(np.flatnonzero(labels == g) for g in range(len(data))), tuple(blocks))


def permutation_test(samples: Sequence[np.ndarray], statistic: Statistic, options: PermutationOptions, *,
                     stream: Stream, strata: Sequence[np.ndarray] | None = None, fast: bool = True,
                     batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of ``statistic`` (two groups: first minus second; or k groups) against
    label exchangeability (within ``strata`` when given).

    Exact nulls come from enumeration or, when it applies and costs less, from the DP null (see
    the module notes); Monte Carlo draws ``options.resamples`` arrangements from ``stream``.
    """
    if statistic.samples not in (0, 2):
        raise EngineError(
            f"the permutation test of groups needs a statistic of two or more groups; {statistic.name!r} "
            f"takes {statistic.samples}", hint="use a difference statistic such as mean_difference")
    if batch_elements < 1:
        raise ValueError("batch_elements must be >= 1")
    data = check_samples(samples, statistic, method="the permutation test")
    codes = check_strata(strata, data)
    pooled = _pool(data, codes)
    observed = observed_value(statistic, *[to_compute_layout(a) for a in data])
    rows_per_batch = max(1, batch_elements // (pooled.values.shape[0] * statistic.columns))
    scale = max(float(np.max(np.abs(a))) for a in data)
    tolerance = tie_tolerance(observed, scale)  # observed is finite (checked above)
    judge = Judge(observed, null_centre(pooled, statistic), lambda values: tolerance)
    null = _null(pooled, statistic, options, stream, rows_per_batch, fast, judge)
    check_null(null.values, statistic)

    warnings = []
    if null.arrangements < FEW_ARRANGEMENTS:
        warnings.append(EngineWarning(
            "few-arrangements",
            f"only {null.arrangements} distinct arrangement(s) of the labels exist, so the smallest attainable "
            f"p-value is {1 / null.arrangements:.3g}: the test cannot reach 0.05"))
    if all_ties(null.values, observed, tolerance):
        warnings.append(EngineWarning(
            "degenerate-distribution",
            "every arrangement gives the observed value of the statistic (the data do not vary "
            "between the groups' labels), so p = 1 carries no information"))
    about = Description(
        n=tuple(int(a.shape[0]) for a in data),
        scheme="labels shuffled over all rows" if codes is None else "labels shuffled within strata",
        conventions={
            "p_value": "exact: count / arrangements (observed arrangement included); "
                       "Monte Carlo: (count + 1) / (resamples + 1)",
            "two_sided": TWO_SIDED_TEXT[options.two_sided],
            "ties": "T* >= t - tolerance counts as greater or equal; tolerance = 2^-43 max(|t|, max|x|)",
            "draws": "one uniform row of keys per resample; argsort(keys + 2 * stratum) within strata",
        })
    return permutation_result(null, observed, options, tolerance=tolerance, about=about,
                              centre=null_centre(pooled, statistic), warnings=tuple(warnings))


def computation(samples: Sequence[np.ndarray], statistic: Statistic, options: PermutationOptions, *,
                strata: Sequence[np.ndarray] | None = None, fast: bool = True) -> str:
    """The computation :func:`permutation_test` will use on these data, or its refusal (raised), from
    the counts and the DP plan alone: ``check`` calls it so that it finds what a run would refuse."""
    data = check_samples(samples, statistic, method="the permutation test")
    pooled = _pool(data, check_strata(strata, data))
    observed_value(statistic, *[to_compute_layout(a) for a in data])
    return _choose(pooled, statistic, options, fast)[0]


def monte_carlo_mean_difference(samples: Sequence[np.ndarray], statistic: Statistic, options: PermutationOptions,
                                strata: Sequence[np.ndarray] | None = None
                                ) -> tuple[np.ndarray, tuple[tuple[int, int, tuple[int, ...]], ...]] | None:
    """The pooled values and stratum blocks over which :func:`permutation_test` draws the Monte Carlo
    null of a difference of means (or proportions) on these data (``engines/batched.py`` draws many
    data sets' nulls at once); None when it would not draw that null (another statistic, an exact
    null by enumeration or DP)."""
    data = check_samples(samples, statistic, method="the permutation test")
    pooled = _pool(data, check_strata(strata, data))
    if statistic.samples not in (0, 2) or not _sums_suffice(pooled, statistic):
        return None
    if _choose(pooled, statistic, options, True)[0] != MONTE_CARLO:
        return None
    return pooled.values, pooled.blocks


def mean_difference_task(task: Any) -> tuple[np.ndarray, tuple[tuple[int, int, tuple[int, ...]], ...], Stream] | None:
    """The pooled values, stratum blocks and stream of a Monte Carlo range task of this engine that
    draws the null of a difference of means by the first group's sums, or None for any other task
    (``engines/batched.py`` answers only that task from a batch)."""
    if not (isinstance(task, range_task) and task.function is _random_range):
        return None
    pooled, statistic, stream, _, fast = task.args
    return (pooled.values, pooled.blocks, stream) if fast and _sums_suffice(pooled, statistic) else None


def _choose(pooled: _Pooled, statistic: Statistic, options: PermutationOptions,
            fast: bool) -> tuple[str, int, Any]:
    """(computation, arrangements, DP plan) by the one rule of ``choose_computation``."""
    arrangements = math.prod(_multinomial(sizes) for _, _, sizes in pooled.blocks)
    dp_plan = _dp_plan(pooled, statistic) if len(pooled.slots) == 2 else None
    cheaper = fast and dp_plan is not None and dp_plan.work <= arrangements * pooled.values.shape[0]
    path = choose_computation(arrangements, options, shortcut=dp_plan is not None, shortcut_first=cheaper,
                              statistic=statistic.name)
    return path, arrangements, dp_plan


def _null(pooled: _Pooled, statistic: Statistic, options: PermutationOptions, stream: Stream,
          rows_per_batch: int, fast: bool, judge: Judge | None = None) -> ComputedNull:
    """The null by the cheapest exact way allowed, or by Monte Carlo (the label-shuffle space)."""
    path, arrangements, dp_plan = _choose(pooled, statistic, options, fast)
    if path == DYNAMIC_PROGRAMMING:
        assert dp_plan is not None
        values, weights, exponent, exact = _dp_null(pooled, statistic, dp_plan, arrangements)
        return ComputedNull(values, path, arrangements, weights, exponent, exact)
    if path == ENUMERATION:
        values = _evaluate(pooled, statistic, _enumerate(pooled, rows_per_batch), arrangements, fast=fast)
        return ComputedNull(values, path, arrangements)
    # ranges of resamples may run on other workers (engines.blocks); the same numbers
    task = range_task(_random_range, pooled, statistic, stream, rows_per_batch, fast)
    return monte_carlo_null(task, options, arrangements, judge)


def null_centre(pooled: _Pooled, statistic: Statistic) -> float:
    """Centre c of the null for the two-sided ``absolute`` rule.

    For the sum statistics (differences of means or proportions, the rank sum) it is the exact null
    mean, from E[S1] = Σ_h n1_h · (mean score of stratum h); for every other statistic it is 0 (a
    stated convention: differences, t and correlations are centred at 0 without strata).
    """
    if statistic.name not in ("mean_difference", "risk_difference", "rank_sum") or len(pooled.slots) != 2:
        return 0.0
    scores = SUM_SCORES[statistic.name](pooled.values)
    expected = sum(sizes[0] * float(scores[start:start + size].mean()) for start, size, sizes in pooled.blocks)
    if statistic.name == "rank_sum":
        return expected
    n1, n2 = int(pooled.slots[0].size), int(pooled.slots[1].size)
    return expected / n1 - (float(scores.sum()) - expected) / n2


def _multinomial(sizes: tuple[int, ...]) -> int:
    out, left = 1, sum(sizes)
    for s in sizes:
        out *= math.comb(left, s)
        left -= s
    return out


@dataclass(frozen=True)
class _DpPlan:
    strata: tuple[tuple[np.ndarray, int], ...]  # integer scores of each stratum block, group-1 size
    scale: float  # scores = integers / scale
    scores: np.ndarray  # pooled scores (values, or mid-ranks), as floats
    work: int  # cells the programme visits (enumeration visits arrangements × N values)


def _dp_plan(pooled: _Pooled, statistic: Statistic) -> _DpPlan | None:
    """The exact-sum shortcut when it applies: a sum-monotone statistic on integer-valued scores."""
    if statistic.name not in SUM_SCORES or statistic.columns != 1:
        return None
    scores = SUM_SCORES[statistic.name](pooled.values)
    found = integer_scores(scores)
    if found is None:
        return None
    integers, scale = found
    strata = tuple((integers[start:start + size], sizes[0]) for start, size, sizes in pooled.blocks)
    work = sum(dp_work(s, k) for s, k in strata)
    if work > WORK_LIMIT:
        return None
    return _DpPlan(strata, scale, scores, work)


def _dp_null(pooled: _Pooled, statistic: Statistic, plan: _DpPlan,
             arrangements: int) -> tuple[np.ndarray, np.ndarray, int, np.ndarray | None]:
    """Support of the exact null (statistic values), the number of arrangements at each (times
    2**exponent) and, beyond 2**53 arrangements, the same numbers as exact integers (None beyond
    the exact programme's limits; below 2**53 the float counts are exact)."""
    offset, counts, exponent = sum_distribution(plan.strata)
    exact = exact_sum_distribution(plan.strata) if arrangements > EXACT_FROM else None
    if exact is not None:
        assert exact[0] == offset and len(exact[1]) == counts.size  # the same sums as the float programme
    keep = counts > 0 if exact is None else np.array([c > 0 for c in exact[1]])
    sums = (offset + np.flatnonzero(keep)) / plan.scale  # S1 in score units
    x = pooled.values
    n1 = int(pooled.slots[0].size)
    n2 = x.shape[0] - n1
    total = float(plan.scores.sum())
    if statistic.name == "rank_sum":
        values = sums
    elif statistic.name == "risk_ratio":
        with np.errstate(divide="ignore", invalid="ignore"):
            values = (sums / n1) / ((total - sums) / n2)
    else:
        diff = sums / n1 - (total - sums) / n2
        if statistic.name == "t_pooled":
            # within-group sum of squares from the fixed Σx² and the group sums
            within = float(np.sum(x * x)) - sums ** 2 / n1 - (total - sums) ** 2 / n2
            with np.errstate(invalid="ignore", divide="ignore"):
                values = diff / np.sqrt(np.maximum(within, 0.0) / (n1 + n2 - 2) * (1.0 / n1 + 1.0 / n2))
        else:
            values = diff
    exact_kept = None if exact is None else np.array([c for c in exact[1] if c > 0], dtype=object)
    return values, counts[keep], exponent, exact_kept


def _evaluate(pooled: _Pooled, statistic: Statistic, batches: Iterator[tuple[np.ndarray, ...]],
              total: int, *, fast: bool = True) -> np.ndarray:
    """Statistic over batches of arrangements; a batch gives each group's pooled positions per row."""
    out = np.empty(total, dtype=np.float64)
    done = 0
    mean_form = fast and _sums_suffice(pooled, statistic)
    if mean_form:
        n1, n2 = pooled.slots[0].size, pooled.slots[1].size
        grand = float(pooled.values.sum())
    for positions in batches:
        rows = positions[0].shape[0]
        with np.errstate(invalid="ignore", divide="ignore"):  # reported by the caller
            if mean_form:
                # the fast path: only the first group's sum is gathered (DEVELOPERS.md: fast paths)
                first = pooled.values[positions[0]].sum(axis=1)
                out[done:done + rows] = first / n1 - (grand - first) / n2
            else:
                groups = [take_observations(pooled.values, p) for p in positions]
                out[done:done + rows] = statistic.compute(*groups)
        done += rows
    assert done == total
    return out


def _random_range(pooled: _Pooled, statistic: Statistic, stream: Stream, rows_per_batch: int, fast: bool,
                  start: int, stop: int) -> np.ndarray:
    """The null statistic of resamples [start, stop) (a picklable range task)."""
    if fast and _sums_suffice(pooled, statistic):
        return _mean_difference_range(pooled, stream, rows_per_batch, start, stop)
    return _evaluate(pooled, statistic, _random(pooled, stream, stop - start, rows_per_batch, start=start),
                     stop - start, fast=fast)


def _sums_suffice(pooled: _Pooled, statistic: Statistic) -> bool:
    """A difference of two means (or proportions) needs only the first group's sum (DEVELOPERS.md: fast paths)."""
    return statistic.form == "mean" and len(pooled.slots) == 2 and pooled.values.ndim == 1


KEY_WINDOW_SDS = 5.0  # half-width of the key window of _first_group_sums, in binomial sds
KEY_BUCKETS = 64  # the window is cut into this many buckets; only one bucket per row is sorted
KEY_ROWS = 512  # rows per batch of the key-window path (row numbers and keys share one int64)
# keys per batch: about 2 MB. Measured side by side on the idle 2-core machine (widths 1000, 10,000
# and 100,000): as fast serially as 131,072 keys or faster (1.00-1.12x), while two threads, which
# take turns at Python's lock between the batch's numpy calls, gain 1.45-1.89x instead of 1.32-1.58x;
# 524,288 was slower serially again. A batch's sums do not depend on its size (rows are reduced alone).
KEY_CACHE_ELEMENTS = 262_144


def _mean_difference_range(pooled: _Pooled, stream: Stream, rows_per_batch: int, start: int,
                           stop: int) -> np.ndarray:
    """T = S1/n1 − (Σx − S1)/n2 for resamples [start, stop), S1 from the keys without sorting them.

    Batches are at most ``rows_per_batch`` rows (the caller's memory bound), and smaller still when
    that keeps them in cache."""
    width = pooled.values.shape[0]
    n1, n2 = int(pooled.slots[0].size), int(pooled.slots[1].size)
    grand = float(pooled.values.sum())
    reader = UniformRows(stream, width, start)
    rows_per_batch = max(1, min(rows_per_batch, KEY_ROWS, KEY_CACHE_ELEMENTS // width))
    buffer = np.empty((min(rows_per_batch, stop - start), width))
    out = np.empty(stop - start)
    done = 0
    while done < stop - start:
        rows = min(rows_per_batch, stop - start - done)
        keys = reader.take(rows, out=buffer[:rows])
        first = _first_group_sums(keys, pooled.values, pooled.blocks)
        out[done:done + rows] = first / n1 - (grand - first) / n2
        done += rows
    return out


def _first_group_sums(keys: np.ndarray, values: np.ndarray,
                      blocks: tuple[tuple[int, int, tuple[int, ...]], ...]) -> np.ndarray:
    """Sum of the values in group 1's slots of each row of keys (one data set's rows)."""
    return first_group_sums(keys, values[None, :], blocks, ((0, 0, keys.shape[0]),))


def first_group_sums(keys: np.ndarray, values: np.ndarray, blocks: tuple[tuple[int, int, tuple[int, ...]], ...],
                     segments: Sequence[tuple[int, int, int]]) -> np.ndarray:
    """Sum of the values in group 1's slots of each row of keys, as the draw contract assigns them.

    ``values`` holds one row of pooled values per data set, (D, N), all with the same ``blocks``;
    ``segments`` are (data set, first row, stop row), covering the rows of ``keys`` in order: the
    rows of several data sets may share one pass (``engines/batched.py``), each row still reduced
    alone in the same order, so a row's sum never depends on the other rows.

    Group 1 takes, in every stratum block, the n1 positions with the smallest keys (ties to the
    lower position: the stable argsort). The n1-th smallest of ``size`` uniform keys lies, but with
    a chance of about 1e-6 per row, within KEY_WINDOW_SDS binomial sds of n1/size. So the keys below
    that window are certainly in group 1; the few inside it (a few per cent) are counted in
    KEY_BUCKETS buckets (bucket order is key order), the buckets before the one holding the n1-th
    key are taken whole, and only that bucket is sorted. A key is an integer multiple of 2⁻⁵³
    (numpy's doubles), so row number and key pack exactly into one int64 and one stable sort orders
    those keys of every row at once, ties to the lower position (hence at most 1023 rows a pass).
    Rows whose n1-th key falls outside the window are sorted in full.
    """
    rows = keys.shape[0]
    owner = np.empty(rows, dtype=np.intp)  # the data set of each row
    for dataset, first_row, stop_row in segments:
        owner[first_row:stop_row] = dataset
    total = np.zeros(rows)
    for start, size, sizes in blocks:
        need_all = sizes[0]
        if need_all == 0:
            continue
        block = keys[:, start:start + size]
        x = values[:, start:start + size]
        q = need_all / size
        half = KEY_WINDOW_SDS * math.sqrt(q * (1.0 - q) / size) + 2.0 / size
        low, high = q - half, q + half
        below = block < low
        part = np.empty(rows)
        for dataset, first_row, stop_row in segments:  # faster than np.where, the same sums
            part[first_row:stop_row] = np.multiply(below[first_row:stop_row], x[dataset]).sum(axis=1)
        need = need_all - np.count_nonzero(below, axis=1)  # window keys still to take, per row
        inside = np.flatnonzero((block < high) ^ below)  # row-major: row, then position
        row, column = np.divmod(inside, size)
        key = block.ravel()[inside]
        # floor of an increasing function of the key: a bucket never holds a smaller key than the one before
        bucket = np.clip(((key - low) * (KEY_BUCKETS / (high - low))).astype(np.int64), 0, KEY_BUCKETS - 1)
        cell = row * KEY_BUCKETS + bucket
        filled = np.cumsum(np.bincount(cell, minlength=rows * KEY_BUCKETS).reshape(rows, KEY_BUCKETS), axis=1)
        target = np.count_nonzero(filled < need[:, None], axis=1)  # bucket holding the need-th window key
        missed = (need < 0) | (target == KEY_BUCKETS)  # the n1-th key lies outside the window
        target = np.minimum(target, KEY_BUCKETS - 1)
        before = np.where(target > 0, filled[np.arange(rows), target - 1], 0)
        whole = (bucket < target[row]) & ~missed[row]
        part += np.bincount(row[whole], weights=x[owner[row[whole]], column[whole]], minlength=rows)
        # the bucket holding the need-th key: sort its keys, take what is still needed
        split = np.flatnonzero((bucket == target[row]) & ~missed[row])
        packed = (row[split] << 53) + (key[split] * 2.0 ** 53).astype(np.int64)
        split = split[np.argsort(packed, kind="stable")]  # by row, then key, then position
        first = np.searchsorted(row[split], np.arange(rows))
        taken = split[np.arange(split.size) - first[row[split]] < (need - before)[row[split]]]
        part += np.bincount(row[taken], weights=x[owner[row[taken]], column[taken]], minlength=rows)
        for r in np.flatnonzero(missed):
            chosen = np.zeros(size, dtype=bool)
            chosen[np.argsort(block[r], kind="stable")[:need_all]] = True
            part[r] = np.multiply(chosen, x[owner[r]]).sum()
        total += part
    return total


def _random(pooled: _Pooled, stream: Stream, resamples: int,
            rows_per_batch: int, *, start: int = 0) -> Iterator[tuple[np.ndarray, ...]]:
    reader = UniformRows(stream, pooled.values.shape[0], start)
    offset = 2.0 * pooled.stratum
    done = 0
    while done < resamples:
        rows = min(rows_per_batch, resamples - done)
        keys = reader.take(rows)
        order = np.argsort(keys + offset, axis=1, kind="stable")
        yield tuple(order[:, slots] for slots in pooled.slots)
        done += rows


def _enumerate(pooled: _Pooled, rows_per_batch: int) -> Iterator[tuple[np.ndarray, ...]]:
    """Every arrangement, in chunks: for two groups group 1 takes the chosen positions, group 2 the rest."""
    if len(pooled.slots) > 2:
        yield from _enumerate_k(pooled, rows_per_batch)
        return
    total = pooled.values.shape[0]
    blocks = [(start, size, sizes[0]) for start, size, sizes in pooled.blocks if sizes[0] > 0]
    width = sum(first for _, _, first in blocks)
    for chosen in _combination_product(blocks, rows_per_batch):
        rows = chosen.shape[0]
        row_offset = (np.arange(rows, dtype=np.int64) * total)[:, None]
        taken = np.zeros(rows * total, dtype=bool)
        taken[(chosen + row_offset).ravel()] = True
        rest = np.flatnonzero(~taken).reshape(rows, total - width) - row_offset
        yield chosen, rest


def _label_sequences(size: int, sizes: tuple[int, ...]) -> Iterator[np.ndarray]:
    """Distinct group-label sequences of one stratum block: group 1's positions, then group 2's among
    the rest, ... each in lexicographic order of ``itertools.combinations``."""
    def walk(free: tuple[int, ...], g: int, labels: np.ndarray) -> Iterator[np.ndarray]:
        if g == len(sizes) - 1:
            labels[list(free)] = g
            yield labels.copy()
            return
        for chosen in itertools.combinations(free, sizes[g]):
            labels[list(chosen)] = g
            picked = set(chosen)
            yield from walk(tuple(i for i in free if i not in picked), g + 1, labels)
    yield from walk(tuple(range(size)), 0, np.zeros(size, dtype=np.int64))


def _enumerate_k(pooled: _Pooled, rows_per_batch: int) -> Iterator[tuple[np.ndarray, ...]]:
    """k groups: label sequences per stratum, combined by ``itertools.product``; positions of each
    group in increasing order (a stable argsort of the labels)."""
    per_stratum = [np.array(list(_label_sequences(size, sizes))) for _, size, sizes in pooled.blocks]
    totals = np.cumsum([0] + [s.size for s in pooled.slots])
    combos = itertools.product(*[range(p.shape[0]) for p in per_stratum])
    while True:
        chunk = list(itertools.islice(combos, rows_per_batch))
        if not chunk:
            return
        index = np.array(chunk, dtype=np.int64).reshape(len(chunk), len(per_stratum))
        labels = np.hstack([p[index[:, h]] for h, p in enumerate(per_stratum)])
        order = np.argsort(labels, axis=1, kind="stable")
        yield tuple(order[:, totals[g]:totals[g + 1]] for g in range(len(pooled.slots)))


def _combination_product(blocks: list[tuple[int, int, int]], rows_per_batch: int) -> Iterator[np.ndarray]:
    """Chunks of the lexicographic product over strata of ``combinations(range(size), first)``.

    Rows are pooled positions (``start`` added). The inner strata are materialised only when their
    product fits in one batch; otherwise the outer combinations are walked one at a time.
    """
    if not blocks:
        yield np.zeros((1, 0), dtype=np.int64)
        return
    start, size, first = blocks[0]
    inner = blocks[1:]
    inner_count = math.prod(math.comb(s, f) for _, s, f in inner)

    def outer(chunk: int) -> Iterator[np.ndarray]:
        combos = itertools.combinations(range(start, start + size), first)
        while True:
            block = np.fromiter(itertools.islice(combos, chunk), dtype=(np.int64, first))
            if block.shape[0] == 0:
                return
            yield block.reshape(-1, first)

    if not inner:
        yield from outer(rows_per_batch)
    elif inner_count <= rows_per_batch:
        tail = np.concatenate(list(_combination_product(inner, rows_per_batch)))
        for head in outer(max(1, rows_per_batch // inner_count)):
            yield np.hstack([np.repeat(head, inner_count, axis=0), np.tile(tail, (head.shape[0], 1))])
    else:
        for head in outer(1):
            for tail in _combination_product(inner, rows_per_batch):
                yield np.hstack([np.repeat(head, tail.shape[0], axis=0), tail])
