"""Exact permutation null distributions by dynamic programming over integer-valued scores.

For fixed pooled data, several two-group statistics are increasing functions of S1, the sum of the
first group's scores (identity 15; see ``teststats.SUM_SCORES``). Under label exchangeability
every choice of the n1 group-1 positions among N is equally likely, so the null of S1 is the
number of n1-subsets with each sum. When the scores are integers (or halves, e.g. mid-ranks,
doubled first) that count is a small dynamic programme over (items chosen, sum):

    count_i(k, s) = count_{i−1}(k, s) + count_{i−1}(k − 1, s − a_i)      (a_i the i-th score)

processed over the N scores with the band of (k, s) that can still be reached. Within strata the
per-stratum distributions of S1_h are convolved (S1 = Σ_h S1_h, arrangements = ∏ C(N_h, n1_h)).
Counts are held as float64 times a power of two (:data:`RESCALE`): whenever the table's largest
count passes 2**900 the whole table is multiplied by 2**-900, exactly, and the exponent kept, so
C(N, N/2) beyond 1e308 (N ≈ 1030 and up) never overflows. Only positive numbers are summed, so the
relative error of every ratio (a p-value) stays near N·1e-16; counts below 2**-1074 of the largest
underflow to 0 (a p-value below about 1e-300 of its own arrangements' weight, see ``permutation``).

Sizes reached on the development machine (one core, numpy 2.4, measured, not asserted in tests):
ranks without ties, n1 = n2 = 100 in 0.1–0.3 s and n1 = n2 = 200 in 2–7 s (a shared machine); binary
outcomes (the hypergeometric, Fisher's exact test) with n1 = n2 = 200 in about 0.01 s. :data:`WORK_LIMIT` bounds the
cells visited; beyond it the engine falls back to Monte Carlo (or, with ``exact: always``, says so).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

__all__ = ["EXACT_FROM", "WORK_LIMIT", "dp_work", "exact_subset_sums_any_size", "exact_sum_distribution",
           "integer_scores", "moduli", "subset_sum_distribution", "sum_distribution"]

WORK_LIMIT = 6_000_000_000  # DP cells visited; about 10 s on one core
RESCALE = 900  # counts above 2**RESCALE are multiplied by 2**-RESCALE (exact in binary floating point)


def integer_scores(values: np.ndarray) -> tuple[np.ndarray, float] | None:
    """``(integers, scale)`` with ``values == integers / scale`` (scale 1 or 2), or None."""
    for scale in (1.0, 2.0):
        scaled = values * scale
        rounded = np.round(scaled)
        # exactly whole: a relative tolerance would round 1e7 + 0.0031 to 1e7 and the DP would count
        # the wrong sums (mid-ranks and 0/1 scores are exact halves and integers in binary)
        if np.all(scaled == rounded) and np.all(np.abs(rounded) < 2**40):
            return rounded.astype(np.int64), scale
    return None


def dp_work(scores: np.ndarray, chosen: int) -> int:
    """Cells the programme visits for one stratum (an upper bound used to decide feasibility)."""
    a = np.sort(scores - scores.min())
    k = min(chosen, a.size - chosen)
    width = int(a[::-1][:k].sum()) + 1
    return a.size * (k + 1) * width


def _rescaled(table: np.ndarray, exponent: int) -> int:
    """Multiply ``table`` by 2**-RESCALE in place while its largest value passes 2**RESCALE."""
    while table.size and float(table.max()) > 2.0 ** RESCALE:
        table *= 2.0 ** -RESCALE
        exponent += RESCALE
    return exponent


def subset_sum_distribution(scores: np.ndarray, chosen: int) -> tuple[int, np.ndarray, int]:
    """Number of ``chosen``-subsets of ``scores`` (integers) with each sum.

    Returns ``(offset, counts, exponent)``: ``counts[j] · 2**exponent`` subsets have sum ``offset + j``.
    """
    scores = np.asarray(scores, dtype=np.int64)
    total_n = scores.size
    if chosen == 0 or chosen == total_n:
        return int(scores.sum()) if chosen else 0, np.ones(1), 0
    if chosen > total_n - chosen:  # count the complement: sum = total − complement's sum
        offset, counts, exponent = subset_sum_distribution(scores, total_n - chosen)
        total = int(scores.sum())
        return total - (offset + counts.size - 1), counts[::-1].copy(), exponent
    low = int(scores.min())
    a = np.sort(scores - low)
    width = int(a[::-1][:chosen].sum()) + 1
    table = np.zeros((chosen + 1, width))
    table[0, 0] = 1.0
    reach = 0  # largest sum reachable so far
    exponent = 0
    for i, score in enumerate(a, start=1):
        if i % 64 == 0:  # counts at most double per score: 64 steps cannot overflow from 2**900
            exponent = _rescaled(table, exponent)
        score = int(score)
        k_hi = min(i, chosen)
        k_lo = max(1, chosen - (total_n - i))  # rows that can still end at `chosen`
        reach = min(width - 1, reach + score)
        if k_lo > k_hi:
            continue
        top = reach + 1
        # simultaneous update of rows k_lo..k_hi from rows k_lo−1..k_hi−1 (numpy buffers overlaps)
        table[k_lo:k_hi + 1, score:top] += table[k_lo - 1:k_hi, 0:top - score]
    counts = table[chosen].copy()
    return chosen * low, counts, _rescaled(counts, exponent)


def sum_distribution(strata: Sequence[tuple[np.ndarray, int]]) -> tuple[int, np.ndarray, int]:
    """Null of S1 = Σ_h (sum of the n1_h group-1 scores of stratum h): ``(offset, counts, exponent)``,
    ``counts[j] · 2**exponent`` arrangements with S1 = offset + j."""
    offset, counts, exponent = 0, np.ones(1), 0
    for scores, chosen in strata:
        o, c, e = subset_sum_distribution(scores, chosen)
        offset += o
        exponent += e
        if float(counts.max()) * float(c.max()) * min(counts.size, c.size) > 2.0 ** 1000:
            counts = counts * 2.0 ** -RESCALE  # each factor is below 2**901: keep the products finite
            exponent += RESCALE
        counts = np.convolve(counts, c)
        exponent = _rescaled(counts, exponent)
    return offset, counts, exponent


# --- exact integer counts -------------------------------------------------------------------------
#
# The float counts above are exact integers while every count stays below 2**53 (no arrangement
# count of a stratum exceeds C(N, n1) when n1 ≤ N/2, nor 2**n for sign patterns). Beyond that the
# record still needs the exact numbers, so that count / arrangements can be re-derived: the same
# programme is run in unsigned 64-bit integers modulo several primes just below 2**63 (a sum of two
# residues stays below 2**64; ``min(v, v − p)`` in wrapping arithmetic reduces it, without a
# division), and each count is rebuilt from its residues by the Chinese remainder theorem, with
# enough primes that their product exceeds the largest possible count. The cost is the float
# programme's times about five times the number of primes (one per 62 bits of the arrangement
# count), bounded by EXACT_WORK_LIMIT and EXACT_MEMORY_LIMIT; beyond them the counts stay the float
# ones (13 significant digits) and the record says so.

EXACT_FROM = 2 ** 53  # counts at or below this are exact in the float programme already
EXACT_WORK_LIMIT = 300_000_000  # cells × primes the modular programme updates; about 1–3 s on one core
EXACT_MEMORY_LIMIT = 256 * 2 ** 20  # bytes of the modular table and its scratch copy
CONVOLUTION_LIMIT = 20_000_000  # products of Python integers when strata are convolved
_PRIME_BITS = 62  # each prime lies in (2**62, 2**63)


def _is_prime(n: int) -> bool:
    """Miller–Rabin with the first twelve prime bases: deterministic below 3.3·10**24 (so for every
    n < 2**64; Jaeschke 1993)."""
    if n < 2:
        return False
    small = (2, 3, 5, 7, 11, 13, 17, 19, 23, 29, 31, 37)
    for p in small:
        if n % p == 0:
            return n == p
    d, r = n - 1, 0
    while d % 2 == 0:
        d, r = d // 2, r + 1
    for a in small:
        x = pow(a, d, n)
        if x in (1, n - 1):
            continue
        for _ in range(r - 1):
            x = x * x % n
            if x == n - 1:
                break
        else:
            return False
    return True


_PRIMES: list[int] = []


def moduli(count_bound: int) -> tuple[int, ...]:
    """The primes below 2**63, largest first, whose product exceeds ``count_bound``."""
    need = max(1, -(-(int(count_bound).bit_length() + 1) // _PRIME_BITS))
    candidate = _PRIMES[-1] - 2 if _PRIMES else 2 ** (_PRIME_BITS + 1) - 1
    while len(_PRIMES) < need:
        if _is_prime(candidate):
            _PRIMES.append(candidate)
        candidate -= 2
    return tuple(_PRIMES[:need])


def _rebuild(residues: np.ndarray, primes: tuple[int, ...]) -> list[int]:
    """Each column of ``residues`` (primes × values) as the integer below ∏ primes it stands for."""
    product = math.prod(primes)
    weights = [(product // p) * pow(product // p, -1, p) for p in primes]
    rows = [[int(v) for v in row] for row in residues]
    return [sum(w * row[j] for w, row in zip(weights, rows)) % product for j in range(residues.shape[1])]


def _visited(scores: np.ndarray, chosen: int) -> tuple[int, int]:
    """(cells the programme of one stratum updates, cells of its table), walking its band as the
    programme does (one step per score, no arithmetic on the table)."""
    total_n = scores.size
    chosen = min(chosen, total_n - chosen)
    if chosen == 0:
        return 0, 1
    a = np.sort(np.asarray(scores, dtype=np.int64) - int(np.min(scores)))
    width = int(a[::-1][:chosen].sum()) + 1
    cells, reach = 0, 0
    for i, score in enumerate(a.tolist(), start=1):
        k_hi, k_lo = min(i, chosen), max(1, chosen - (total_n - i))
        reach = min(width - 1, reach + score)
        if k_lo <= k_hi:
            cells += (k_hi - k_lo + 1) * (reach + 1 - score)
    return cells, (chosen + 1) * width


def exact_work(strata: Sequence[tuple[np.ndarray, int]]) -> tuple[int, int]:
    """(cells × primes updated, bytes of the largest table) of the exact programme over these strata."""
    work, memory = 0, 0
    for scores, chosen in strata:
        primes = len(moduli(math.comb(scores.size, chosen)))
        cells, size = _visited(scores, chosen)
        work += cells * primes
        memory = max(memory, 16 * primes * size)
    return work, memory


def _modular_subset_sums(scores: np.ndarray, chosen: int, primes: tuple[int, ...]) -> tuple[int, np.ndarray]:
    """``subset_sum_distribution`` in residues: ``(offset, residues)``, residues[i, j] the number of
    ``chosen``-subsets with sum ``offset + j`` modulo ``primes[i]``."""
    scores = np.asarray(scores, dtype=np.int64)
    total_n = scores.size
    if chosen == 0 or chosen == total_n:
        return int(scores.sum()) if chosen else 0, np.ones((len(primes), 1), dtype=np.uint64)
    if chosen > total_n - chosen:
        offset, residues = _modular_subset_sums(scores, total_n - chosen, primes)
        return int(scores.sum()) - (offset + residues.shape[1] - 1), residues[:, ::-1].copy()
    low = int(scores.min())
    a = np.sort(scores - low)
    width = int(a[::-1][:chosen].sum()) + 1
    p = np.array(primes, dtype=np.uint64)[:, None, None]
    table = np.zeros((len(primes), chosen + 1, width), dtype=np.uint64)
    scratch = np.empty_like(table)
    table[:, 0, 0] = 1
    reach = 0
    for i, score in enumerate(a.tolist(), start=1):
        k_hi = min(i, chosen)
        k_lo = max(1, chosen - (total_n - i))
        reach = min(width - 1, reach + score)
        if k_lo > k_hi:
            continue
        top = reach + 1
        block = table[:, k_lo:k_hi + 1, score:top]
        block += table[:, k_lo - 1:k_hi, 0:top - score]  # numpy buffers the overlap, as above
        _reduce(block, p, scratch[:, k_lo:k_hi + 1, score:top])
    return chosen * low, table[:, chosen].copy()


def _reduce(block: np.ndarray, p: np.ndarray, scratch: np.ndarray) -> None:
    """Entries below 2p (a sum of two residues) reduced modulo p in place: v − p wraps past 2**64
    when v < p, so the smaller of v and v − p is the residue."""
    np.subtract(block, p, out=scratch)
    np.minimum(block, scratch, out=block)


def exact_sum_distribution(strata: Sequence[tuple[np.ndarray, int]]) -> tuple[int, list[int]] | None:
    """The null of S1 as in :func:`sum_distribution`, in exact integers: ``(offset, counts)`` with
    ``counts[j]`` arrangements at S1 = offset + j; None when the programme would cost more than
    EXACT_WORK_LIMIT, EXACT_MEMORY_LIMIT or CONVOLUTION_LIMIT."""
    work, memory = exact_work(strata)
    if work > EXACT_WORK_LIMIT or memory > EXACT_MEMORY_LIMIT or _convolution_cost(strata) > CONVOLUTION_LIMIT:
        return None
    offset, counts = 0, [1]
    for scores, chosen in strata:
        bound = math.comb(scores.size, chosen)
        primes = moduli(bound)
        o, residues = _modular_subset_sums(scores, chosen, primes)
        c = _rebuild(residues, primes)
        offset += o
        counts = _convolve(counts, c)
    return offset, counts


def _convolution_cost(strata: Sequence[tuple[np.ndarray, int]]) -> int:
    """Products of Python integers the strata's exact convolution takes."""
    cost, length = 0, 1
    for scores, chosen in strata:
        k = min(chosen, scores.size - chosen)
        a = np.sort(scores - scores.min())
        width = int(a[::-1][:k].sum()) - int(a[:k].sum()) + 1
        cost += length * width if length > 1 else 0
        length += width - 1
    return cost


