"""Engines of the complete permutation tests: exact DP nulls, fast paths against the plain
computation, sign-flip / cluster / association draw contracts, max-T, multiplicity (V-BH95),
and property tests (0 < p ≤ 1, Monte Carlo p ≥ 1/(m+1), a symmetric sign-flip null)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.multitest import multipletests

from planrunner.engines.association import association_test
from planrunner.engines.clusters import cluster_test
from planrunner.engines.exactdist import subset_sum_distribution, sum_distribution
from planrunner.engines.maxt import max_t
from planrunner.engines.multiplicity import adjust
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.pvalues import clopper_pearson
from planrunner.engines.signflip import signflip_test, swap_bits
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import DRAW_BLOCK, stream_for
from planrunner.errors import EngineError

# Source: V-DEPRESSION (H&W 1973 p. 29f)
HW_X = np.array([1.83, 0.50, 1.62, 2.48, 1.68, 1.88, 1.55, 3.06, 1.30])
HW_Y = np.array([0.878, 0.647, 0.598, 2.05, 1.06, 1.29, 1.06, 3.14, 1.29])
# Source: V-DARWIN
DARWIN = np.array([49, -67, 8, 16, 6, 23, 28, 41, 14, 29, 56, 24, 75, 60, -48], dtype=float)
# Source: V-BH95 (Benjamini & Hochberg 1995 §4)
BH95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
        0.6528, 0.7590, 1.000]


def stream(name: str = "t", seed: int = 11):
    return stream_for(seed, name)


# ------------------------------------------------------------------ dynamic programming

def test_subset_sums_equal_enumeration_with_ties():
    scores = np.array([3, 1, 4, 1, 5, 9, 2, 6, 5, 3])
    for chosen in (1, 4, 7):
        offset, counts, exponent = subset_sum_distribution(scores, chosen)
        assert exponent == 0
        direct: dict[int, int] = {}
        for c in itertools.combinations(range(scores.size), chosen):  # identity 18
            total = int(scores[list(c)].sum())
            direct[total] = direct.get(total, 0) + 1
        got = {offset + j: int(v) for j, v in enumerate(counts) if v}
        assert got == direct
    offset, counts, _ = sum_distribution([(np.array([0, 1, 1]), 1), (np.array([2, 5]), 1)])
    assert dict((offset + j, int(v)) for j, v in enumerate(counts) if v) == {2: 1, 3: 2, 5: 1, 6: 2}


def test_dp_rank_sum_equals_exact_mann_whitney_at_larger_sizes():
    rng = np.random.default_rng(3)
    x, y = rng.normal(0.4, 1, 40), rng.normal(0, 1, 35)  # invented, continuous: no ties
    result = permutation_test([x, y], get_statistic("rank_sum"),
                              PermutationOptions(resamples=9999, alternative="greater"),
                              stream=stream())
    assert result.computation == "dynamic programming" and result.arrangements == math.comb(75, 40)
    ref = stats.mannwhitneyu(x, y, alternative="greater", method="exact")  # scipy reference
    assert result.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    both = permutation_test([x, y], get_statistic("rank_sum"),
                            PermutationOptions(resamples=9999, alternative="two-sided"),
                            stream=stream())
    ref2 = stats.mannwhitneyu(x, y, method="exact")  # scipy reference
    assert both.p_value == pytest.approx(ref2.pvalue, rel=1e-9)


def test_dp_with_ties_and_strata_equals_enumeration():
    x = np.array([1.0, 2, 2, 3, 5, 1, 4])
    y = np.array([2.0, 2, 3, 3, 1, 0, 6, 2])
    sx, sy = np.array([0, 0, 1, 1, 1, 0, 1]), np.array([0, 1, 1, 0, 0, 1, 1, 0])
    for name in ("mean_difference", "rank_sum", "t_pooled"):
        for alternative in ("greater", "less", "two-sided"):
            kw = dict(stream=stream(), strata=[sx, sy])
            dp = permutation_test([x, y], get_statistic(name), PermutationOptions(10, alternative), **kw)
            always = PermutationOptions(10, alternative, exact="always")
            full = permutation_test([x, y], get_statistic(name), always, **kw)
            listed = permutation_test([x, y], get_statistic(name), always, fast=False, **kw)
            assert dp.computation == "dynamic programming" and listed.computation == "enumeration"
            assert full.computation == "dynamic programming"  # always: the DP costs less than listing
            assert full.p_value == dp.p_value
            assert dp.p_value == pytest.approx(listed.p_value, rel=1e-12), (name, alternative)
            assert dp.smallest_p == pytest.approx(listed.smallest_p, rel=1e-12)


def test_dp_reaches_two_hundred_per_group_with_binary_outcomes():
    # 200 + 200 binary outcomes: the hypergeometric, one-sided equal to Fisher's exact test (identity 17)
    x = np.r_[np.ones(120), np.zeros(80)]
    y = np.r_[np.ones(100), np.zeros(100)]
    result = permutation_test([x, y], get_statistic("risk_difference"),
                              PermutationOptions(resamples=999, alternative="greater"),
                              stream=stream())
    assert result.computation == "dynamic programming"
    ref = stats.fisher_exact([[120, 80], [100, 100]], alternative="greater").pvalue  # scipy reference
    assert result.p_value == pytest.approx(ref, rel=1e-9)


# ------------------------------------------------------------------ fast paths equal the plain computation

def test_mean_fast_path_counts_equal_plain():
    rng = np.random.default_rng(5)
    x, y = rng.normal(size=12), rng.normal(size=9)
    for exact in ("never", "always"):
        kw = dict(options=PermutationOptions(resamples=3000, alternative="two-sided", exact=exact),
                  stream=stream("fast"))
        if exact == "always":
            x, y = x[:7], y[:6]
        fast = permutation_test([x, y], get_statistic("mean_difference"), fast=True, **kw)
        plain = permutation_test([x, y], get_statistic("mean_difference"), fast=False, **kw)
        np.testing.assert_allclose(fast.null, plain.null, rtol=0, atol=1e-12)
        assert (fast.count_greater, fast.count_less) == (plain.count_greater, plain.count_less)


@pytest.mark.parametrize("name", ["mean_difference", "signed_rank"])
@pytest.mark.parametrize("exact", ["never", "auto"])
def test_sign_flip_fast_path_equals_plain(name, exact):
    kw = dict(options=PermutationOptions(resamples=1500, alternative="two-sided", exact=exact), stream=stream("flip"))
    fast = signflip_test(HW_X, HW_Y, get_statistic(name), fast=True, **kw)
    plain = signflip_test(HW_X, HW_Y, get_statistic(name), fast=False, **kw)
    np.testing.assert_allclose(fast.null, plain.null, rtol=0, atol=1e-12)
    assert fast.p_value == plain.p_value


def test_sign_flip_dp_equals_enumeration():
    for name in ("mean_difference", "signed_rank"):
        listed = signflip_test(DARWIN, np.zeros(15), get_statistic(name),
                               PermutationOptions(resamples=10**5, alternative="greater"),
                               stream=stream())
        dp = signflip_test(DARWIN, np.zeros(15), get_statistic(name),
                           PermutationOptions(resamples=10, alternative="greater"),
                           stream=stream())
        assert listed.computation == "enumeration" and dp.computation == "dynamic programming"
        assert dp.p_value == pytest.approx(listed.p_value, rel=1e-12)
        assert dp.count_greater == pytest.approx(listed.count_greater)


def test_cluster_fast_path_equals_plain():
    x = np.array([5.1, 6.0, 5.5, 7.2, 6.8, 8.0, 6.1])
    y = np.array([4.2, 5.0, 5.3, 4.8, 6.0, 5.2, 4.4])
    cx, cy = np.array([0, 0, 1, 1, 2, 3, 4]), np.array([5, 5, 6, 7, 7, 8, 9])
    for exact in ("auto", "never"):
        kw = dict(options=PermutationOptions(resamples=150, alternative="greater", exact=exact), stream=stream("cl"))
        fast = cluster_test(x, y, cx, cy, get_statistic("mean_difference"), fast=True, **kw)
        plain = cluster_test(x, y, cx, cy, get_statistic("mean_difference"), fast=False, **kw)
        np.testing.assert_allclose(fast.null, plain.null, rtol=0, atol=1e-12)
        assert fast.count_greater == plain.count_greater
    assert cluster_test(x, y, cx, cy, get_statistic("mean_difference"),
                        PermutationOptions(resamples=9999, alternative="greater"),
                        stream=stream()).arrangements == math.comb(10, 5)  # identity 18 over clusters


# ------------------------------------------------------------------ draw contracts and batch invariance

def test_swap_bits_contract_and_batch_invariance():
    s = stream("bits")
    whole = swap_bits(s, 70, 0, DRAW_BLOCK + 5)
    pieces = np.vstack([swap_bits(s, 70, a, b) for a, b in ((0, 3), (3, 999), (999, 1001), (1001, DRAW_BLOCK + 5))])
    assert np.array_equal(whole, pieces)
    gen = s.generator(1)
    words = gen.integers(0, 2**64, size=(2, 2), dtype=np.uint64)[1]  # resample 1001: row 1 of block 1
    expected = [(int(words[i // 64]) >> (i % 64)) & 1 == 1 for i in range(70)]
    assert whole[DRAW_BLOCK + 1].tolist() == expected
    a = signflip_test(HW_X, HW_Y, get_statistic("mean_difference"),
                      PermutationOptions(resamples=2100, alternative="greater", exact="never"),
                      stream=s, batch_elements=7)
    b = signflip_test(HW_X, HW_Y, get_statistic("mean_difference"),
                      PermutationOptions(resamples=2100, alternative="greater", exact="never"),
                      stream=s)
    assert np.array_equal(a.null, b.null)


def test_association_batch_invariance_and_streams():
    rng = np.random.default_rng(8)
    xy = rng.normal(size=(20, 2))
    kw = dict(options=PermutationOptions(resamples=1200, alternative="two-sided", exact="never"))
    a = association_test(xy, get_statistic("spearman"), stream=stream("a"), batch_elements=50, **kw)
    b = association_test(xy, get_statistic("spearman"), stream=stream("a"), **kw)
    c = association_test(xy, get_statistic("spearman"), stream=stream("other"), **kw)
    assert np.array_equal(a.null, b.null) and not np.array_equal(a.null, c.null)
    assert a.p_value >= 1 / 1201  # identity 13
    small = xy[:6]
    listed = [association_test(small, get_statistic("kendall"),
                               PermutationOptions(resamples=1000, alternative="greater"),
                               stream=stream("a"), batch_elements=b) for b in (13, 10**6)]
    assert listed[0].exact and listed[0].resamples == 720  # identity 18: 6!
    assert np.array_equal(listed[0].null, listed[1].null)


# ------------------------------------------------------------------ property tests

@settings(max_examples=25, deadline=None)
@given(d=st.lists(st.integers(-20, 20), min_size=1, max_size=9),
       name=st.sampled_from(["mean_difference", "signed_rank", "median_difference"]),
       alternative=st.sampled_from(["greater", "less", "two-sided"]), exact=st.sampled_from(["auto", "never"]))
def test_sign_flip_p_value_bounds_and_symmetry(d, name, alternative, exact):
    x = np.array(d, dtype=float)
    y = np.zeros_like(x)
    m = 300
    result = signflip_test(x, y, get_statistic(name),
                           PermutationOptions(resamples=m, alternative=alternative, exact=exact),
                           stream=stream())
    assert 0.0 < result.p_value <= 1.0
    if result.exact:
        assert result.p_value >= 1 / result.arrangements - 1e-15  # identity 13
        weights = np.ones(result.null.size) if result.null_weights is None else result.null_weights
        # the sign-flip null is symmetric about its centre (identity 14)
        values = np.round(result.null - result.centre, 9)
        mirror = {}
        for v, w in zip(values, weights):
            mirror[v] = mirror.get(v, 0.0) + w
        for v, w in mirror.items():
            assert mirror.get(round(-v, 9) + 0.0, 0.0) == pytest.approx(w)
    else:
        assert result.p_value >= 1 / (m + 1)  # identity 13


@settings(max_examples=20, deadline=None)
@given(groups=st.lists(st.lists(st.floats(-50, 50, allow_nan=False, width=32), min_size=1, max_size=4),
                       min_size=3, max_size=3),
       name=st.sampled_from(["one_way_f", "rank_h"]), exact=st.sampled_from(["auto", "never"]))
def test_k_group_p_value_bounds(groups, name, exact):
    samples = [np.array(g, dtype=float) for g in groups]
    if sum(g.size for g in samples) < 4:
        return
    try:
        result = permutation_test(samples, get_statistic(name),
                                  PermutationOptions(resamples=200, alternative="greater", exact=exact),
                                  stream=stream())
    except EngineError:
        return  # a degenerate F (no spread within groups) is refused, never a silent NaN
    assert 0.0 < result.p_value <= 1.0
    if not result.exact:
        assert result.p_value >= 1 / 201  # identity 13


def test_k_group_exact_enumeration_matches_scipy():
    a, b, c = np.array([1.2, 3.4, 2.2]), np.array([2.8, 4.1, 3.3]), np.array([0.2, 1.9])
    result = permutation_test([a, b, c], get_statistic("rank_h"),
                              PermutationOptions(resamples=10**5, alternative="greater"),
                              stream=stream())
    assert result.arrangements == math.factorial(8) // (6 * 6 * 2)  # identity 18
    ref = stats.permutation_test((a, b, c), lambda *g: stats.kruskal(*g).statistic, n_resamples=np.inf,
                                 alternative="greater")  # scipy reference (no ties: same H)
    assert result.p_value == pytest.approx(ref.pvalue, rel=1e-12)


# ------------------------------------------------------------------ p-value rules

def test_clopper_pearson_matches_scipy():
    for count, trials in ((0, 50), (7, 50), (50, 50)):
        ref = stats.binomtest(count, trials).proportion_ci(confidence_level=0.99, method="exact")  # scipy
        assert clopper_pearson(count, trials) == pytest.approx((ref.low, ref.high), rel=1e-10, abs=1e-15)


# ------------------------------------------------------------------ max-T and multiplicity

def test_max_t_identical_endpoints_adjust_to_the_unadjusted_value():
    """Two copies of one endpoint are perfectly dependent: max-T adds no penalty (Bonferroni would)."""
    x, y = np.array([3.1, 4.0, 9.5, 7.2, 1.0, 6.6]), np.array([2.2, 5.5, 8.1, 0.3, 4.4, 6.0, 2.9])
    stat = get_statistic("mean_difference")
    result = max_t([([x, y], stat, "greater"), ([x, y], stat, "greater")], strata=None, resamples=10**4,
                   stream=stream())
    single = permutation_test([x, y], stat, PermutationOptions(resamples=10**4, alternative="greater"),
                              stream=stream())
    assert result.exact and result.arrangements == math.comb(13, 6)
    assert result.adjusted == pytest.approx((single.p_value, single.p_value), rel=1e-12)
    assert result.unadjusted == pytest.approx((single.p_value, single.p_value), rel=1e-12)


def test_max_t_step_down_by_definition():
    rng = np.random.default_rng(21)
    x = rng.normal(size=(6, 3)) + np.array([1.5, 0.4, 0.0])
    y = rng.normal(size=(5, 3))
    stats_ = [get_statistic("mean_difference"), get_statistic("t_welch"), get_statistic("median_difference")]
    alts = ["two-sided", "greater", "less"]
    endpoints = [([x[:, j], y[:, j]], stats_[j], alts[j]) for j in range(3)]
    result = max_t(endpoints, strata=None, resamples=10**4, stream=stream())
    # plain computation (Westfall & Young 1993, Algorithm 2.8) over all C(11, 6) splits, written out
    pooled = np.vstack([x, y])
    z_all = []
    for j in range(3):
        t = []
        for chosen in itertools.combinations(range(11), 6):
            mask = np.zeros(11, bool)
            mask[list(chosen)] = True
            t.append(float(stats_[j].compute(pooled[mask, j], pooled[~mask, j])))
        t = np.array(t)
        obs = float(stats_[j].compute(x[:, j], y[:, j]))
        sd = np.sqrt(np.mean(t ** 2))
        zn, zo = t / sd, obs / sd
        if alts[j] == "less":
            zn, zo = -zn, -zo
        if alts[j] == "two-sided":
            zn, zo = np.abs(zn), abs(zo)
        z_all.append((zn, zo))
    order = sorted(range(3), key=lambda j: -z_all[j][1])
    expected, previous = {}, 0.0
    for k, j in enumerate(order):
        rest = np.max([z_all[i][0] for i in order[k:]], axis=0)
        p = np.mean(rest >= z_all[j][1] - 1e-9)
        previous = max(previous, p)
        expected[j] = previous
    assert result.adjusted == pytest.approx(tuple(expected[j] for j in range(3)), rel=1e-12)
    assert all(a >= u - 1e-15 for a, u in zip(result.adjusted, result.unadjusted))


@pytest.mark.parametrize("ours, theirs", [("bonferroni", "bonferroni"), ("holm", "holm"),
                                          ("hochberg", "simes-hochberg"), ("benjamini-hochberg", "fdr_bh"),
                                          ("benjamini-yekutieli", "fdr_by")])
def test_adjustments_match_statsmodels_bh95(ours, theirs):
    reference = multipletests(BH95, method=theirs)[1]  # statsmodels reference (V-BH95)
    assert adjust(BH95, ours) == pytest.approx(list(reference), rel=1e-12, abs=1e-15)
    if ours == "benjamini-hochberg":
        assert adjust(BH95, "benjamini-hochberg")[3] == pytest.approx(0.035625, rel=1e-12)  # Source: V-BH95
        assert sum(p <= 0.05 for p in adjust(BH95, "benjamini-hochberg")) == 4  # Source: V-BH95: BH rejects 4
    if ours == "bonferroni":
        assert sum(p <= 0.05 for p in adjust(BH95, ours)) == 3  # Source: V-BH95


def test_exact_always_error_names_the_count_for_sign_flips():
    d = np.linspace(0.013, 1.7, 30)  # not integer-valued, so no exact shortcut
    with pytest.raises(EngineError, match="1,073,741,824 sign patterns"):  # 2^30
        signflip_test(d, np.zeros(30), get_statistic("median_difference"),
                      PermutationOptions(resamples=99, alternative="greater", exact="always"),
                      stream=stream())


def test_stratified_two_by_two_tables_exact_conditional_test():
    """risk_difference within strata: the DP null of the first group's total count equals enumeration."""
    x = np.array([1.0, 0, 1, 1, 0, 1, 1, 0])
    y = np.array([0.0, 0, 1, 0, 0, 1, 0, 1, 0])
    sx, sy = np.array([0, 0, 0, 1, 1, 2, 2, 2]), np.array([0, 0, 1, 1, 1, 2, 2, 2, 2])
    kw = dict(stream=stream(), strata=[sx, sy])
    dp = permutation_test([x, y], get_statistic("risk_difference"), PermutationOptions(10, "greater"), **kw)
    listed = permutation_test([x, y], get_statistic("risk_difference"), PermutationOptions(10**6, "greater"),
                              fast=False, **kw)
    assert dp.computation == "dynamic programming" and listed.computation == "enumeration"
    assert dp.p_value == pytest.approx(listed.p_value, rel=1e-12)
    # the conditional test by definition: P(Σ_h a_h ≥ observed) under independent hypergeometrics
    dist = np.array([1.0])
    for h in range(3):
        n1, n2 = int(np.sum(sx == h)), int(np.sum(sy == h))
        ones = int(x[sx == h].sum() + y[sy == h].sum())
        pmf = stats.hypergeom(n1 + n2, ones, n1).pmf(np.arange(n1 + 1))  # scipy reference
        dist = np.convolve(dist, pmf)
    assert dp.p_value == pytest.approx(dist[int(x.sum()):].sum(), rel=1e-12)


