"""Permutation test engine: V-MOUSE-PERM, V-PERMEABILITY, V-TEA, identities 13, 16, 17, 18;
scipy agreement; strata by brute force; the draw contract; batch invariance; errors."""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import DRAW_BLOCK, stream_for
from planrunner.errors import EngineError

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)

# Source: H&W (1973) p. 69 (V-PERMEABILITY, published, confirmed)
PERM_X = np.array([0.80, 0.83, 1.89, 1.04, 1.45, 1.38, 1.91, 1.64, 0.73, 1.46])
PERM_Y = np.array([1.15, 0.88, 0.90, 0.74, 1.21])

MEAN_DIFF = get_statistic("mean_difference")


def run(samples, name="mean_difference", *, m=20000, alternative="greater", exact="auto", analysis="perm",
        seed=77, **kw):
    return permutation_test(samples, get_statistic(name),
                            PermutationOptions(resamples=m, alternative=alternative, exact=exact),
                            stream=stream_for(seed, analysis), **kw)


def scipy_exact(x, y, statistic, alternative):
    # scipy reference: exact enumeration of the independent-samples null
    return scipy.stats.permutation_test((x, y), statistic, permutation_type="independent",
                                        n_resamples=np.inf, alternative=alternative, vectorized=True)


def mean_diff_axis(x, y, axis=-1):
    return np.mean(x, axis=axis) - np.mean(y, axis=axis)


def median_diff_axis(x, y, axis=-1):
    return np.median(x, axis=axis) - np.median(y, axis=axis)


# ------------------------------------------------------------------ V-MOUSE-PERM

def test_mouse_exact() -> None:
    result = run([TREATMENT, CONTROL])
    assert result.exact and result.arrangements == 11440 and result.resamples == 11440  # identity 18: C(16, 7)
    assert result.count_greater == 1613  # Source: V-MOUSE-PERM, exact (1613/11440)
    assert result.p_value == 1613 / 11440
    assert result.observed == pytest.approx(30.6349206, abs=1e-7)  # Source: V-MOUSE-PERM, exact
    assert result.scheme == "labels shuffled over all rows"
    assert result.two_sided_rule == "doubled" and result.n == (7, 9)
    assert result.warnings == ()


def test_mouse_two_sided_matches_scipy() -> None:
    result = run([TREATMENT, CONTROL], alternative="two-sided")
    ref = scipy_exact(TREATMENT, CONTROL, mean_diff_axis, "two-sided")
    assert result.p_value == pytest.approx(ref.pvalue, rel=1e-12)  # scipy reference
    assert result.p_value == pytest.approx(0.281993007, abs=5e-10)  # Source: V-MOUSE-PERM, exact (9 digits)
    assert result.p_value == pytest.approx(2 * min(result.count_greater, result.count_less) / 11440, rel=1e-15)


@pytest.mark.parametrize("fast", [True, False])  # the DP null (weighted support) and the listed arrangements
def test_mouse_null_moments_identity_16(fast: bool) -> None:
    result = run([TREATMENT, CONTROL], fast=fast)
    assert result.computation == ("dynamic programming" if fast else "enumeration")
    weights = None if result.null_weights is None else np.asarray(result.null_weights)
    mean = np.average(result.null, weights=weights)
    var = np.average((np.asarray(result.null) - mean) ** 2, weights=weights)
    pooled = np.concatenate([TREATMENT, CONTROL])
    variance = np.var(pooled, ddof=1) * (1 / 7 + 1 / 9)  # identity 16
    assert abs(mean) <= 1e-12 * 200
    assert var == pytest.approx(variance, rel=1e-12)
    assert var == pytest.approx(759.8010582, abs=1e-7)  # Source: V-MOUSE-PERM, exact


def test_mouse_monte_carlo_within_four_sd() -> None:
    m = 20000
    result = run([TREATMENT, CONTROL], m=m, exact="never", analysis="mouse-mc")
    p = 1613 / 11440  # Source: V-MOUSE-PERM, exact
    assert not result.exact and result.resamples == m and result.null.shape == (m,)
    assert abs(result.p_value - p) <= 4 * math.sqrt(p * (1 - p) / m)  # V-TOL
    assert result.p_value == (result.count_greater + 1) / (m + 1)


# ------------------------------------------------------------------ other exact cases, scipy

