"""The fast kernels give the plain computation's numbers on the same resamples (DESIGN §7)."""

from __future__ import annotations

import importlib
import math

import numpy as np
import pytest

from planrunner.engines.blocks import block_ranges, map_resamples, mapping_ranges
from planrunner.engines.fastpaths import kth_smallest, median_of_draws, median_window, window_codes
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import UniformRows, stream_for

boot = importlib.import_module("planrunner.engines.bootstrap")
perm = importlib.import_module("planrunner.engines.permutation")

RNG = np.random.default_rng(20261201)


def _groups(name: str, n: int) -> tuple[np.ndarray, ...]:
    statistic = get_statistic(name)
    if statistic.columns == 2:
        x = RNG.normal(size=n)
        return (np.column_stack([x, x + RNG.normal(size=n)]),)
    first = np.round(RNG.gamma(2.0, 30.0, size=n), 1)  # rounded: many ties
    return (first,) if statistic.samples == 1 else (first, np.round(RNG.normal(50.0, 20.0, size=n // 2 + 3)))


@pytest.mark.parametrize("name", ["mean", "median", "median_difference", "mean_difference", "correlation"])
@pytest.mark.parametrize("n,stratified", [(1200, False), (1201, True), (9, False)])
def test_bootstrap_kernels_equal_plain_bit_for_bit(name, n, stratified):
    statistic = get_statistic(name)
    data = _groups(name, n)
    strata = tuple(RNG.integers(0, 3, size=a.shape[0]) for a in data) if stratified else None
    layout = boot._layout(data, strata)
    stream = stream_for(7, f"fast-{name}")
    fast = boot._draw(layout, statistic, 2100, stream, 2_000_000)
    plain = boot._draw_plain(layout, statistic, 2100, stream, 2_000_000)
    assert fast.tobytes() == plain.tobytes()  # identity: same draws, same arithmetic


def test_median_of_draws_is_np_median_bit_for_bit():
    for n in (256, 257, 1000, 1001):
        values = np.round(RNG.normal(size=n), 2)
        values[:5] = -0.0  # signed zeros must come out as np.median gives them
        index = RNG.integers(0, n, size=(40, n))
        index[0] = 0  # a resample of one value: its middle leaves the window (np.median's own row)
        got = median_of_draws(values, index, window_codes(values, median_window(np.sort(values))))
        assert got.tobytes() == np.median(values[index], axis=-1).tobytes()


@pytest.mark.parametrize("lo,hi", [(0.45, 0.55), (0.9, 0.95), (2.0, 3.0), (-1.0, -0.5), (0.5, 0.5)])
def test_kth_smallest_is_exact_for_any_window(lo, hi):
    # the window only chooses between the quick and the full selection; the answer is the same
    values = RNG.random((30, 501))
    ks = [249, 250]
    expected = np.partition(values, ks, axis=1)[:, ks]
    assert np.array_equal(kth_smallest(values, ks, lo, hi), expected)


def _plain_null(pooled, statistic, stream, resamples):
    return perm._evaluate(pooled, statistic, perm._random(pooled, stream, resamples, 97), resamples)


@pytest.mark.parametrize("sizes,strata_count", [((700, 500), 1), ((300, 200), 4), ((5, 3), 1), ((40, 40), 40)])
def test_mean_difference_permutation_kernel_equals_plain(sizes, strata_count):
    statistic = get_statistic("mean_difference")
    data = tuple(RNG.gamma(2.0, 100.0, size=k) for k in sizes)
    strata = None if strata_count == 1 else tuple(RNG.integers(0, strata_count, size=k) for k in sizes)
    pooled = perm._pool(data, strata)
    stream = stream_for(11, f"perm-{sizes}")
    fast = perm._random_null(pooled, statistic, stream, 1500, 97)
    plain = _plain_null(pooled, statistic, stream, 1500)
    scale = max(float(np.max(np.abs(a))) for a in data)
    # a different order of summation only: rounding, far inside the engine's 1e-10 tie tolerance
    np.testing.assert_allclose(fast, plain, rtol=0, atol=1e-12 * scale)


def test_mean_difference_kernel_resolves_tied_keys_as_the_stable_argsort(monkeypatch):
    # keys on a coarse grid tie often; such rows must follow the contract's stable order exactly
    real_take = UniformRows.take
    monkeypatch.setattr(UniformRows, "take", lambda self, rows: np.floor(real_take(self, rows) * 16) / 16)
    statistic = get_statistic("mean_difference")
    data = (RNG.normal(size=300), RNG.normal(size=200))
    pooled = perm._pool(data, None)
    stream = stream_for(3, "ties")
    fast = perm._random_null(pooled, statistic, stream, 400, 50)
    plain = _plain_null(pooled, statistic, stream, 400)
    np.testing.assert_allclose(fast, plain, rtol=0, atol=1e-12 * 5)


def test_split_ranges_give_the_same_numbers():
    statistic = get_statistic("median")
    layout = boot._layout((RNG.normal(size=500),), None)
    stream = stream_for(5, "split")
    whole = boot._draw(layout, statistic, 4321, stream, 2_000_000)
    seen = []

    def mapper(task, total):
        ranges = block_ranges(total, 3)
        seen.append(ranges)
        return [task(a, b) for a, b in reversed(ranges)][::-1]  # computed out of order on purpose

    with mapping_ranges(mapper):
        split = boot._draw(layout, statistic, 4321, stream, 2_000_000)
    assert seen == [[(0, 2000), (2000, 4000), (4000, 4321)]]
    assert split.tobytes() == whole.tobytes()
    assert map_resamples(lambda a, b: np.arange(a, b, dtype=float), 0).size == 0


@pytest.mark.parametrize("sizes,strata_count", [((10, 10), 1), ((3, 9), 1), ((6, 6), 2), ((1, 5), 1), ((4, 4), 1)])
def test_exact_mean_difference_equals_plain_enumeration(sizes, strata_count):
    statistic = get_statistic("mean_difference")
    data = tuple(RNG.integers(0, 40, size=k).astype(float) for k in sizes)
    strata = None if strata_count == 1 else tuple(np.arange(k) % strata_count for k in sizes)
    pooled = perm._pool(data, strata)
    arrangements = math.prod([math.comb(size, first) for _, size, first in pooled.blocks])
    fast = perm._exact_null(pooled, statistic, 1000, arrangements)
    plain = perm._evaluate(pooled, statistic, perm._enumerate(pooled, 1000), arrangements)
    assert fast.shape == plain.shape == (arrangements,)
    np.testing.assert_allclose(fast, plain, rtol=0, atol=1e-12 * 40)  # same order, summation rounding only