def test_absolute_rule_centre_is_the_null_mean_with_unbalanced_strata():
    x = np.array([1.0, 2, 2, 3, 5, 1, 4])
    y = np.array([2.0, 2, 3, 3, 1, 0, 6, 2])
    sx, sy = np.array([0, 0, 0, 0, 0, 1, 1]), np.array([0, 1, 1, 1, 1, 1, 1, 0])
    for name in ("mean_difference", "rank_sum"):
        result = permutation_test([x, y], get_statistic(name),
                                  PermutationOptions(resamples=10**5, alternative="two-sided", two_sided="absolute"),
                                  stream=stream(), strata=[sx, sy], fast=False)
        assert result.computation == "enumeration"
        assert result.centre == pytest.approx(float(np.mean(result.null)), rel=1e-12, abs=1e-12)  # exact mean
        far = np.abs(result.null - result.centre) >= abs(result.observed - result.centre) - result.tolerance
        assert result.p_value == pytest.approx(far.mean(), rel=1e-12)


def test_k_groups_within_strata_by_brute_force():
    a, b, c = np.array([1.0, 4.0, 2.5]), np.array([3.0, 0.5, 6.0]), np.array([2.0, 5.5])
    ca, cb, cc = np.array([0, 1, 1]), np.array([0, 0, 1]), np.array([1, 0])
    result = permutation_test([a, b, c], get_statistic("one_way_f"),
                              PermutationOptions(resamples=10**5, alternative="greater"),
                              stream=stream(), strata=[ca, cb, cc])
    values = np.concatenate([a, b, c])
    labels = np.repeat([0, 1, 2], [3, 3, 2])
    codes = np.concatenate([ca, cb, cc])
    per_stratum = []
    for h in (0, 1):  # every distinct relabelling within each stratum (identity 18)
        members = np.flatnonzero(codes == h)
        per_stratum.append((members, set(itertools.permutations(labels[members].tolist()))))
    null = []
    for choice in itertools.product(*[sorted(s) for _, s in per_stratum]):
        lab = labels.copy()
        for (members, _), seq in zip(per_stratum, choice):
            lab[members] = seq
        null.append(stats.f_oneway(*[values[lab == g] for g in range(3)]).statistic)  # scipy reference
    null = np.array(null)
    assert result.arrangements == null.size == 12 * 12  # identity 18: 4!/(1!2!1!) · 4!/(2!1!1!)
    np.testing.assert_allclose(np.sort(result.null), np.sort(null), rtol=1e-10)
    mc = permutation_test([a, b, c], get_statistic("one_way_f"),
                          PermutationOptions(resamples=500, alternative="greater", exact="never"),
                          stream=stream(), strata=[ca, cb, cc])
    assert np.all(np.min(np.abs(mc.null[:, None] - null[None, :]), axis=1) <= 1e-9)  # only allowed relabellings