def test_permeability_exact() -> None:
    greater = run([PERM_X, PERM_Y])
    assert greater.arrangements == 3003  # identity 18: C(15, 5)
    assert greater.count_greater == 191  # Source: V-PERMEABILITY, exact 191/3003
    two_sided = run([PERM_X, PERM_Y], alternative="two-sided")
    assert two_sided.p_value == pytest.approx(scipy_exact(PERM_X, PERM_Y, mean_diff_axis, "two-sided").pvalue,
                                              rel=1e-12)  # scipy reference


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
@pytest.mark.parametrize("name, ref_stat", [("mean_difference", mean_diff_axis),
                                            ("median_difference", median_diff_axis)])
def test_agreement_with_scipy_exact(alternative: str, name: str, ref_stat) -> None:
    rng = np.random.default_rng(21)
    x, y = np.round(rng.normal(0.5, 1, 6), 1), np.round(rng.normal(0, 1, 8), 1)  # rounding makes ties
    ours = run([x, y], name, alternative=alternative)
    ref = scipy_exact(x, y, ref_stat, alternative)
    assert ours.exact and ours.arrangements == math.comb(14, 6)
    assert ours.p_value == pytest.approx(ref.pvalue, rel=1e-12)  # scipy reference
    assert ours.observed == pytest.approx(float(ref.statistic), rel=1e-12)


def test_tea_tasting_identity_17() -> None:
    # V-TEA [[3, 1], [1, 3]]: cups with milk first, 1 = judged milk first
    milk_first = np.array([1.0, 1, 1, 0])
    tea_first = np.array([1.0, 0, 0, 0])
    result = run([milk_first, tea_first])
    assert result.arrangements == 70 and result.count_greater == 17  # Source: V-TEA, exact 17/70
    fisher = scipy.stats.fisher_exact([[3, 1], [1, 3]], alternative="greater")
    assert result.p_value == pytest.approx(fisher.pvalue, rel=1e-12)  # identity 17; scipy reference


def test_exact_equals_monte_carlo_within_tolerance() -> None:
    exact = run([PERM_X, PERM_Y], alternative="two-sided")
    m = 20000
    mc = run([PERM_X, PERM_Y], m=m, alternative="two-sided", exact="never", analysis="perm-mc")
    p = exact.p_value
    # two-sided = 2 min(...): s.d. of the doubled one-sided estimate is 2 sqrt(q(1-q)/m), q = p/2
    q = p / 2
    assert abs(mc.p_value - p) <= 4 * 2 * math.sqrt(q * (1 - q) / m)  # V-TOL


def test_monte_carlo_floor_identity_13() -> None:
    # identity 13 (cf. V-FLOOR): no random arrangement reaches the observed split,
    # so b = 0 and p = 1/(m+1) exactly, never 0
    low, high = np.arange(20.0), np.arange(20.0) + 1000
    result = run([high, low], m=999, exact="never")
    assert result.count_greater == 0
    assert result.p_value == 1 / 1000


def test_enumeration_modes() -> None:
    auto_mc = run([PERM_X, PERM_Y], m=1000)  # non-integer data: no exact shortcut
    assert not auto_mc.exact and auto_mc.resamples == 1000 and auto_mc.arrangements == 3003
    assert auto_mc.computation == "Monte Carlo"
    forced = run([PERM_X, PERM_Y], m=10, exact="always")
    assert forced.exact and forced.resamples == 3003 and forced.computation == "enumeration"
    # integer data: more arrangements than resamples, but the DP null is exact
    dp = run([TREATMENT, CONTROL], m=1000)
    assert dp.exact and dp.computation == "dynamic programming" and dp.arrangements == 11440
    assert dp.count_greater == 1613  # Source: V-MOUSE-PERM, exact 1613/11440
    with pytest.raises(EngineError, match="155,117,520 arrangements"):
        run([np.arange(15.0) + 0.1, np.arange(15.0) + 1.3], exact="always")
    with pytest.raises(EngineError, match="155,117,520 arrangements"):
        run([np.arange(15.0), np.arange(15.0) + 1], "median_difference", exact="always")


# ------------------------------------------------------------------ strata