def _convolve(first: list[int], second: list[int]) -> list[int]:
    """Exact convolution of two lists of Python integers (strata are few and short; the product
    of their lengths is the cost)."""
    if len(first) == 1:
        return [first[0] * c for c in second]
    out = [0] * (len(first) + len(second) - 1)
    for i, f in enumerate(first):
        if f:
            for j, s in enumerate(second):
                out[i + j] += f * s
    return out


def exact_subset_sums_any_size(scores: np.ndarray) -> list[int] | None:
    """Number of subsets (of any size) of the nonnegative integer ``scores`` with each sum 0, 1, ...,
    Σ scores, exactly (the sign-flip null counts 2**n patterns); None beyond the limits."""
    scores = np.asarray(scores, dtype=np.int64)
    width = int(scores.sum()) + 1
    primes = moduli(2 ** scores.size)
    if scores.size * width * len(primes) > EXACT_WORK_LIMIT or 16 * width * len(primes) > EXACT_MEMORY_LIMIT:
        return None
    p = np.array(primes, dtype=np.uint64)[:, None]
    counts = np.zeros((len(primes), width), dtype=np.uint64)
    scratch = np.empty_like(counts)
    counts[:, 0] = 1
    reach = 0
    for a in scores.tolist():
        if a == 0:
            counts += counts  # both choices give the same sum
            _reduce(counts, p, scratch)
            continue
        reach += a
        block = counts[:, a:reach + 1]
        block += counts[:, 0:reach + 1 - a]  # numpy buffers the overlap
        _reduce(block, p, scratch[:, a:reach + 1])
    return _rebuild(counts, primes)