def test_exact_always_beyond_enumeration_uses_the_dp_null():
    x, y = np.arange(0.0, 30.0, 2.0), np.arange(1.0, 30.0, 2.0)  # distinct integers, C(30, 15) splits
    result = permutation_test([x, y], get_statistic("mean_difference"),
                              PermutationOptions(resamples=99, alternative="less", exact="always"),
                              stream=stream())
    assert result.computation == "dynamic programming" and result.arrangements == 155_117_520
    # Δmean is increasing in the first group's sum, here in its rank sum: the exact Mann–Whitney test
    ref = stats.mannwhitneyu(x, y, alternative="less", method="exact")  # scipy reference; identity 15
    assert result.p_value == pytest.approx(ref.pvalue, rel=1e-9)


def test_kept_or_redrawn_arrangements_give_the_same_numbers(monkeypatch):
    import planrunner.engines.inversion as inversion
    import planrunner.engines.maxt as maxt
    rng = np.random.default_rng(2)
    x, y = rng.normal(size=20) + 0.5, rng.normal(size=18)
    stat = get_statistic("mean_difference")
    args = dict(options=PermutationOptions(1500, "two-sided", confidence=0.95), stream=stream("shift"))
    endpoints = [([x, y], stat, "greater"), ([x ** 2, y ** 2], get_statistic("rank_sum"), "two-sided")]
    kept = inversion.shift_interval(x, y, stat, **args), max_t(endpoints, strata=None, resamples=1500,
                                                               stream=stream("mt"))
    monkeypatch.setattr(inversion, "CACHE_ELEMENTS", 0)
    monkeypatch.setattr(maxt, "CACHE_ELEMENTS", 0)
    redrawn = inversion.shift_interval(x, y, stat, **args), max_t(endpoints, strata=None, resamples=1500,
                                                                  stream=stream("mt"))
    assert kept[0] == redrawn[0] and kept[1] == redrawn[1]


