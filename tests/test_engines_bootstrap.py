"""Bootstrap engine: V-MOUSE-BOOT, V-MOUSE-STRATA, V-SPATIAL, identity 12, scipy agreement,
the draw contract, batch invariance, degenerate data and error messages; the statistic registry."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from planrunner.engines.bootstrap import (
    BootstrapOptions,
    bca_acceleration,
    bca_levels,
    bootstrap,
    percentile_of_score,
    quantile_rank,
)
from planrunner.engines.jackknife import jackknife_replicates
from planrunner.engines.statistics import STATISTICS, Statistic, get_statistic
from planrunner.engines.streams import DRAW_BLOCK, stream_for
from planrunner.errors import EngineError

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)

# Source: E&T Table 14.1 (V-SPATIAL, published, confirmed): test A, 26 children
SPATIAL_A = np.array([48, 36, 20, 29, 42, 42, 20, 42, 22, 41, 45, 14, 6, 0, 33, 28, 34, 4, 32, 24, 47,
                      41, 24, 26, 30, 41], dtype=float)

PLUGIN_VARIANCE = Statistic("plugin_variance", "plug-in variance", 1, True, "numeric",
                            lambda x: np.var(x, axis=-1))


def _pearson(xy: np.ndarray) -> np.ndarray:
    x = xy[..., 0, :] - xy[..., 0, :].mean(axis=-1, keepdims=True)
    y = xy[..., 1, :] - xy[..., 1, :].mean(axis=-1, keepdims=True)
    return (x * y).sum(axis=-1) / np.sqrt((x * x).sum(axis=-1) * (y * y).sum(axis=-1))


PEARSON = Statistic("pearson", "correlation", 1, True, "numeric", _pearson, columns=2)


def run(samples, name_or_stat, *, B=2000, confidence=0.95, intervals=("percentile",), seed=2026,
        analysis="test", **kw):
    stat = get_statistic(name_or_stat) if isinstance(name_or_stat, str) else name_or_stat
    design = {k: kw.pop(k) for k in ("strata", "clusters", "paired", "batch_elements") if k in kw}
    options = BootstrapOptions(resamples=B, confidence=confidence, intervals=tuple(intervals), **kw)
    return bootstrap(samples, stat, options, stream=stream_for(seed, analysis), **design)


def codes(result) -> list[str]:
    return [w.code for w in result.warnings]


# ------------------------------------------------------------------ registry

def test_registry_has_the_five_statistics() -> None:
    assert {"mean", "median", "proportion", "mean_difference", "median_difference"} <= set(STATISTICS)
    x, y = np.array([[1.0, 2, 3, 10]]), np.array([[0.0, 4, 5]])
    assert get_statistic("mean").compute(x) == pytest.approx(4.0)
    assert get_statistic("median").compute(x) == pytest.approx(2.5)
    assert get_statistic("mean_difference").compute(x, y) == pytest.approx(1.0)
    assert get_statistic("median_difference").compute(x, y) == pytest.approx(-1.5)
    assert get_statistic("proportion").compute(np.array([1.0, 0, 1, 1])) == pytest.approx(0.75)
    assert get_statistic("proportion").outcome == "binary"
    assert not get_statistic("median").smooth and get_statistic("mean").smooth
    assert get_statistic("median_difference").samples == 2


def test_unknown_statistic_lists_known_names() -> None:
    with pytest.raises(KeyError, match="known statistics: adjusted_mean_difference, coefficient, correlation, "
                                       ".*mean, mean_difference, median"):
        get_statistic("trimmed_mean_typo")


# ------------------------------------------------------------------ V-MOUSE-BOOT, V-MOUSE-STRATA

def test_mouse_standard_errors_b2000() -> None:
    mean = run([TREATMENT], "mean", analysis="mouse-mean")
    median = run([TREATMENT], "median", analysis="mouse-median")
    # Source: V-MOUSE-BOOT, exact ideal values; tolerance 4 s.d. at B=2000 (V-TOL)
    assert abs(mean.standard_error - 23.3635234373) <= 1.42
    assert abs(median.standard_error - 37.8346743939) <= 2.12
    assert mean.estimate == pytest.approx(608 / 7, rel=1e-15)
    assert mean.scheme == "rows resampled" and mean.n == (7,)


def test_two_group_standard_error_b2000() -> None:
    result = run([TREATMENT, CONTROL], "mean_difference", analysis="mouse-diff")
    # Source: V-MOUSE-STRATA, exact 26.908107910089; tolerance ±1.7 (4 s.d. at B=2000)
    assert abs(result.standard_error - 26.908107910089) <= 1.7
    assert result.scheme == "each group resampled separately"
    assert result.n == (7, 9)


def test_mean_bias_within_monte_carlo_error() -> None:
    # identity 7: E*[mean*] = mean, so the bias is 0 up to MC error (s.d. = SE/sqrt(B), V-TOL)
    result = run([TREATMENT], "mean", B=4000)
    assert abs(result.bias) <= 4 * 23.3635234373 / math.sqrt(4000)


def test_strata_keep_cells_and_give_stratified_variance() -> None:
    rng = np.random.default_rng(7)
    low, high = rng.uniform(0, 1, 9), rng.uniform(100, 101, 5)
    x = np.concatenate([low, high])
    x_codes = np.array([0] * 9 + [1] * 5)
    order = rng.permutation(14)
    x, x_codes = x[order], x_codes[order]
    count_high = Statistic("count_high", "count of values >= 100", 1, True, "numeric",
                           lambda v: np.sum(v >= 100, axis=-1).astype(float))
    kept = run([x], count_high, B=500, strata=[x_codes])
    assert np.all(kept.distribution == 5.0)  # every resample keeps its cell sizes
    assert kept.scheme == "within group × stratum cells"
    assert "degenerate-distribution" in codes(kept)
    lonely = run([x], "mean", B=100, strata=[np.where(np.arange(14) == 3, 9, x_codes)])
    assert "single-observation-cell" in codes(lonely)

    # identity 9: Var* of a stratified mean = sum_h (n_h/n)^2 m2_h/n_h
    result = run([x], "mean", B=4000, strata=[x_codes])
    ideal_var = sum((v.size / 14) ** 2 * np.var(v) / v.size for v in (low, high))
    ideal_se = math.sqrt(ideal_var)
    kurt = scipy.stats.kurtosis(result.distribution, fisher=False)
    # MC s.d. of a B-replicate SE = SE sqrt((kappa-1)/(4B)) (V-TOL), 4 s.d.
    assert abs(result.standard_error - ideal_se) <= 4 * ideal_se * math.sqrt((kurt - 1) / (4 * 4000))


# ------------------------------------------------------------------ draw contract

def test_draw_contract_by_hand_one_group() -> None:
    stream = stream_for(31, "contract")
    result = bootstrap([TREATMENT], get_statistic("mean"), BootstrapOptions(DRAW_BLOCK + 3, 0.9, ()),
                       stream=stream)
    # documented contract, spelled out: row r of block r // 1000; index floor(u * n)
    for r in (0, 1, 2, DRAW_BLOCK, DRAW_BLOCK + 2):
        gen = stream.generator(r // DRAW_BLOCK)
        u = gen.random((r % DRAW_BLOCK + 1, 7))[-1]
        assert result.distribution[r] == np.mean(TREATMENT[np.floor(u * 7).astype(int)])


def test_draw_contract_by_hand_strata_and_groups() -> None:
    x = np.array([5.0, 1, 7, 2, 9, 4])
    x_codes = np.array([2, 0, 2, 0, 2, 1])
    y = np.array([10.0, 30, 20])
    y_codes = np.array([1, 1, 0])
    stream = stream_for(8, "cells")
    result = bootstrap([x, y], get_statistic("mean_difference"), BootstrapOptions(5, 0.9, ()),
                       stream=stream, strata=[x_codes, y_codes])
    # cells group-major then code order: x codes 0 -> [1, 2], 1 -> [4], 2 -> [5, 7, 9]; y: 0 -> [20], 1 -> [10, 30]
    laid = np.array([1.0, 2, 4, 5, 7, 9, 20, 10, 30])
    start = np.array([0, 0, 2, 3, 3, 3, 6, 7, 7])
    size = np.array([2, 2, 1, 3, 3, 3, 1, 2, 2])
    u = stream.generator(0).random((5, 9))
    picked = laid[start + np.floor(u * size).astype(int)]
    expected = picked[:, :6].mean(axis=1) - picked[:, 6:].mean(axis=1)
    assert np.array_equal(result.distribution, expected)


@pytest.mark.parametrize("case", ["mean", "median", "two-groups", "strata", "two-columns"])
def test_batch_size_never_changes_the_numbers(case: str) -> None:
    rng = np.random.default_rng(11)
    if case == "two-columns":
        samples, stat, strata = [rng.normal(0, 1, (25, 2))], PEARSON, None
    elif case == "two-groups":
        samples, stat, strata = [TREATMENT, CONTROL], get_statistic("median_difference"), None
    elif case == "strata":
        samples, stat = [TREATMENT, CONTROL], get_statistic("mean_difference")
        strata = [np.array([0, 1, 0, 1, 0, 1, 1]), np.array([1, 1, 0, 0, 1, 0, 1, 0, 2])]
    else:
        samples, stat, strata = [SPATIAL_A], get_statistic(case), None
    results = [bootstrap(samples, stat, BootstrapOptions(2345, 0.9, ("percentile", "bca")),
                         stream=stream_for(1, "batch"), strata=strata, batch_elements=b)
               for b in (1, 700, 10 ** 9)]
    for other in results[1:]:
        assert np.array_equal(results[0].distribution, other.distribution)
        assert results[0].intervals == other.intervals


def test_stream_independence() -> None:
    a = run([TREATMENT], "mean", analysis="primary")
    b = run([TREATMENT], "mean", analysis="primary")
    c = run([TREATMENT], "mean", analysis="sensitivity")
    assert np.array_equal(a.distribution, b.distribution)
    assert not np.array_equal(a.distribution, c.distribution)


# ------------------------------------------------------------------ BCa

@pytest.mark.parametrize("p", [0.001, 0.025, 0.05, 0.5, 0.9, 0.975])
def test_bca_levels_identity_12(p: float) -> None:
    # identity 12: a = 0 and z0 = 0 give the percentile levels
    assert bca_levels(0.0, 0.0, p) == pytest.approx(p, rel=1e-12)


def test_bca_zero_constants_equal_percentile_interval() -> None:
    # identity 12 on an interval: reading the replicates at the BCa(0, 0) levels = percentile
    result = run([SPATIAL_A], "mean", confidence=0.9)
    ordered = np.sort(result.distribution)
    lo, hi = bca_levels(0.0, 0.0, [0.05, 0.95])
    percentile = result.intervals[0]
    assert ordered[quantile_rank(lo, 2000) - 1] == percentile.lower
    assert ordered[quantile_rank(hi, 2000) - 1] == percentile.upper


def test_spatial_level_mapping() -> None:
    # Source: E&T Table 14.2 (published, as cited): a = .061, z0 = .146 -> .110 / .985;
    # recomputed 0.109856 / 0.984477 (V-SPATIAL, exact)
    lo, hi = bca_levels(0.146, 0.061, [0.05, 0.95])
    assert lo == pytest.approx(0.109856, abs=1e-6)
    assert hi == pytest.approx(0.984477, abs=1e-6)


def test_spatial_acceleration() -> None:
    reps = jackknife_replicates([SPATIAL_A], PLUGIN_VARIANCE)
    # Source: V-SPATIAL a = 0.0612401198123 (exact); E&T Table 14.2 a = .061
    assert bca_acceleration(reps) == pytest.approx(0.0612401198123, abs=1e-10)
    result = run([SPATIAL_A], PLUGIN_VARIANCE, confidence=0.9, intervals=["percentile", "bca"])
    assert result.acceleration == pytest.approx(0.0612401198123, abs=1e-10)
    assert result.estimate == pytest.approx(171.534023668639, rel=1e-12)  # Source: V-SPATIAL


def test_spatial_intervals_b2000() -> None:
    result = run([SPATIAL_A], PLUGIN_VARIANCE, confidence=0.9, intervals=["percentile", "bca"],
                 analysis="spatial")
    percentile, bca = result.intervals
    # Source: V-SPATIAL MC (B = 2e6): percentile (97.870, 235.688), MC s.d. 1.72 / 2.09
    # at B=2000, so 4 s.d. = 6.88 / 8.36
    assert abs(percentile.lower - 97.870) <= 6.88
    assert abs(percentile.upper - 235.688) <= 8.36
    # Source: V-SPATIAL suggested test: BCa within ±4 / ±8 of (115.8, 261.7)
    assert abs(bca.lower - 115.8) <= 4
    assert abs(bca.upper - 261.7) <= 8
    assert bca.quantile_levels is not None and bca.quantile_levels[0] > 0.05


def test_multi_sample_acceleration_matches_scipy_formula() -> None:
    result = run([TREATMENT, CONTROL], "mean_difference", confidence=0.9, intervals=["bca"])
    # E&T eq. 15.36 as in scipy.stats.bootstrap, written out
    reps = jackknife_replicates([TREATMENT, CONTROL], get_statistic("mean_difference"))
    num = den = 0.0
    for r in reps:
        n = r.size
        u = (n - 1) * (r.mean() - r)
        num += np.sum(u ** 3) / n ** 3
        den += np.sum(u ** 2) / n ** 2
    assert result.acceleration == pytest.approx(num / (6 * den ** 1.5), rel=1e-12)


@pytest.mark.parametrize("name", ["mean_difference", "median_difference"])
def test_multi_sample_bca_levels_match_scipy(name: str) -> None:
    # continuous data: no replicate ties the estimate, so the tie tolerance plays no role
    # (with the integer mouse data, many replicates equal θ̂ in exact arithmetic and differ from it
    # by rounding only; we count them as ties, scipy's count depends on the rounding)
    rng = np.random.default_rng(13)
    x, y = rng.gamma(2.0, 3.0, 8), rng.gamma(2.0, 2.0, 11)
    stat = get_statistic(name)
    result = run([x, y], stat, confidence=0.9, intervals=["bca"])
    try:  # scipy reference (private helper; skipped if scipy reorganises it)
        from scipy.stats._resampling import _bca_interval
        a1, a2, a_hat = _bca_interval((x, y), lambda u, v, axis=-1: stat.compute(u, v), axis=-1,
                                      alpha=0.05, theta_hat_b=np.asarray(result.distribution),
                                      batch=None, xp=np)
    except (ImportError, TypeError):
        pytest.skip("scipy's private BCa helper changed")
    assert result.acceleration == pytest.approx(float(a_hat), rel=1e-12)  # scipy reference
    assert result.intervals[0].quantile_levels == pytest.approx((float(a1), float(a2)), rel=1e-12)  # scipy reference


def test_z0_mid_rank_rule() -> None:
    dist = np.array([1.0, 2, 2, 3, 4])
    # (#{<2} + #{<=2}) / (2B) = (1 + 3) / 10, as scipy's _percentile_of_score
    assert percentile_of_score(dist, 2.0, 0.0) == pytest.approx(0.4)
    result = run([TREATMENT], "mean", intervals=["bca"])
    share = (np.sum(result.distribution < result.estimate) + np.sum(result.distribution <= result.estimate)) / 4000
    assert result.z0 == pytest.approx(scipy.stats.norm.ppf(share), rel=1e-12)


def test_percentile_and_bca_agree_with_scipy() -> None:
    B = 20000
    ours = run([TREATMENT], "mean", B=B, intervals=["percentile", "bca"], analysis="versus-scipy")
    ref = {m: scipy.stats.bootstrap((TREATMENT,), np.mean, n_resamples=B, confidence_level=0.95,
                                    method=m, rng=np.random.default_rng(20260)).confidence_interval
           for m in ("percentile", "BCa")}
    # MC s.d. of each endpoint estimated from 60 independent runs at B=2000 (V-TOL),
    # scaled to B=20000 by sqrt(2000/20000); the two runs are independent, so the difference has
    # s.d. sqrt(2) times that; tolerance 4 s.d.
    runs = np.array([[v for iv in run([TREATMENT], "mean", intervals=["percentile", "bca"],
                                      analysis=f"replicate-{k}").intervals for v in (iv.lower, iv.upper)]
                     for k in range(60)])
    sd = runs.std(axis=0, ddof=1) * math.sqrt(2000 / B)
    tol = 4 * math.sqrt(2) * sd
    got = [v for iv in ours.intervals for v in (iv.lower, iv.upper)]
    want = [ref["percentile"].low, ref["percentile"].high, ref["BCa"].low, ref["BCa"].high]
    for g, w, t in zip(got, want, tol):
        assert abs(g - w) <= t, (g, w, t)


# ------------------------------------------------------------------ quantile convention

def test_quantile_rank_is_inverse_cdf() -> None:
    rng = np.random.default_rng(12)
    values = np.sort(rng.normal(0, 1, 997))
    for level in rng.uniform(0, 1, 200):
        assert values[quantile_rank(level, 997) - 1] == np.quantile(values, level, method="inverted_cdf")
    # rounding of 1 - 0.95 must not move the endpoint: level*B = 50.00000000000004 -> the 50th
    assert quantile_rank((1 - 0.95) / 2, 2000) == 50
    assert quantile_rank(1 - (1 - 0.95) / 2, 2000) == 1950
    assert quantile_rank(0.0, 10) == 1 and quantile_rank(1.0, 10) == 10


@settings(max_examples=25, deadline=None)
@given(data=st.lists(st.floats(-1e3, 1e3), min_size=2, max_size=12),
       confidence=st.sampled_from([0.8, 0.9, 0.95]))
def test_intervals_ordered_and_never_nan(data: list[float], confidence: float) -> None:
    result = run([np.array(data)], "mean", B=200, confidence=confidence, intervals=["percentile", "bca"])
    for iv in result.intervals:
        if iv.lower is None:
            assert iv.upper is None and iv.note
            assert result.warnings
        else:
            assert math.isfinite(iv.lower) and math.isfinite(iv.upper)
            assert iv.lower <= iv.upper


# ------------------------------------------------------------------ degenerate data and warnings

def test_constant_data_is_degenerate_not_nan() -> None:
    result = run([np.full(15, 3.3)], "mean", intervals=["percentile", "bca"])
    assert "degenerate-distribution" in codes(result)
    for iv in result.intervals:
        assert iv.lower is None and iv.upper is None and "equal" in iv.note
    assert result.standard_error == pytest.approx(0.0, abs=1e-14)
    assert result.z0 is None and result.acceleration is None


def test_bca_undefined_when_jackknife_does_not_vary() -> None:
    # delete-one medians of these data are all 1, so the acceleration is 0/0
    data = np.array([1.0, 1, 1, 1, 1, 1, 1, 1, 5, 9, 1, 1])
    result = run([data], "median", intervals=["percentile", "bca"])
    percentile, bca = result.intervals
    assert percentile.lower is not None
    assert bca.lower is None and bca.upper is None and "acceleration" in bca.note
    assert "bca-undefined" in codes(result) and "bca-non-smooth" in codes(result)


def test_bca_undefined_when_z0_is_infinite() -> None:
    # number of distinct values: a resample almost never has all 12 (P = 12!/12^12), so every
    # replicate lies below the estimate, the mid-rank share is 1 and z0 is infinite
    def distinct(x: np.ndarray) -> np.ndarray:
        s = np.sort(x, axis=-1)
        return 1.0 + np.sum(np.diff(s, axis=-1) != 0, axis=-1)

    stat = Statistic("distinct", "number of distinct values", 1, False, "numeric", distinct)
    result = run([np.arange(12.0)], stat, B=300, intervals=["bca", "percentile"])
    bca = result.intervals[0]
    assert bca.lower is None and "z0" in bca.note
    assert "bca-undefined" in codes(result)
    assert result.intervals[1].upper is not None


def test_tail_and_small_sample_warnings() -> None:
    result = run([TREATMENT], "mean", B=100)
    assert "few-resamples-in-tail" in codes(result)
    assert "small-sample" in codes(result)
    big = run([SPATIAL_A], "mean", B=2000)
    assert codes(big) == []


def test_non_finite_replicates_reported() -> None:
    # a correlation is undefined (0/0) on a resample that repeats one pair only
    xy = np.array([[1.0, 2.0], [2.0, 1.0], [3.0, 5.0]])
    result = run([xy], PEARSON, B=400)
    assert "non-finite-replicates" in codes(result)
    assert result.standard_error is None and result.intervals[0].lower is None


# ------------------------------------------------------------------ errors and result type

def test_errors() -> None:
    with pytest.raises(EngineError, match="group 2 is empty"):
        run([TREATMENT, np.array([])], "mean_difference")
    with pytest.raises(EngineError, match="non-finite"):
        run([np.array([1.0, np.inf, 2.0])], "mean")
    with pytest.raises(EngineError, match="takes 1 group"):
        run([TREATMENT, CONTROL], "mean")
    with pytest.raises(EngineError, match="unknown interval"):
        run([TREATMENT], "mean", intervals=["percentile", "bca-typo"])
    with pytest.raises(EngineError, match="confidence"):
        run([TREATMENT], "mean", confidence=95)
    with pytest.raises(EngineError, match="resamples"):
        run([TREATMENT], "mean", B=1)
    with pytest.raises(EngineError, match="7 observation"):
        run([TREATMENT], "mean", strata=[np.array([0, 1])])
    with pytest.raises(EngineError, match="integers"):
        run([TREATMENT], "mean", strata=[np.array([0.5] * 7)])
    with pytest.raises(EngineError, match="0 and 1"):
        run([np.array([0.0, 1, 0.5])], "proportion")


def test_result_is_frozen_and_read_only() -> None:
    result = run([TREATMENT], "mean", intervals=["percentile", "bca"])
    with pytest.raises(dataclasses.FrozenInstanceError):
        result.estimate = 0.0  # type: ignore[misc]
    with pytest.raises(ValueError):
        result.distribution[0] = 0.0
    assert result.resamples == 2000 and result.distribution.shape == (2000,)
    assert {"quantile", "bca_z0", "bca_acceleration", "standard_error"} <= set(result.conventions)
    assert result.bias == pytest.approx(float(np.mean(result.distribution)) - result.estimate, rel=1e-12)
    assert result.standard_error == pytest.approx(float(np.std(result.distribution, ddof=1)), rel=1e-12)


def test_proportion_bootstrap() -> None:
    data = np.array([1.0] * 30 + [0.0] * 20)
    result = run([data], "proportion", intervals=["percentile"])
    ideal = math.sqrt(0.6 * 0.4 / 50)  # identity 7: Var*(mean*) = m2/n
    assert abs(result.standard_error - ideal) <= 4 * ideal / math.sqrt(2 * 2000)  # V-TOL, kappa ~ 3