def brute_force_stratified(x, x_codes, y, y_codes, observed, tol):
    """Every within-stratum relabelling, listed directly from the definition (identity 18)."""
    values = np.concatenate([x, y])
    codes_all = np.concatenate([x_codes, y_codes])
    in_x = np.concatenate([np.ones(x.size, bool), np.zeros(y.size, bool)])
    per_stratum = []
    for h in np.unique(codes_all):
        members = np.flatnonzero(codes_all == h)
        k = int(in_x[members].sum())
        per_stratum.append([set(c) for c in itertools.combinations(members.tolist(), k)])
    stats = []
    for choice in itertools.product(*per_stratum):
        chosen = set().union(*choice)
        mask = np.array([i in chosen for i in range(values.size)])
        stats.append(values[mask].mean() - values[~mask].mean())
    stats = np.array(stats)
    return stats, int(np.sum(stats >= observed - tol)), int(np.sum(stats <= observed + tol))


def test_stratified_exact_by_brute_force() -> None:
    x = np.array([3.1, 4.0, 9.5, 7.2, 1.0, 6.6])
    x_codes = np.array([0, 0, 1, 1, 2, 1])
    y = np.array([2.2, 5.5, 8.1, 0.3, 4.4, 6.0, 2.9])
    y_codes = np.array([0, 1, 1, 2, 2, 0, 1])
    result = run([x, y], strata=[x_codes, y_codes])
    # stratum 0: 2 of 4; stratum 1: 3 of 6; stratum 2: 1 of 3  (identity 18, per stratum)
    assert result.arrangements == math.comb(4, 2) * math.comb(6, 3) * math.comb(3, 1)
    assert result.exact and result.scheme == "labels shuffled within strata"
    stats, greater, less = brute_force_stratified(x, x_codes, y, y_codes, result.observed, result.tolerance)
    assert (result.count_greater, result.count_less) == (greater, less)
    np.testing.assert_allclose(np.sort(result.null), np.sort(stats), rtol=1e-12)

    mc = run([x, y], m=3000, exact="never", strata=[x_codes, y_codes])
    # every random arrangement is one of the within-strata relabellings
    distance = np.min(np.abs(mc.null[:, None] - np.unique(stats)[None, :]), axis=1)
    assert np.all(distance <= 1e-12)
    # and the unstratified shuffle is not: it reaches values the strata forbid
    free = run([x, y], m=3000, exact="never")
    assert np.max(np.min(np.abs(free.null[:, None] - np.unique(stats)[None, :]), axis=1)) > 1e-6