def test_cluster_batch_size_changes_nothing():
    x = np.array([5.1, 6.0, 5.5, 7.2, 6.8, 8.0, 6.1])
    y = np.array([4.2, 5.0, 5.3, 4.8, 6.0, 5.2, 4.4])
    cx, cy = np.array([0, 0, 1, 1, 2, 3, 4]), np.array([5, 5, 6, 7, 7, 8, 9])
    for name, exact in (("mean_difference", "never"), ("median_difference", "auto")):
        a, b = (cluster_test(x, y, cx, cy, get_statistic(name),
                             PermutationOptions(resamples=1100, alternative="greater", exact=exact),
                             stream=stream("cb"), batch_elements=e) for e in (7, 10**6))
        assert np.array_equal(a.null, b.null)


def test_test_statistics_against_scipy_and_vectorised():
    rng = np.random.default_rng(31)
    x, y, z = rng.normal(size=(4, 9)), rng.normal(size=(4, 7)) + 0.3, rng.normal(size=(4, 8))
    refs = {  # scipy references, row by row
        "t_pooled": lambda a, b: stats.ttest_ind(a, b).statistic,
        "t_welch": lambda a, b: stats.ttest_ind(a, b, equal_var=False).statistic,
        "rank_sum": lambda a, b: stats.mannwhitneyu(a, b).statistic + a.size * (a.size + 1) / 2,
        "risk_difference": lambda a, b: a.mean() - b.mean(),
    }
    for name, ref in refs.items():
        got = get_statistic(name).compute(x, y)
        assert got.shape == (4,)
        assert got == pytest.approx([ref(x[r], y[r]) for r in range(4)], rel=1e-12), name
    f = get_statistic("one_way_f").compute(x, y, z)
    h = get_statistic("rank_h").compute(x, y, z)
    assert f == pytest.approx([stats.f_oneway(x[r], y[r], z[r]).statistic for r in range(4)], rel=1e-12)
    assert h == pytest.approx([stats.kruskal(x[r], y[r], z[r]).statistic for r in range(4)], rel=1e-12)  # no ties
    xy = rng.normal(size=(4, 2, 12))
    for name, ref in (("spearman", lambda a, b: stats.spearmanr(a, b).statistic),
                      ("kendall", lambda a, b: stats.kendalltau(a, b).statistic),
                      ("slope", lambda a, b: stats.linregress(a, b).slope)):
        got = get_statistic(name).compute(xy)
        assert got == pytest.approx([ref(xy[r, 0], xy[r, 1]) for r in range(4)], rel=1e-12), name
    d = np.array([1.5, -2.0, 0.0, 3.0, -1.5, 4.0])  # a zero and a tie in |d|
    t_plus = get_statistic("signed_rank").compute(d, np.zeros(6))
    # scipy reference: wilcoxon(alternative='greater') reports T+ (zeros dropped: zero_method='wilcox')
    assert t_plus == pytest.approx(stats.wilcoxon(d, alternative="greater", zero_method="wilcox").statistic)
    rr = get_statistic("risk_ratio").compute(np.array([1.0, 1, 0, 1]), np.array([1.0, 0, 0, 0]))
    assert rr == pytest.approx(3.0)  # (3/4) / (1/4)


