"""Two-sample permutation test (group labels shuffled over all rows, or within strata).

Null: under exchangeability of the group labels (within each stratum), every assignment of the
observed group sizes to the rows of a stratum is equally likely. Arrangements = ∏_h C(N_h, n1_h).

Layout: observations are pooled stratum by stratum (stratum codes in increasing order, dense
index h = 0, 1, ...); within a stratum, group 1's observations, then group 2's, each in original
order. Slots of a stratum block are labelled: the first n1_h slots are group 1, the rest group 2.
The observed arrangement puts every observation in its own slot.

Exact enumeration: the group-1 positions of each stratum run over ``itertools.combinations`` of
the block in lexicographic order, strata combined by ``itertools.product``; evaluated in bounded
chunks. The observed arrangement is one of them.

Monte Carlo draw contract (with :mod:`planrunner.engines.streams`): resample r is row r of the
stream's uniform rows, ``keys = gen.random(N)``; ``np.argsort(keys + 2 * h, kind="stable")`` (h the
dense stratum index of each position) lists, block by block, the positions of each stratum in key
order, and slot s receives the observation at that position. Rows are drawn in order; memory
batches split rows, never change them.

p-values (REFERENCES §0.5): exact ``#{T* ≥ t}/arrangements`` (observed arrangement included);
Monte Carlo ``(b + 1)/(m + 1)`` over m random arrangements; two-sided ``min(1, 2 min(p_greater,
p_less))`` as scipy.stats.permutation_test. Comparisons allow ``tolerance = 1e-10 · max(|t|, scale)``
(scale = the largest absolute data value) so that values equal in exact arithmetic count as equal.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.errors import EngineError
from planrunner.engines.results import EngineWarning, PermutationResult, frozen_array
from planrunner.engines.statistics import (
    Statistic,
    check_samples,
    check_strata,
    take_observations,
    to_compute_layout,
)
from planrunner.engines.blocks import bind, map_resamples
from planrunner.engines.fastpaths import CACHE_ELEMENTS, batch_rows, kth_smallest, threshold_window
from planrunner.engines.streams import Stream, UniformRows

__all__ = ["ALTERNATIVES", "ENUMERATION_LIMIT", "PermutationResult", "permutation_test"]

ALTERNATIVES = ("greater", "less", "two-sided")
EXACT_CHOICES = ("auto", "always", "never")
ENUMERATION_LIMIT = 5_000_000
TIE_TOLERANCE = 1e-10
FEW_ARRANGEMENTS = 20  # common practice: below 20 the smallest attainable p exceeds 0.05


@dataclass(frozen=True)
class _Pooled:
    values: np.ndarray  # (N,) or (N, k), stratum-major then group-major
    stratum: np.ndarray  # (N,) dense stratum index of each position
    slots: tuple[np.ndarray, ...]  # slot positions of each group, increasing
    blocks: tuple[tuple[int, int, int], ...]  # (start, size, size of group 1) per stratum


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
        blocks.append((start, size, sizes[0]))
        start += size
    labels = np.concatenate(slot_group)
    values = np.ascontiguousarray(np.concatenate(pieces))
    values.flags.writeable = False
    return _Pooled(values, np.concatenate(stratum),
                   tuple(np.flatnonzero(labels == g) for g in range(len(data))), tuple(blocks))


def permutation_test(samples: Sequence[np.ndarray], statistic: Statistic, *, resamples: int, alternative: str,
                     stream: Stream, strata: Sequence[np.ndarray] | None = None, exact: str = "auto",
                     batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of ``statistic`` (first group minus second) against label exchangeability.

    ``exact``: "auto" enumerates when arrangements ≤ resamples, "always" enumerates (at most
    5,000,000 arrangements), "never" draws ``resamples`` random arrangements from ``stream``.
    """
    if statistic.samples != 2:
        raise EngineError(
            f"the permutation test needs a two-group statistic; {statistic.name!r} takes {statistic.samples}",
            hint="use a difference statistic such as mean_difference")
    if alternative not in ALTERNATIVES:
        raise EngineError(f"unknown alternative {alternative!r}", hint=f"use one of {', '.join(ALTERNATIVES)}")
    if exact not in EXACT_CHOICES:
        raise EngineError(f"unknown exact choice {exact!r}", hint=f"use one of {', '.join(EXACT_CHOICES)}")
    if resamples < 1:
        raise EngineError(f"resamples must be at least 1, got {resamples}", hint="use 9999 or more")
    if batch_elements < 1:
        raise ValueError("batch_elements must be >= 1")
    data = check_samples(samples, statistic, method="the permutation test")
    codes = check_strata(strata, data)
    pooled = _pool(data, codes)
    n = tuple(int(a.shape[0]) for a in data)

    observed = float(statistic.compute(*[to_compute_layout(a) for a in data]))
    if not math.isfinite(observed):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    arrangements = math.prod(math.comb(size, first) for _, size, first in pooled.blocks)

    if exact == "always" and arrangements > ENUMERATION_LIMIT:
        raise EngineError(
            f"exact enumeration asked for, but there are {arrangements:,} arrangements "
            f"(the limit is {ENUMERATION_LIMIT:,})",
            hint="use exact: never (Monte Carlo) or exact: auto")
    is_exact = exact == "always" or (exact == "auto" and arrangements <= resamples)

    per_row = pooled.values.shape[0] * statistic.columns
    rows_per_batch = max(1, batch_elements // per_row)
    if is_exact:
        null = _exact_null(pooled, statistic, rows_per_batch, arrangements)
    else:
        null = _random_null(pooled, statistic, stream, resamples, rows_per_batch)
    bad = ~np.isfinite(null)
    if bad.any():
        raise EngineError(
            f"the statistic {statistic.name!r} is not finite for {int(bad.sum())} arrangement(s)",
            hint="the permutation test cannot be used with this statistic on these data")

    scale = max(float(np.max(np.abs(a))) for a in data)
    tolerance = TIE_TOLERANCE * max(abs(observed), scale)
    count_greater = int(np.count_nonzero(null >= observed - tolerance))
    count_less = int(np.count_nonzero(null <= observed + tolerance))
    m = null.shape[0]
    if is_exact:
        p_greater, p_less = count_greater / m, count_less / m
    else:
        p_greater, p_less = (count_greater + 1) / (m + 1), (count_less + 1) / (m + 1)
    p_value = {"greater": p_greater, "less": p_less,
               "two-sided": min(1.0, 2.0 * min(p_greater, p_less))}[alternative]

    warnings = []
    if arrangements < FEW_ARRANGEMENTS:
        warnings.append(EngineWarning(
            "few-arrangements",
            f"only {arrangements} distinct arrangement(s) of the labels exist, so the smallest attainable "
            f"p-value is {1 / arrangements:.3g}: the test cannot reach 0.05"))
    if np.all(np.abs(null - observed) <= tolerance):
        warnings.append(EngineWarning(
            "degenerate-distribution",
            "every arrangement gives the observed value of the statistic (the data do not vary "
            "between the groups' labels), so p = 1 carries no information"))

    scheme = "labels shuffled over all rows" if codes is None else "labels shuffled within strata"
    return PermutationResult(
        observed=observed, p_value=float(p_value), alternative=alternative, two_sided_rule="doubled",
        exact=is_exact, arrangements=arrangements, resamples=m, count_greater=count_greater,
        count_less=count_less, null=frozen_array(null), tolerance=tolerance, n=n, scheme=scheme,
        warnings=tuple(warnings),
        conventions={
            "p_value": "exact: count / arrangements (observed arrangement included); "
                       "Monte Carlo: (count + 1) / (resamples + 1)",
            "two_sided": "min(1, 2 min(p_greater, p_less))",
            "ties": "T* >= t - tolerance counts as greater or equal; tolerance = 1e-10 max(|t|, max|x|)",
            "draws": "one uniform row of keys per resample; argsort(keys + 2 * stratum) within strata",
        })


def _evaluate(pooled: _Pooled, statistic: Statistic, batches: Iterator[tuple[np.ndarray, ...]],
              total: int) -> np.ndarray:
    """Statistic over batches of arrangements; a batch gives each group's pooled positions per row."""
    out = np.empty(total, dtype=np.float64)
    done = 0
    for positions in batches:
        groups = [take_observations(pooled.values, p) for p in positions]
        with np.errstate(invalid="ignore", divide="ignore"):  # reported by the caller
            out[done:done + positions[0].shape[0]] = statistic.compute(*groups)
        done += positions[0].shape[0]
    assert done == total
    return out


def _exact_null(pooled: _Pooled, statistic: Statistic, rows_per_batch: int, arrangements: int) -> np.ndarray:
    """The statistic over every arrangement, in the order of ``_enumerate``."""
    if statistic.form == "mean" and statistic.columns == 1:
        fast = _exact_mean_difference(pooled)
        if fast is not None:
            return fast
    return _evaluate(pooled, statistic, _enumerate(pooled, rows_per_batch), arrangements)


def _exact_mean_difference(pooled: _Pooled) -> np.ndarray | None:
    """Difference of means over every arrangement from running sums of group 1 (DESIGN §7).

    When group 1 lies in a single stratum, its combinations are built one position at a time,
    prefixes in lexicographic order and each prefix's extensions in increasing order: the order of
    ``itertools.combinations``. Only the group-1 sum of each is formed (group 2's is the total minus
    it), without index arrays. Equal to the plain computation up to the order of summation. None
    when group 1 spans several strata (the plain enumeration handles those).
    """
    blocks = [(start, size, first) for start, size, first in pooled.blocks if first > 0]
    if len(blocks) != 1:
        return None
    start, size, first = blocks[0]
    values = pooled.values
    last = np.arange(start, start + size - first + 1)  # first chosen position of each combination
    sums = values[last].astype(np.float64)
    for j in range(1, first):
        highest = start + size - first + j  # the j-th chosen position leaves room for the rest
        counts = highest - last
        begins = np.cumsum(counts) - counts
        last = np.repeat(last, counts) + 1 + (np.arange(int(counts.sum())) - np.repeat(begins, counts))
        sums = np.repeat(sums, counts) + values[last]
    n1, n2 = pooled.slots[0].shape[0], pooled.slots[1].shape[0]
    return sums / n1 - (float(np.sum(values)) - sums) / n2


def _random_null(pooled: _Pooled, statistic: Statistic, stream: Stream, resamples: int,
                 rows_per_batch: int) -> np.ndarray:
    """The statistic over ``resamples`` random arrangements, possibly split into ranges computed
    elsewhere (``blocks.map_resamples``); the numbers do not depend on the split."""
    task = bind(_null_range, pooled, statistic, stream, rows_per_batch)
    return map_resamples(task, resamples)


def _null_range(pooled: _Pooled, statistic: Statistic, stream: Stream, rows_per_batch: int,
                start: int, stop: int) -> np.ndarray:
    """The null values of random arrangements [start, stop)."""
    if statistic.form == "mean" and statistic.columns == 1:
        return _mean_difference_null(pooled, stream, rows_per_batch, start, stop)
    return _evaluate(pooled, statistic, _random(pooled, stream, stop - start, rows_per_batch, start), stop - start)


def _mean_difference_null(pooled: _Pooled, stream: Stream, rows_per_batch: int, start: int,
                          stop: int) -> np.ndarray:
    """Difference of means over random arrangements from the sum of group 1 alone (``fastpaths``).

    Group 1 of an arrangement holds, in stratum h, the n1_h positions with the smallest keys
    ``u + 2h`` (the first n1_h slots of the stable argsort of the draw contract). They are the keys
    at or below the n1_h-th smallest; a row with a tie there falls back to the argsort itself.
    Equal to the plain computation up to the order of summation.
    """
    values = pooled.values
    width = values.shape[0]
    n1, n2 = pooled.slots[0].shape[0], pooled.slots[1].shape[0]
    total_sum = float(np.sum(values))
    rows_per_batch = min(rows_per_batch, batch_rows(width, CACHE_ELEMENTS))
    reader = UniformRows(stream, width, start)
    out = np.empty(stop - start, dtype=np.float64)
    done = 0
    while done < stop - start:
        rows = min(rows_per_batch, stop - start - done)
        keys = reader.take(rows)
        first_sum = np.zeros(rows, dtype=np.float64)
        tied = np.zeros(rows, dtype=bool)
        for h, (begin, size, first) in enumerate(pooled.blocks):
            part = values[begin:begin + size]
            if first == 0:
                continue
            if first == size:
                first_sum += float(np.sum(part))
                continue
            block = keys[:, begin:begin + size]
            if h:
                block = block + 2.0 * h  # the contract's keys, rounded as in the argsort (u + 0 is u)
            threshold = kth_smallest(block, [first - 1], *threshold_window(size, first, 2.0 * h))
            chosen = block <= threshold
            tied |= np.count_nonzero(chosen, axis=1) != first
            first_sum += chosen @ part
        out[done:done + rows] = first_sum / n1 - (total_sum - first_sum) / n2
        if tied.any():
            order = np.argsort(keys[tied] + 2.0 * pooled.stratum, axis=1, kind="stable")
            groups = [take_observations(values, order[:, slots]) for slots in pooled.slots]
            out[done:done + rows][tied] = np.mean(groups[0], axis=-1) - np.mean(groups[1], axis=-1)
        done += rows
    return out


def _random(pooled: _Pooled, stream: Stream, resamples: int,
            rows_per_batch: int, start: int = 0) -> Iterator[tuple[np.ndarray, ...]]:
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
    """Every arrangement, in chunks: group 1 takes the chosen positions, group 2 the rest."""
    total = pooled.values.shape[0]
    blocks = [(start, size, first) for start, size, first in pooled.blocks if first > 0]
    width = sum(first for _, _, first in blocks)
    for chosen in _combination_product(blocks, rows_per_batch):
        rows = chosen.shape[0]
        row_offset = (np.arange(rows, dtype=np.int64) * total)[:, None]
        taken = np.zeros(rows * total, dtype=bool)
        taken[(chosen + row_offset).ravel()] = True
        rest = np.flatnonzero(~taken).reshape(rows, total - width) - row_offset
        yield chosen, rest


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
