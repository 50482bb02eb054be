"""Paired permutation test: the two labels swapped within each pair (a sign-flip of d = x − y).

Null: within each pair the two measurements are exchangeable, so each of the 2ⁿ patterns of swaps
is equally likely (Fisher 1935 §21). Every pattern is counted, duplicates included (a zero
difference gives two equal patterns; V-SLEEP).

Pattern j (exact enumeration, j = 0 … 2ⁿ − 1) swaps pair i when bit i of j is 1; pattern 0 is the
observed arrangement. Monte Carlo resample r takes its swaps from random bits: row r of the
stream's draws is ``ceil(n / 64)`` 64-bit words ``gen.integers(0, 2**64, dtype=uint64)`` and pair i
is swapped when bit i % 64 of word i // 64 is 1. Block b of rows comes from ``stream.generator(b)``.

Plain computation: the statistic of the two groups after the swaps. Fast paths, for statistics of
the differences alone (checked equal to the plain computation in tests): a difference of means is
Σ sᵢdᵢ / n (sᵢ = ±1); the signed rank T+ is Σ rᵢ [sᵢdᵢ > 0] with the ranks rᵢ of |dᵢ| fixed. Both are a
fixed part plus a sum over the swapped pairs, which Monte Carlo resamples read byte by byte from
lookup tables of the 256 patterns of each 8 pairs (one lookup per 8 pairs; no bit is unpacked).
For those two, integer-valued |d| or ranks give the exact null by dynamic programming over subset
sums (each pair adds its score or not), reaching any n the plan can hold.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.engines.blocks import bind as range_task
from planrunner.engines.exactdist import EXACT_FROM, RESCALE, exact_subset_sums_any_size, integer_scores
from planrunner.engines.permcore import (
    DYNAMIC_PROGRAMMING,
    ENUMERATION,
    ComputedNull,
    Description,
    Judge,
    PermutationOptions,
    check_null,
    choose_computation,
    monte_carlo_null,
    observed_value,
    permutation_result,
    tie_tolerance,
)
from planrunner.engines.ranks import rankdata
from planrunner.engines.results import EngineWarning, PermutationResult
from planrunner.engines.statistics import Statistic, check_samples
from planrunner.engines.streams import DRAW_BLOCK, Stream
from planrunner.errors import EngineError

__all__ = ["byte_tables", "computation", "signflip_test", "swap_bits", "swap_bytes", "swapped_sums"]

DP_WIDTH_LIMIT = 5_000_000  # largest subset-sum table (doubles, 40 MB) the exact shortcut may build
DP_WORK_LIMIT = 2_000_000_000  # pairs × table width
# most pairs for the byte lookup tables (32 doubles a pair: 32 MB at the limit); more use the plain sums
TABLE_PAIRS_LIMIT = 131_072


def swap_bytes(stream: Stream, pairs: int, start: int, stop: int) -> np.ndarray:
    """The random bits of resamples start … stop − 1 as bytes, shape (stop − start, ceil(pairs / 8)):
    bit k (least significant first) of byte c swaps pair 8c + k; bits past the last pair are zero."""
    words = -(-pairs // 64)
    width = -(-pairs // 8)
    out = np.empty((stop - start, width), dtype=np.uint8)
    row = start
    while row < stop:
        block, offset = divmod(row, DRAW_BLOCK)
        count = min(stop - row, DRAW_BLOCK - offset)
        gen = stream.generator(block)
        if offset:
            # one 64-bit output per full-range word; PCG64 has advance(), numpy's stubs omit it
            gen.bit_generator.advance(offset * words)  # type: ignore[attr-defined]
        drawn = gen.integers(0, 2**64, size=(count, words), dtype=np.uint64, endpoint=False)
        # little-endian bytes: byte c of a row holds pairs 8c … 8c + 7 on every machine
        out[row - start:row - start + count] = drawn.astype("<u8", copy=False).view(np.uint8)[:, :width]
        row += count
    if pairs % 8:
        out[:, -1] &= np.uint8((1 << (pairs % 8)) - 1)
    return out


def swap_bits(stream: Stream, pairs: int, start: int, stop: int) -> np.ndarray:
    """Swap indicators of resamples start … stop − 1, shape (stop − start, pairs), from random bits."""
    bits = np.unpackbits(swap_bytes(stream, pairs, start, stop), axis=1, bitorder="little")
    return bits[:, :pairs].astype(bool)


def byte_tables(weights: np.ndarray) -> np.ndarray:
    """``tables[c, v]`` = Σ of weights[8c + k] over the bits k set in byte value v (flattened).

    A row of swap bytes then adds up its swapped weights with one lookup per 8 pairs.
    """
    width = -(-weights.size // 8)
    padded = np.zeros(width * 8)
    padded[:weights.size] = weights
    bits = ((np.arange(256)[:, None] >> np.arange(8)[None, :]) & 1).astype(np.float64)  # (256, 8)
    # the sum over each byte's (at most 8) set bits, in bit order
    tables = np.zeros((width, 256))
    for k in range(8):
        tables += padded.reshape(width, 8)[:, k:k + 1] * bits[None, :, k]
    return tables.ravel()


def swapped_sums(tables: np.ndarray, swaps: np.ndarray) -> np.ndarray:
    """Σ of the swapped pairs' weights in each row of swap bytes (see :func:`byte_tables`)."""
    lookup = swaps.astype(np.intp)
    lookup += (np.arange(swaps.shape[1], dtype=np.intp) * 256)[None, :]
    return tables[lookup].sum(axis=1)