@pytest.mark.parametrize("pairs", [1, 8, 70, 1003])
@pytest.mark.parametrize("name", ["mean_difference", "signed_rank"])
def test_sign_flip_byte_tables_equal_plain(pairs, name):
    rng = np.random.default_rng(pairs)
    x = np.round(rng.normal(0.2, 1.0, pairs), 1)  # rounding makes zero differences and tied ranks
    y = np.round(rng.normal(0.0, 1.0, pairs), 1)
    kw = dict(options=PermutationOptions(resamples=DRAW_BLOCK + 300, alternative="two-sided", exact="never"),
              stream=stream("bytes"))
    fast = signflip_test(x, y, get_statistic(name), fast=True, **kw)
    plain = signflip_test(x, y, get_statistic(name), fast=False, **kw)
    if name == "signed_rank":
        assert np.array_equal(fast.null, plain.null)  # sums of half-integers are exact
    else:
        np.testing.assert_allclose(fast.null, plain.null, rtol=0, atol=1e-12)
    assert (fast.count_greater, fast.count_less) == (plain.count_greater, plain.count_less)


def test_swap_bytes_are_the_swap_bits():
    from planrunner.engines.signflip import byte_tables, swap_bytes, swapped_sums
    s = stream("bytes")
    packed = swap_bytes(s, 21, 5, DRAW_BLOCK + 9)
    bits = swap_bits(s, 21, 5, DRAW_BLOCK + 9)
    assert np.array_equal(np.unpackbits(packed, axis=1, bitorder="little")[:, :21].astype(bool), bits)
    assert not np.any(packed[:, -1] >> 5)  # bits past the last pair are zero
    weights = np.arange(1.0, 22.0)
    assert np.array_equal(swapped_sums(byte_tables(weights), packed), np.where(bits, weights, 0.0).sum(axis=1))
