"""Bootstrap designs and intervals at the engine level: exhaustive enumeration
(identities 7–10, V-MOUSE-BOOT, V-PATCH), pairs, clusters, blocks, parametric (identity 11), basic /
normal / studentized intervals (identity 12), Monte Carlo endpoint ranges, on_degenerate, batch
invariance of every scheme, and the fast paths against the plain computation."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.special import ndtri

from planrunner.engines import schemes
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.intervals import bca_levels, read_quantile
from planrunner.engines.jackknife import jackknife
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)
# Source: E&T Table 10.1 (V-PATCH, published, confirmed)
PLACEBO = np.array([9243, 9671, 11792, 13357, 9055, 6290, 12412, 18806], dtype=float)
OLD = np.array([17649, 12013, 19979, 21816, 13850, 9806, 17208, 29044], dtype=float)
NEW = np.array([16449, 14614, 17274, 23798, 12560, 10157, 16570, 26325], dtype=float)
PATCH = np.column_stack([OLD - PLACEBO, NEW - OLD])  # (predictor z, outcome y): θ = mean(y)/mean(z)


def boot(samples, name, *, B=2000, intervals=("percentile",), confidence=0.9, seed=2026, **kw):
    design = {k: kw.pop(k) for k in ("strata", "clusters", "paired", "batch_elements") if k in kw}
    options = BootstrapOptions(resamples=B, confidence=confidence, intervals=tuple(intervals), **kw)
    return bootstrap(samples, get_statistic(name) if isinstance(name, str) else name, options,
                     stream=stream_for(seed, "designs"), **design)


def by_method(result):
    return {i.method: i for i in result.intervals}


# ------------------------------------------------------------------ exhaustive ("ideal") bootstrap

def test_exhaustive_mouse_ideal_values() -> None:
    mean = boot([TREATMENT], "mean", exhaustive=True)
    median = boot([TREATMENT], "median", exhaustive=True)
    assert mean.exact and mean.resamples == 1716  # identity 10: C(13, 7)
    # Source: V-MOUSE-BOOT (exact; E&T Table 2.2 ∞ column 23.36 / 37.83 from memory)
    assert mean.standard_error == pytest.approx(23.3635234373, rel=1e-10)
    assert median.standard_error == pytest.approx(37.8346743939, rel=1e-10)
    assert median.bias == pytest.approx(-14.27116, abs=1e-5)  # Source: V-MOUSE-BOOT, exact
    # Source: V-MOUSE-BOOT: ideal 90% percentile interval of the mean (49.4286, 126.7143), exact
    iv = by_method(mean)["percentile"]
    assert (iv.lower, iv.upper) == pytest.approx((346 / 7, 887 / 7), rel=1e-12)
    assert iv.monte_carlo is None and mean.standard_error_sd == 0.0


@pytest.mark.parametrize("n, count", [(7, 1716), (8, 6435), (9, 24310)])
def test_identity_10_distinct_resamples_and_weights(n: int, count: int) -> None:
    # identity 10: C(2n − 1, n) distinct resamples whose multinomial weights sum to 1
    assert schemes.count_multisets(n) == count
    index, log_p = schemes._multisets(n)
    assert index.shape == (count, n)
    assert math.fsum(np.exp(log_p)) == pytest.approx(1.0, abs=1e-12)


def test_identity_7_ideal_moments() -> None:
    x = TREATMENT
    n = x.size
    m2 = np.mean((x - x.mean()) ** 2)
    m4 = np.mean((x - x.mean()) ** 4)
    mean = boot([x], "mean", exhaustive=True)
    w, d = mean.weights, mean.distribution
    assert math.fsum(w * d) == pytest.approx(x.mean(), rel=1e-12)  # identity 7: E*[x̄*] = x̄
    assert mean.standard_error ** 2 == pytest.approx(m2 / n, rel=1e-12)  # identity 7: Var* = m2/n
    var = boot([x], "plugin_variance", exhaustive=True)
    assert var.bias == pytest.approx(-m2 / n, rel=1e-10)  # identity 7: E*[m2*] − m2 = −m2/n
    # identity 7: Var*(m2*) = (n−1)² m4/n³ − (n−1)(n−3) m2²/n³
    assert var.standard_error ** 2 == pytest.approx((n - 1) ** 2 * m4 / n ** 3 - (n - 1) * (n - 3) * m2 ** 2 / n ** 3,
                                                    rel=1e-10)


def test_identity_8_exact_median_distribution() -> None:
    x = TREATMENT
    n = x.size
    r = boot([x], "median", exhaustive=True)
    s = np.sort(x)
    for k in range(1, n + 1):
        # identity 8: P(med* ≤ x_(k)) = P(Bin(n, k/n) ≥ (n+1)/2)
        exact = stats.binom.sf((n + 1) // 2 - 1, n, k / n)
        assert math.fsum(r.weights[r.distribution <= s[k - 1]]) == pytest.approx(exact, abs=1e-12)


def test_identity_9_stratified_ideal_variance() -> None:
    x = np.array([3.0, 7.0, 1.0, 12.0, 5.0, 8.0, 2.0, 4.0, 10.0])
    strata = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1])
    r = boot([x], "mean", exhaustive=True, strata=[strata])
    assert r.resamples == 35 * 126  # product of C(7,4) and C(9,5)
    # identity 9 (for the stratified mean, weights n_h/n): Var* = Σ (n_h/n)² m2_h/n_h
    expected = sum((np.sum(strata == h) / x.size) ** 2 * np.var(x[strata == h]) / np.sum(strata == h) for h in (0, 1))
    assert r.standard_error ** 2 == pytest.approx(expected, rel=1e-12)


def test_exhaustive_patch_ratio() -> None:
    r = boot([PATCH], "ratio", exhaustive=True, intervals=("percentile", "bca"))
    assert r.resamples == 6435  # Source: V-PATCH, C(15, 8)
    # Source: V-PATCH, full enumeration (exact)
    assert r.estimate == pytest.approx(-0.0713060959025602, rel=1e-12)
    assert r.bias == pytest.approx(0.00776050566338, rel=1e-10)
    assert r.standard_error == pytest.approx(0.10231380623193, rel=1e-10)
    below = math.fsum(r.weights[r.distribution < r.estimate])
    assert below == pytest.approx(0.5094394, abs=1e-7)
    iv = by_method(r)["percentile"]
    assert (iv.lower, iv.upper) == pytest.approx((-0.211455, 0.120958), abs=1e-6)
    assert r.acceleration == pytest.approx(0.0240502, abs=1e-7)  # Source: V-PATCH a
    # our z0 is the mid-rank: the original multiset (weight 8!/8⁸, exact) ties with θ̂
    tie = math.factorial(8) / 8 ** 8
    assert r.z0 == pytest.approx(float(ndtri(below + tie / 2)), rel=1e-9)
    # with E&T's z0 = Φ⁻¹(P*(θ* < θ̂)) = 0.023663 the same machinery gives V-PATCH's ideal BCa
    order = np.argsort(r.distribution)
    levels = bca_levels(0.023663, r.acceleration, [0.05, 0.95])
    cumulative = np.cumsum(r.weights[order])
    ends = [read_quantile(r.distribution[order], cumulative, float(p)) for p in levels]
    assert ends == pytest.approx([-0.204392, 0.136319], abs=2e-6)  # Source: V-PATCH ideal BCa


def test_exhaustive_limit_is_stated() -> None:
    with pytest.raises(EngineError, match="more than the limit 200000"):
        boot([np.arange(12.0)], "mean", exhaustive=True)  # C(23, 12) = 1352078


# ------------------------------------------------------------------ intervals

def test_basic_is_reflected_percentile_and_normal_formula() -> None:
    r = boot([TREATMENT], "mean", intervals=("percentile", "basic", "normal"))
    iv = by_method(r)
    # identity 12: basic = (2θ̂ − q_hi, 2θ̂ − q_lo)
    assert iv["basic"].lower == pytest.approx(2 * r.estimate - iv["percentile"].upper, rel=1e-12)
    assert iv["basic"].upper == pytest.approx(2 * r.estimate - iv["percentile"].lower, rel=1e-12)
    z = stats.norm.ppf(0.95)  # scipy reference
    assert iv["normal"].lower == pytest.approx(r.estimate - r.bias - z * r.standard_error, rel=1e-12)
    assert iv["normal"].upper == pytest.approx(r.estimate - r.bias + z * r.standard_error, rel=1e-12)


def test_basic_agrees_with_scipy() -> None:
    b = 20000
    ours = by_method(boot([TREATMENT], "mean", B=b, intervals=("basic",)))["basic"]
    theirs = stats.bootstrap((TREATMENT,), np.mean, n_resamples=b, confidence_level=0.9, method="basic",
                             rng=np.random.default_rng(11)).confidence_interval  # scipy reference
    se = 23.3635234373  # Source: V-MOUSE-BOOT ideal SE
    sd = math.sqrt(0.05 * 0.95 / b) / (stats.norm.pdf(stats.norm.ppf(0.05)) / se) * math.sqrt(2)
    assert abs(ours.lower - theirs.low) <= 4 * sd and abs(ours.upper - theirs.high) <= 4 * sd


def test_identity_11_exponential_parametric() -> None:
    # identity 11: ȳ* ~ Gamma(n, ȳ/n), so the percentile endpoints are Gamma quantiles
    b = 4000
    r = boot([TREATMENT], "mean", B=b, parametric="exponential", intervals=("percentile",))
    n, mean = TREATMENT.size, TREATMENT.mean()
    assert r.details["fitted_parameters"] == [{"mean": pytest.approx(mean, rel=1e-12)}]
    for level, end in zip((0.05, 0.95), (by_method(r)["percentile"].lower, by_method(r)["percentile"].upper)):
        q = stats.gamma.ppf(level, n, scale=mean / n)  # scipy reference
        sd = math.sqrt(level * (1 - level) / b) / stats.gamma.pdf(q, n, scale=mean / n)
        assert abs(end - q) <= 4 * sd  # V-TOL quantile endpoint s.d.
    # the ideal SE of the mean under the fit is ȳ/√n; MC s.d. SE/√(2B) × sqrt((κ−1)/2), κ = 3 + 6/n
    ideal = mean / math.sqrt(n)
    assert abs(r.standard_error - ideal) <= 4 * ideal * math.sqrt((2 + 6 / n) / (4 * b))


def test_parametric_models_fit_by_maximum_likelihood() -> None:
    counts = np.array([3, 0, 2, 5, 1, 4, 2, 2, 3, 1], dtype=float)
    pois = boot([counts], "mean", parametric="poisson", B=200)
    assert pois.details["fitted_parameters"] == [{"rate": pytest.approx(2.3)}]
    binom = boot([counts], "mean", parametric="binomial", trials=5, B=200)
    assert binom.details["fitted_parameters"] == [{"p": pytest.approx(0.46), "trials": 5.0}]
    assert np.all(binom.distribution * 10 == np.round(binom.distribution * 10))  # counts stay counts
    norm = boot([TREATMENT], "mean", parametric="normal", B=200)
    assert norm.details["fitted_parameters"][0]["sd"] == pytest.approx(np.std(TREATMENT), rel=1e-12)
    with pytest.raises(EngineError, match="non-integer"):
        boot([TREATMENT + 0.5], "mean", parametric="poisson")
    with pytest.raises(EngineError, match="BCa is refused"):
        boot([TREATMENT], "mean", parametric="normal", intervals=("bca",))


def test_studentized_analytic_and_jackknife_inner() -> None:
    r = boot([TREATMENT], "mean", intervals=("studentized", "percentile"))
    assert r.details["studentized_se"]["method"] == "analytic"
    assert r.details["se_hat"] == pytest.approx(25.235489533, rel=1e-10)  # Source: V-MOUSE-BOOT s/√n
    iv = by_method(r)["studentized"]
    assert iv.lower < r.estimate < iv.upper
    # for the mean the jackknife SE equals s/√n (identity 2), so the inner jackknife gives the same interval
    j = boot([TREATMENT], "mean", intervals=("studentized",), studentized_se="jackknife")
    assert j.details["studentized_se"]["statistic_evaluations"] == 2000 * (1 + 7)
    assert (by_method(j)["studentized"].lower, by_method(j)["studentized"].upper) == pytest.approx(
        (iv.lower, iv.upper), rel=1e-9)
    with pytest.raises(EngineError, match="no analytic standard error"):
        boot([TREATMENT], "median", intervals=("studentized",))
    rough = boot([TREATMENT], "median", intervals=("studentized",), studentized_se="jackknife", B=100)
    assert "studentized-non-smooth" in [w.code for w in rough.warnings]


def test_monte_carlo_ranges_contain_the_endpoint() -> None:
    r = boot([TREATMENT], "mean", intervals=("percentile", "basic", "normal", "bca", "studentized"))
    for iv in r.intervals:
        assert iv.monte_carlo is not None, iv.method
        (a, b), (c, d) = iv.monte_carlo
        assert a <= iv.lower <= b and c <= iv.upper <= d, iv
    # V-TOL: the SE's MC s.d. is SE·sqrt((κ − 1)/(4B)); the bias's SE/√B
    assert r.bias_sd == pytest.approx(r.standard_error / math.sqrt(2000))
    assert 0 < r.standard_error_sd < r.standard_error / math.sqrt(2000)


# ------------------------------------------------------------------ on_degenerate

def test_on_degenerate_choices() -> None:
    constant = np.full(12, 4.0)
    quiet = boot([constant], "mean", intervals=("percentile", "bca"))
    assert all(i.lower is None for i in quiet.intervals)
    assert "degenerate-distribution" in [w.code for w in quiet.warnings]
    point = boot([constant], "mean", intervals=("percentile", "bca"), on_degenerate="percentile")
    assert all((i.lower, i.upper) == (4.0, 4.0) for i in point.intervals)
    with pytest.raises(EngineError, match="replicates are equal"):
        boot([constant], "mean", on_degenerate="fail")
    # BCa undefined (every replicate above the estimate): fallback to percentile, or fail
    x = np.array([0.0] * 3 + [1.0] * 12)
    min_stat = dataclasses.replace(get_statistic("mean"), name="minimum", compute=lambda a: np.min(a, axis=-1),
                                   form=None, se=None)
    fallback = boot([x], min_stat, intervals=("bca",), on_degenerate="percentile", B=200)
    assert fallback.intervals[0].method == "percentile" and "undefined bca" in fallback.intervals[0].note
    with pytest.raises(EngineError, match="bca interval is undefined"):
        boot([x], min_stat, intervals=("bca",), on_degenerate="fail", B=200)


# ------------------------------------------------------------------ pairs, clusters, blocks

def test_pairs_equal_the_bootstrap_of_differences() -> None:
    x, y = TREATMENT, CONTROL[:7]
    paired = boot([x, y], "mean_difference", paired=True, intervals=("percentile", "bca"))
    diffs = boot([x - y], "mean", intervals=("percentile", "bca"))
    assert paired.scheme == "whole pairs resampled" and paired.n == (7,)
    # the same draws index the same pairs, so the replicates agree up to rounding (identity)
    np.testing.assert_allclose(paired.distribution, diffs.distribution, rtol=1e-12, atol=1e-9)
    with pytest.raises(EngineError, match="as many rows"):
        boot([x, CONTROL], "mean_difference", paired=True)


def test_cluster_bootstrap_fast_path_equals_plain() -> None:
    rng = np.random.default_rng(5)
    x, y = rng.normal(size=30), rng.normal(size=24)
    clusters = [np.repeat(np.arange(10), 3), np.repeat(np.arange(8), 3)]
    stat = get_statistic("mean_difference")
    lay = schemes.cluster_layout((x, y), tuple(clusters), None)
    fast = schemes.draw_clusters((x, y), lay, stat, 300, stream_for(1, "c"), 10_000, fast=True)
    plain = schemes.draw_clusters((x, y), lay, stat, 300, stream_for(1, "c"), 10_000, fast=False)
    np.testing.assert_allclose(fast, plain, rtol=1e-12, atol=1e-14)


def test_identity_9_cluster_bootstrap_equal_sizes() -> None:
    # identity 9: equal cluster sizes give Var* = sd²_plugin(cluster means)/G
    rng = np.random.default_rng(9)
    g, m, b = 12, 4, 4000
    x = np.repeat(rng.normal(size=g) * 3, m) + rng.normal(size=g * m)
    codes = np.repeat(np.arange(g), m)
    r = boot([x], "mean", B=b, clusters=[codes])
    ideal = math.sqrt(np.var(x.reshape(g, m).mean(axis=1)) / g)
    kappa = 4.0  # generous bound on the kurtosis of a mean of 12 cluster means (3 for normal)
    assert abs(r.standard_error - ideal) <= 4 * ideal * math.sqrt((kappa - 1) / (4 * b))
    assert r.scheme == "whole clusters resampled"


def test_cluster_jackknife_identity_and_bca() -> None:
    rng = np.random.default_rng(3)
    x = rng.normal(size=24)
    codes = np.repeat(np.arange(8), 3)
    j = jackknife([x], get_statistic("mean"), clusters=[codes])
    means = x.reshape(8, 3).mean(axis=1)
    # identity 2 on the cluster means (equal sizes): se = sd(cluster means, ddof 1)/√G
    assert j.standard_error == pytest.approx(np.std(means, ddof=1) / math.sqrt(8), rel=1e-12)
    assert j.scheme == "delete-one cluster" and j.n == (8,)
    r = boot([x], "mean", clusters=[codes], intervals=("bca",))
    assert r.intervals[0].lower is not None
    with pytest.raises(EngineError, match="spans several strata"):
        boot([x], "mean", clusters=[codes], strata=[np.arange(24) % 2])


def test_block_schemes() -> None:
    x = np.cumsum(np.random.default_rng(4).normal(size=40))
    for kind in ("moving", "circular", "stationary"):
        r = boot([x], "mean", blocks=(kind, 5), intervals=("percentile", "normal"), B=300)
        assert kind in r.scheme and r.intervals[0].lower < r.intervals[0].upper
    with pytest.raises(EngineError, match="BCa is refused"):
        boot([x], "mean", blocks=("moving", 5), intervals=("bca",))
    with pytest.raises(EngineError, match="exceeds"):
        boot([x], "mean", blocks=("moving", 41))


def test_block_index_by_hand() -> None:
    u = np.array([[0.0, 0.99, 0.5]])  # moving, n = 7, L = 3: starts floor(u * 5) = 0, 4, 2
    assert schemes._block_index(u, 7, 3, "moving").tolist() == [[0, 1, 2, 4, 5, 6, 2]]
    u = np.array([[0.9, 0.0, 0.0]])  # circular: starts floor(u * 7) = 6, 0, 0
    assert schemes._block_index(u, 7, 3, "circular").tolist() == [[6, 0, 1, 0, 1, 2, 0]]
    # stationary, n = 4, L = 2: new block where u[i] < 1/2 (always at 0), start floor(u[4+i] * 4)
    u = np.array([[0.9, 0.9, 0.1, 0.9, 0.8, 0.0, 0.3, 0.0]])
    assert schemes._block_index(u, 4, 2, "stationary").tolist() == [[3, 0, 1, 2]]
    # L = 1 always starts a new block: the iid bootstrap
    u = np.array([[0.7, 0.2, 0.99, 0.4, 0.1, 0.6, 0.8, 0.3]])
    assert schemes._block_index(u, 4, 1, "stationary").tolist() == [[0, 2, 3, 1]]


@pytest.mark.parametrize("case", ["cells-studentized", "exhaustive", "pairs", "clusters", "moving", "stationary",
                                  "parametric", "jackknife-inner"])
def test_batch_size_never_changes_the_numbers(case: str) -> None:
    x, y = TREATMENT, CONTROL[:7]
    kw = {"cells-studentized": dict(samples=[x], name="mean", intervals=("studentized", "bca")),
          "exhaustive": dict(samples=[x], name="median", exhaustive=True),
          "pairs": dict(samples=[x, y], name="median_difference", paired=True),
          "clusters": dict(samples=[x], name="median", clusters=[np.arange(7) // 2]),
          "moving": dict(samples=[x], name="mean", blocks=("moving", 2)),
          "stationary": dict(samples=[x], name="mean", blocks=("stationary", 2)),
          "parametric": dict(samples=[x], name="mean", parametric="exponential"),
          "jackknife-inner": dict(samples=[x], name="sd", intervals=("studentized",), studentized_se="jackknife"),
          }[case]
    samples, name = kw.pop("samples"), kw.pop("name")
    small = boot(samples, name, B=1100, batch_elements=1, **kw)
    large = boot(samples, name, B=1100, batch_elements=10 ** 8, **kw)
    assert np.array_equal(small.distribution, large.distribution)
    assert [(i.lower, i.upper) for i in small.intervals] == [(i.lower, i.upper) for i in large.intervals]


# ------------------------------------------------------------------ properties

@settings(max_examples=25, deadline=None)
@given(st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=3, max_size=25),
       st.sampled_from(["mean", "median", "sd", "trimmed"]))
def test_lower_never_above_upper(data: list[float], name: str) -> None:
    x = np.array(data)
    stat = get_statistic(name) if name != "trimmed" else None
    if stat is None:
        from planrunner.engines.statistics import bind
        stat = bind(get_statistic("trimmed_mean"), 0.1)
    intervals = ("percentile", "basic", "normal", "bca") + (("studentized",) if stat.se is not None else ())
    r = boot([x], stat, B=200, intervals=intervals)
    for iv in r.intervals:
        if iv.lower is not None:
            assert iv.lower <= iv.upper, iv


@settings(max_examples=25, deadline=None)
@given(st.lists(st.floats(-100, 100, allow_nan=False), min_size=2, max_size=20), st.floats(-1e3, 1e3))
def test_percentile_interval_of_the_mean_is_shift_equivariant(data: list[float], shift: float) -> None:
    x = np.array(data)
    # a spread that the shift rounds away is not the same data any more
    assume(np.ptp(x) > 1e-6 * (abs(shift) + np.max(np.abs(x)) + 1))
    a = boot([x], "mean", B=200)
    b = boot([x + shift], "mean", B=200)
    scale = 1e-9 * (np.max(np.abs(x)) + abs(shift) + 1)
    assert b.intervals[0].lower == pytest.approx(a.intervals[0].lower + shift, abs=scale)
    assert b.intervals[0].upper == pytest.approx(a.intervals[0].upper + shift, abs=scale)


def test_clusters_are_resampled_within_strata() -> None:
    # 4 clusters of 3 rows in stratum 0, 2 clusters of 3 rows in stratum 1; the outcome is the stratum
    strata = np.repeat([0, 0, 0, 0, 1, 1], 3)
    codes = np.repeat(np.arange(6), 3)
    x = strata.astype(float)
    within = boot([x], "mean", clusters=[codes], strata=[strata], B=200, intervals=("percentile",))
    # within strata every resample keeps 4 + 2 clusters of 3 rows: the share of stratum 1 never moves
    assert np.all(within.distribution == within.distribution[0])
    assert within.distribution[0] == pytest.approx(1 / 3)
    assert "degenerate-distribution" in [w.code for w in within.warnings]
    assert within.scheme == "whole clusters resampled within strata"
    across = boot([x], "mean", clusters=[codes], B=200, intervals=("percentile",))
    assert np.ptp(across.distribution) > 0


def test_paired_studentized_uses_the_se_of_the_differences() -> None:
    x, y = TREATMENT, CONTROL[:7]
    paired = boot([x, y], "mean_difference", paired=True, intervals=("studentized",))
    diffs = boot([x - y], "mean", intervals=("studentized",))
    # Source: identity 2 on the differences: ŝe = sd(d)/√n
    assert paired.details["se_hat"] == pytest.approx(np.std(x - y, ddof=1) / math.sqrt(7), rel=1e-12)
    assert (paired.intervals[0].lower, paired.intervals[0].upper) == pytest.approx(
        (diffs.intervals[0].lower, diffs.intervals[0].upper), rel=1e-9)
    with pytest.raises(EngineError, match="no analytic standard error"):
        boot([x, y], "median_difference", paired=True, intervals=("studentized",))


def test_zero_resample_se_gives_infinite_t_not_an_error() -> None:
    # 7 of the 1716 multisets repeat one observation: se* = 0 and θ* ≠ θ̂, so t* = ±∞ (identity of the pivot)
    r = boot([TREATMENT], "mean", exhaustive=True, intervals=("studentized",))
    assert "studentized-infinite-t" in [w.code for w in r.warnings]
    iv = r.intervals[0]
    assert iv.lower is not None and math.isfinite(iv.lower) and math.isfinite(iv.upper)
    assert iv.lower < r.estimate < iv.upper


def test_nested_bootstrap_se_by_hand() -> None:
    from planrunner.engines.streams import UniformRows
    x = TREATMENT
    stat = get_statistic("median")
    lay = schemes.layout((x,), None)
    stream = stream_for(3, "nested")
    values, se = schemes.draw_cells(lay, stat, 30, stream, 10 ** 6, "bootstrap", 40)
    # resample 5 by hand: its outer row, then rows 5·40 … 5·40 + 39 of the inner stream
    outer = x[(UniformRows(stream, 7).take(6)[5] * 7).astype(int)]
    inner_rows = UniformRows(stream.child(schemes.INNER_LABEL), 7, start=5 * 40).take(40)
    inner = np.median(outer[(inner_rows * 7).astype(int)], axis=1)
    assert values[5] == np.median(outer)
    assert se[5] == pytest.approx(np.std(inner, ddof=1), rel=1e-15)
    # batch size never changes a nested number
    _, small = schemes.draw_cells(lay, stat, 30, stream, 1, "bootstrap", 40)
    assert np.array_equal(se, small)


def test_nested_bootstrap_studentized_interval() -> None:
    r = boot([TREATMENT], "median", B=300, intervals=("studentized",), studentized_se="bootstrap",
             inner_resamples=25)
    info = r.details["studentized_se"]
    assert info["method"] == "bootstrap" and info["statistic_evaluations"] == 300 * 26
    assert r.details["se_hat"] == r.standard_error  # the data's ŝe is the outer bootstrap SE
    paired = boot([TREATMENT, CONTROL[:7]], "median_difference", paired=True, B=200, intervals=("studentized",),
                  studentized_se="bootstrap", inner_resamples=20)
    assert paired.details["studentized_se"]["inner_resamples"] == 20
    with pytest.raises(EngineError, match="nested bootstrap"):
        boot([TREATMENT], "mean", parametric="normal", intervals=("studentized",), studentized_se="bootstrap")


@pytest.mark.parametrize("name", ["median", "sd", "correlation"])
def test_cluster_equal_sizes_vectorised_equals_loop(name: str) -> None:
    rng = np.random.default_rng(12)
    stat = get_statistic(name)
    x = rng.normal(size=(24, 2)) if stat.columns == 2 else rng.normal(size=24)
    codes = (np.repeat(np.arange(8), 3),)
    lay = schemes.cluster_layout((x,), codes, (np.repeat(np.arange(8), 3) % 2,))
    fast = schemes.draw_clusters((x,), lay, stat, 250, stream_for(2, "v"), 500, fast=True)
    loop = schemes.draw_clusters((x,), lay, stat, 250, stream_for(2, "v"), 500, fast=False)
    assert np.array_equal(fast, loop)


@pytest.mark.parametrize("q", [None, 0.01, 0.1, 0.25, 0.5, 0.6, 0.75, 0.9, 0.99])
@pytest.mark.parametrize("sizes", [(7,), (8,), (1,), (2,), (7, 9), (10, 3)])
def test_quantile_fast_path_equals_plain(q, sizes) -> None:
    from planrunner.engines.statistics import bind
    rng = np.random.default_rng(sum(sizes))
    groups = tuple(rng.integers(0, 6, n).astype(float) * 1.7 for n in sizes)  # ties on purpose
    if q is None:
        stat = get_statistic("median" if len(sizes) == 1 else "median_difference")
    else:
        stat = bind(get_statistic("quantile" if len(sizes) == 1 else "quantile_difference"), q)
    strata = tuple(np.arange(n) % 2 for n in sizes)
    lay = schemes.layout(groups, strata)
    fast, _ = schemes.draw_cells(lay, stat, 1500, stream_for(5, "fast"), 4000, None, fast=True)
    plain, _ = schemes.draw_cells(lay, stat, 1500, stream_for(5, "fast"), 4000, None, fast=False)
    assert np.array_equal(fast, plain)  # the same resamples give bit-identical replicates


@settings(max_examples=20, deadline=None)
@given(st.lists(st.floats(-50, 50, allow_nan=False), min_size=6, max_size=16),
       st.sampled_from(["pairs", "clusters", "moving", "stationary", "parametric", "exhaustive-small"]))
def test_lower_never_above_upper_in_every_scheme(data: list[float], scheme: str) -> None:
    x = np.array(data)
    half = x.size // 2
    kw = {"pairs": dict(samples=[x[:half], x[half:2 * half]], name="mean_difference", paired=True),
          "clusters": dict(samples=[x], name="mean", clusters=[np.arange(x.size) // 2]),
          "moving": dict(samples=[x], name="mean", blocks=("moving", 3)),
          "stationary": dict(samples=[x], name="median", blocks=("stationary", 3)),
          "parametric": dict(samples=[x], name="mean", parametric="normal"),
          "exhaustive-small": dict(samples=[x[:6]], name="median", exhaustive=True)}[scheme]
    samples, name = kw.pop("samples"), kw.pop("name")
    with_bca = scheme in ("pairs", "clusters", "exhaustive-small")
    intervals = ("percentile", "basic", "normal") + (("bca",) if with_bca else ())
    r = boot(samples, name, B=100, intervals=intervals, **kw)
    for iv in r.intervals:
        if iv.lower is not None:
            assert iv.lower <= iv.upper, (scheme, iv)


@pytest.mark.parametrize("ks", [[0], [1499], [1499, 1500], [2999], [2250, 2251], [29, 30]])
def test_order_positions_equal_partition(ks) -> None:
    # the counting window gives exactly numpy's partition, including rows far outside the window
    rng = np.random.default_rng(len(ks) + ks[0])
    n = 3000
    ranks = rng.integers(0, n, size=(40, n)).astype(np.int32)
    ranks[3] = 0  # every draw the smallest observation: the order statistic lies below any window
    ranks[7] = n - 1  # and above it
    ranks[11, : n // 2 + 400] = 5  # a lopsided row
    expected = np.partition(ranks, ks, axis=1)[:, ks]
    assert np.array_equal(schemes._order_positions(ranks.copy(), ks, n), expected)


@pytest.mark.parametrize("name,q", [("median", None), ("quantile", 0.1), ("quantile", 0.975),
                                    ("median_difference", None)])
def test_order_fast_path_equals_plain_on_large_groups(name, q) -> None:
    from planrunner.engines.statistics import bind
    rng = np.random.default_rng(31)
    groups = (np.round(rng.gamma(2.0, 10.0, 2001), 1), rng.normal(size=1500))[: 2 if "difference" in name else 1]
    stat = get_statistic(name) if q is None else bind(get_statistic(name), q)
    lay = schemes.layout(groups, None)
    fast, _ = schemes.draw_cells(lay, stat, 700, stream_for(8, "big"), 50_000, None, fast=True)
    plain, _ = schemes.draw_cells(lay, stat, 700, stream_for(8, "big"), 50_000, None, fast=False)
    assert np.array_equal(fast, plain)


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 400), st.integers(1, 30), st.integers(0, 2 ** 32 - 1), st.floats(0.0, 1.0))
def test_order_positions_equal_partition_for_any_size(n, rows, seed, q) -> None:
    rng = np.random.default_rng(seed)
    ranks = rng.integers(0, n, size=(rows, n)).astype(np.int32)
    k = min(n - 1, int(q * n))
    ks = [k] if k + 1 >= n else [k, k + 1]
    expected = np.partition(ranks, ks, axis=1)[:, ks]
    assert np.array_equal(schemes._order_positions(ranks.copy(), ks, n), expected)