def test_draw_contract_by_hand() -> None:
    x = np.array([1.0, 5.0, 2.0])
    x_codes = np.array([1, 0, 1])
    y = np.array([7.0, 3.0, 4.0, 8.0])
    y_codes = np.array([0, 1, 0, 1])
    stream = stream_for(5, "contract")
    m = DRAW_BLOCK + 2
    result = permutation_test([x, y], MEAN_DIFF, PermutationOptions(resamples=m, alternative="greater", exact="never"),
                              stream=stream, strata=[x_codes, y_codes], fast=False)
    # pooled stratum by stratum, group 1 first: stratum 0 -> [5 | 7, 4], stratum 1 -> [1, 2 | 3, 8]
    pooled = np.array([5.0, 7, 4, 1, 2, 3, 8])
    stratum = np.array([0, 0, 0, 1, 1, 1, 1])
    group1_slots = np.array([0, 3, 4])
    group2_slots = np.array([1, 2, 5, 6])
    for r in (0, 1, DRAW_BLOCK + 1):
        keys = stream.generator(r // DRAW_BLOCK).random((r % DRAW_BLOCK + 1, 7))[-1]
        order = np.argsort(keys + 2 * stratum, kind="stable")
        expected = pooled[order[group1_slots]].mean() - pooled[order[group2_slots]].mean()
        assert result.null[r] == expected


@pytest.mark.parametrize("exact", ["never", "always"])
def test_batch_size_never_changes_the_numbers(exact: str) -> None:
    strata = [np.array([0, 1, 0, 1, 0, 1, 1]), np.array([1, 1, 0, 0, 1, 0, 1, 0, 0])]
    results = [run([TREATMENT, CONTROL], "median_difference", m=2345, exact=exact, strata=strata,
                   batch_elements=b) for b in (1, 500, 10 ** 9)]
    for other in results[1:]:
        assert np.array_equal(results[0].null, other.null)
        assert results[0].p_value == other.p_value


def test_stream_independence() -> None:
    a = run([TREATMENT, CONTROL], m=500, exact="never", analysis="primary")
    b = run([TREATMENT, CONTROL], m=500, exact="never", analysis="primary")
    c = run([TREATMENT, CONTROL], m=500, exact="never", analysis="secondary")
    assert np.array_equal(a.null, b.null)
    assert not np.array_equal(a.null, c.null)


# ------------------------------------------------------------------ properties

@settings(max_examples=40, deadline=None)
@given(x=st.lists(st.integers(-5, 5), min_size=1, max_size=6),
       y=st.lists(st.integers(-5, 5), min_size=1, max_size=6),
       alternative=st.sampled_from(["greater", "less", "two-sided"]),
       exact=st.sampled_from(["never", "always"]),
       name=st.sampled_from(["mean_difference", "median_difference"]))
def test_p_value_bounds(x, y, alternative, exact, name) -> None:
    m = 99
    result = run([np.array(x, float), np.array(y, float)], name, m=m, alternative=alternative, exact=exact)
    assert 0.0 < result.p_value <= 1.0
    if result.exact:
        assert result.p_value >= 1 / result.arrangements  # identity 13
        assert result.arrangements == math.comb(len(x) + len(y), len(x))  # identity 18
    else:
        assert result.p_value >= 1 / (m + 1)  # identity 13
    # the observed arrangement is always at least as extreme as itself
    assert result.count_greater + result.count_less >= (1 if result.exact else 0)


# ------------------------------------------------------------------ warnings, errors, result

def test_few_arrangements_warning() -> None:
    result = run([np.array([1.0, 2.0]), np.array([3.0, 4.0])])
    assert result.arrangements == 6
    assert [w.code for w in result.warnings] == ["few-arrangements"]
    assert result.p_value == 1.0  # the observed split is the smallest of 6: 6/6 reach it


def test_constant_data_degenerate() -> None:
    result = run([np.full(8, 2.5), np.full(9, 2.5)], alternative="two-sided", m=999, exact="never")
    assert result.p_value == 1.0
    assert "degenerate-distribution" in [w.code for w in result.warnings]


def test_errors() -> None:
    with pytest.raises(EngineError, match="statistic of two or more groups"):
        run([TREATMENT], "mean")
    with pytest.raises(EngineError, match="unknown alternative"):
        run([TREATMENT, CONTROL], alternative="bigger")
    with pytest.raises(EngineError, match="unknown exact"):
        run([TREATMENT, CONTROL], exact="sometimes")
    with pytest.raises(EngineError, match="non-finite"):
        run([TREATMENT, np.array([1.0, np.nan])])
    with pytest.raises(EngineError, match="group 1 is empty"):
        run([np.array([]), CONTROL])
    with pytest.raises(EngineError, match="stratum code"):
        run([TREATMENT, CONTROL], strata=[np.zeros(7, int), np.zeros(3, int)])


def test_result_is_frozen_and_read_only() -> None:
    result = run([TREATMENT, CONTROL])
    with pytest.raises(dataclasses.FrozenInstanceError):
        result.p_value = 0.5  # type: ignore[misc]
    with pytest.raises(ValueError):
        result.null[0] = 0.0
    assert result.tolerance == pytest.approx(2.0 ** -43 * 197)  # the tie rule: 2**-43 · max(|t|, max|x|)


@pytest.mark.parametrize("rows_per_batch", [1, 4, 7, 1000])
def test_enumeration_order_and_chunks(rows_per_batch: int) -> None:
    # the chunked product equals itertools.product of per-stratum combinations (lexicographic)
    from planrunner.engines.permutation import _combination_product

    blocks = [(0, 4, 2), (4, 3, 1), (7, 5, 2)]
    got = np.concatenate(list(_combination_product(blocks, rows_per_batch)))
    want = np.array([sum(choice, ()) for choice in itertools.product(
        *[itertools.combinations(range(start, start + size), first) for start, size, first in blocks])])
    assert np.array_equal(got, want)


def _sums_by_argsort(keys, values, stratum, slots):
    # the draw contract written out: stable argsort of keys + 2 * stratum, group 1 the first slots
    order = np.argsort(keys + 2.0 * stratum, axis=1, kind="stable")
    return np.array([values[row[slots]].sum() for row in order])


@pytest.mark.parametrize("sizes", [[(5000, 5000)], [(3, 900), (400, 2), (0, 7), (6, 0), (1, 1)],
                                   [(2000, 3000), (10, 40)], [(1, 0)]])
def test_key_window_sums_equal_the_sorted_contract(sizes) -> None:
    from planrunner.engines.permutation import _first_group_sums, _pool
    rng = np.random.default_rng(len(sizes))
    data = [np.concatenate([rng.normal(size=a) for a, _ in sizes]),
            np.concatenate([rng.normal(size=b) for _, b in sizes])]
    codes = [np.repeat(np.arange(len(sizes)), [a for a, _ in sizes]),
             np.repeat(np.arange(len(sizes)), [b for _, b in sizes])]
    pooled = _pool(tuple(data), tuple(codes))
    width = pooled.values.shape[0]
    keys = rng.random((30, width))
    keys[2] = 0.25  # every key tied: ties go to the lower position
    keys[4, ::2] = keys[4, -1]  # many ties inside the window
    keys[6] = np.linspace(0.999, 0.0, width)  # keys in reverse order of position
    keys[8, : width // 2] = 0.999  # the n1-th key far above its usual window
    keys[9, : width // 2] = 0.0001  # and far below it
    got = _first_group_sums(keys, pooled.values, pooled.blocks)
    want = _sums_by_argsort(keys, pooled.values, pooled.stratum, pooled.slots[0])
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)


def test_key_window_path_is_range_invariant_and_equals_plain() -> None:
    rng = np.random.default_rng(4)
    x, y = rng.gamma(2.0, 3.0, 1500), rng.gamma(2.0, 3.5, 1300)
    kw = dict(options=PermutationOptions(resamples=2 * DRAW_BLOCK + 37, alternative="two-sided", exact="never"),
              stream=stream_for(9, "window"))
    fast = permutation_test([x, y], MEAN_DIFF, fast=True, **kw)
    plain = permutation_test([x, y], MEAN_DIFF, fast=False, **kw)
    np.testing.assert_allclose(fast.null, plain.null, rtol=0, atol=1e-12)
    assert (fast.count_greater, fast.count_less) == (plain.count_greater, plain.count_less)
    from planrunner.engines.permutation import _mean_difference_range, _pool
    pooled = _pool((x, y), None)
    total = kw["options"].resamples
    whole = _mean_difference_range(pooled, kw["stream"], 10 ** 6, 0, total)
    split = np.concatenate([_mean_difference_range(pooled, kw["stream"], rows, a, b)  # batches of any size
                            for rows, (a, b) in zip((1, 7, 10 ** 6), [(0, 999), (999, 1001), (1001, total)])])
    assert np.array_equal(whole, split) and np.array_equal(whole, fast.null)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 40), st.integers(0, 40)), min_size=1, max_size=4),
       st.integers(0, 2 ** 32 - 1), st.sampled_from([1.0, 64.0, 2.0 ** 53]))
def test_key_window_sums_equal_the_sorted_contract_on_any_layout(sizes, seed, grain) -> None:
    # grain rounds the keys onto a coarse grid (1/64): many ties, which must go to the lower position
    from planrunner.engines.permutation import _first_group_sums, _pool
    if sum(a + b for a, b in sizes) == 0 or sum(a for a, _ in sizes) == 0 or sum(b for _, b in sizes) == 0:
        return
    rng = np.random.default_rng(seed)
    data = [np.concatenate([rng.integers(-5, 6, a) for a, _ in sizes]).astype(float),
            np.concatenate([rng.integers(-5, 6, b) for _, b in sizes]).astype(float)]
    codes = [np.repeat(np.arange(len(sizes)), [a for a, _ in sizes]),
             np.repeat(np.arange(len(sizes)), [b for _, b in sizes])]
    pooled = _pool(tuple(data), tuple(codes))
    keys = np.floor(rng.random((9, pooled.values.shape[0])) * grain) / grain
    got = _first_group_sums(keys, pooled.values, pooled.blocks)
    want = _sums_by_argsort(keys, pooled.values, pooled.stratum, pooled.slots[0])
    assert np.array_equal(got, want)  # integer values: every order of summation is exact