def _patterns(pairs: int, start: int, stop: int) -> np.ndarray:
    j = np.arange(start, stop, dtype=np.int64)[:, None]
    return ((j >> np.arange(pairs, dtype=np.int64)[None, :]) & 1).astype(bool)


def _scores(statistic: Statistic, d: np.ndarray) -> np.ndarray | None:
    """Per-pair scores when the statistic is a function of the swapped differences alone."""
    if statistic.form == "mean":
        return np.abs(d)
    if statistic.name == "signed_rank":
        ranks = np.zeros(d.size)
        nonzero = d != 0
        if nonzero.any():
            ranks[nonzero] = rankdata(np.abs(d[nonzero]))
        return ranks
    return None


def signflip_test(x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                  stream: Stream, fast: bool = True, batch_elements: int = 2_000_000) -> PermutationResult:
    """Sign-flip test of a two-group ``statistic`` on pairs (x[i], y[i])."""
    x, y, observed = _checked(x, y, statistic)
    pairs = _Pairs.of(x, y, statistic)
    centre = float(pairs.scores.sum()) / 2.0 if pairs.scores is not None and statistic.name == "signed_rank" else 0.0
    tolerance = tie_tolerance(observed, float(np.max(np.abs(np.concatenate([x, y])))))
    null = _null(pairs, statistic, options, stream, max(1, batch_elements // max(1, 2 * x.size)), fast,
                 Judge(observed, centre, lambda values: tolerance))
    check_null(null.values, statistic, "sign pattern(s)")
    warnings: tuple[EngineWarning, ...] = ()
    if np.all(pairs.d == 0):
        warnings = (EngineWarning("degenerate-distribution",
                                  "every pair difference is zero: swaps change nothing and p = 1"),)
    about = Description(
        n=(x.size, x.size), scheme="sign-flip within pairs (the two labels swapped within each pair)",
        conventions={"p_value": "exact: count / 2^n sign patterns (duplicates counted); Monte Carlo: "
                                "(count + 1) / (resamples + 1)",
                     "draws": "random bits: ceil(n/64) uint64 words per resample, pair i swapped when bit i is 1"},
        design={"pairs": x.size})
    return permutation_result(null, observed, options, tolerance=tolerance, about=about, centre=centre,
                              warnings=warnings)


@dataclass(frozen=True)
class _Pairs:
    """The pairs as the null needs them: both groups, the differences, and the per-pair scores when
    the statistic is a function of the swapped differences alone (None otherwise)."""

    x: np.ndarray
    y: np.ndarray
    d: np.ndarray
    scores: np.ndarray | None

    @classmethod
    def of(cls, x: np.ndarray, y: np.ndarray, statistic: Statistic) -> _Pairs:
        d = x - y
        return cls(x, y, d, _scores(statistic, d))


def _checked(x: np.ndarray, y: np.ndarray, statistic: Statistic) -> tuple[np.ndarray, np.ndarray, float]:
    """The pairs as the test takes them, and the observed statistic; refused as the test refuses."""
    if statistic.samples != 2:
        raise EngineError(f"a paired test needs a two-group statistic; {statistic.name!r} is not one")
    x, y = check_samples([x, y], statistic, method="the paired test")
    if x.shape != y.shape:
        raise EngineError(f"pairs must have one value in each group; got {x.size} and {y.size}")
    return x, y, observed_value(statistic, x, y)


def computation(x: np.ndarray, y: np.ndarray, statistic: Statistic, options: PermutationOptions) -> str:
    """The computation :func:`signflip_test` will use on these pairs, or its refusal (raised)."""
    x, y, _ = _checked(x, y, statistic)
    return _choose(_Pairs.of(x, y, statistic), statistic, options)[0]


def _choose(pairs: _Pairs, statistic: Statistic, options: PermutationOptions) -> tuple[str, int, Any]:
    """(computation, 2ⁿ, integer scores for the DP or None) by the one rule of ``choose_computation``."""
    n = pairs.d.size
    arrangements = 2 ** n
    integer = integer_scores(pairs.scores) if pairs.scores is not None else None
    width = int(integer[0].sum()) + 1 if integer is not None else 0
    dp_ok = integer is not None and width <= DP_WIDTH_LIMIT and n * width <= DP_WORK_LIMIT
    path = choose_computation(arrangements, options, shortcut=dp_ok, space="sign patterns",
                              statistic=statistic.name)
    return path, arrangements, integer


def _null(pairs: _Pairs, statistic: Statistic, options: PermutationOptions, stream: Stream,
          rows_per_batch: int, fast: bool, judge: Judge | None = None) -> ComputedNull:
    """The null over the 2ⁿ sign patterns: listed, by subset-sum DP, or drawn (range tasks)."""
    path, arrangements, integer = _choose(pairs, statistic, options)
    n = pairs.d.size
    if path == DYNAMIC_PROGRAMMING:
        assert integer is not None
        values, weights, exponent, exact = _subset_sum_null(pairs, statistic, *integer)
        return ComputedNull(values, path, arrangements, weights, exponent, exact)
    if path == ENUMERATION:
        return ComputedNull(_listed_range(pairs, statistic, rows_per_batch, fast, 0, arrangements), path,
                            arrangements)
    lookup = _lookup(statistic, pairs.d, pairs.scores) if fast and pairs.scores is not None \
        and n <= TABLE_PAIRS_LIMIT else None
    # ranges of resamples may run on other workers (engines.blocks); the same numbers
    task = range_task(_drawn_range, pairs, statistic, stream, rows_per_batch, fast, lookup)
    return monte_carlo_null(task, options, arrangements, judge)


def _subset_sum_null(pairs: _Pairs, statistic: Statistic, ints: np.ndarray,
                     scale: float) -> tuple[np.ndarray, np.ndarray, int, np.ndarray | None]:
    """Support, counts (times 2**exponent) and exact counts of the null: each pair adds its score
    (positive sign) or not. The counts sum to 2**n, past the double range from n = 1024: they are
    rescaled by 2**-RESCALE as in ``exactdist``, so the p-values keep their precision. Beyond 2**53
    patterns the exact integer counts come from ``exactdist`` too (None beyond its limits)."""
    counts = np.ones(1)
    exponent = 0
    for i, a in enumerate(ints):
        if i % 64 == 63 and counts.max() > 2.0 ** RESCALE:  # counts at most double per pair
            counts *= 2.0 ** -RESCALE
            exponent += RESCALE
        grown = np.zeros(counts.size + int(a))
        grown[:counts.size] += counts
        grown[int(a):] += counts
        counts = grown
    exact = exact_subset_sums_any_size(ints) if 2 ** ints.size > EXACT_FROM else None
    keep = counts > 0 if exact is None else np.array([c > 0 for c in exact])
    positive = np.flatnonzero(keep) / scale
    d = pairs.d
    values = positive if statistic.name == "signed_rank" else (2.0 * positive - np.abs(d).sum()) / d.size
    exact_kept = None if exact is None else np.array([c for c in exact if c > 0], dtype=object)
    return values, counts[keep], exponent, exact_kept


def _listed_range(pairs: _Pairs, statistic: Statistic, rows_per_batch: int, fast: bool,
                  start: int, stop: int) -> np.ndarray:
    """The statistic of sign patterns j = start … stop − 1 (bit i of j swaps pair i)."""
    null = np.empty(stop - start)
    for first in range(start, stop, rows_per_batch):
        last = min(stop, first + rows_per_batch)
        swaps = _patterns(pairs.d.size, first, last)
        null[first - start:last - start] = _evaluate(statistic, pairs.x, pairs.y, pairs.d, pairs.scores, swaps, fast)
    return null


def _drawn_range(pairs: _Pairs, statistic: Statistic, stream: Stream, rows_per_batch: int, fast: bool,
                 lookup: tuple[float, float, float, np.ndarray] | None, start: int, stop: int) -> np.ndarray:
    """The statistic of random resamples [start, stop) (a picklable range task): swaps from the
    stream's random bits, summed through the byte tables when ``lookup`` is given."""
    n = pairs.d.size
    null = np.empty(stop - start)
    for first in range(start, stop, rows_per_batch):
        last = min(stop, first + rows_per_batch)
        if lookup is not None:
            base, factor, divisor, tables = lookup
            sums = swapped_sums(tables, swap_bytes(stream, n, first, last))
            null[first - start:last - start] = (base + factor * sums) / divisor
        else:
            swaps = swap_bits(stream, n, first, last)
            null[first - start:last - start] = _evaluate(statistic, pairs.x, pairs.y, pairs.d, pairs.scores,
                                                         swaps, fast)
    return null


def _lookup(statistic: Statistic, d: np.ndarray, scores: np.ndarray) -> tuple[float, float, float, np.ndarray]:
    """(base, factor, divisor, tables) with statistic = (base + factor · Σ swapped weights) / divisor.

    Difference of means: Σ sᵢdᵢ / n = (Σd − 2 Σ_swapped d) / n. Signed rank: T+ = Σ_{d>0} r
    + Σ_swapped r·([d < 0] − [d > 0]) (a swap moves a pair's rank into or out of T+); ranks are
    multiples of ½, so these sums are exact.
    """
    if statistic.name == "signed_rank":
        weights = np.where(d < 0, scores, 0.0) - np.where(d > 0, scores, 0.0)
        return float(np.sum(np.where(d > 0, scores, 0.0))), 1.0, 1.0, byte_tables(weights)
    return float(np.sum(d)), -2.0, float(d.size), byte_tables(d)


def _evaluate(statistic: Statistic, x: np.ndarray, y: np.ndarray, d: np.ndarray, scores: np.ndarray | None,
              swaps: np.ndarray, fast: bool) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        if fast and scores is not None:
            if statistic.name == "signed_rank":
                # T+ = Σ r_i over pairs whose swapped difference is positive
                positive = np.where(swaps, d < 0, d > 0)
                # row-wise sums (not a BLAS product) so a batch of any size gives identical bits
                return np.where(positive, scores, 0.0).sum(axis=1)
            return np.where(swaps, -d, d).sum(axis=1) / d.size
        xs = np.where(swaps, y, x)
        ys = np.where(swaps, x, y)
        return statistic.compute(xs, ys)

