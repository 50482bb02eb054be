"""Numbers that must not go silently wrong: large common offsets, scaling, exact nulls whose counts
pass the float range, and exact p-values against scipy's exact functions on random small designs.

Tolerances are stated beside each check; the reference values come from ``scipy.stats``
(`permutation_test` with exhaustive enumeration, `mannwhitneyu(method='exact')`, `fisher_exact`,
`hypergeom`) or from exact identities (a location statistic's p-value does not change when a
constant is added to every value, nor when every value is multiplied by a positive constant).
"""

from __future__ import annotations

import itertools
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from scipy import stats

from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.exactdist import integer_scores, sum_distribution
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

MEAN_DIFFERENCE = get_statistic("mean_difference")
EXACT = PermutationOptions(resamples=9999, alternative="two-sided", exact="always")


def p_exact(x, y, statistic=MEAN_DIFFERENCE, alternative="two-sided"):
    options = PermutationOptions(resamples=9999, alternative=alternative, exact="always")
    return permutation_test((np.asarray(x, float), np.asarray(y, float)), statistic, options,
                            stream=stream_for(1, "numerics"))


def scipy_exhaustive(x, y):
    def difference(a, b, axis):
        return a.mean(axis=axis) - b.mean(axis=axis)
    return stats.permutation_test((x, y), difference, permutation_type="independent", n_resamples=np.inf,
                                  vectorized=True).pvalue


def exact_rational_p(xs, ys):
    """The two-sided (doubled) exhaustive p-value of the mean difference of integer readings, counted
    in exact rational arithmetic: the definition itself, with no float tie to blur (an exact identity)."""
    values, n1 = list(xs) + list(ys), len(xs)
    total = sum(values)

    def difference(chosen):
        first = sum(values[i] for i in chosen)
        return Fraction(first, n1) - Fraction(total - first, len(values) - n1)

    observed = difference(range(n1))
    null = [difference(chosen) for chosen in itertools.combinations(range(len(values)), n1)]
    lower, upper = sum(d <= observed for d in null), sum(d >= observed for d in null)
    ties = sum(abs(d) == abs(observed) for d in null)  # arrangements float rounding could misjudge
    return min(1.0, 2 * min(lower, upper) / len(null)), 2 * ties / len(null)


# --- a large common offset ------------------------------------------------------------------------

READINGS_X = np.array([31, 47, 52, 44, 39, 58, 41, 50]) * 1e-4  # invented readings, 4 decimals
READINGS_Y = np.array([22, 35, 30, 41, 27, 33, 29, 38]) * 1e-4


@pytest.mark.parametrize("offset", [0.0, 1e3, 1e7])
def test_exact_p_ignores_a_common_offset(offset):
    # once: at 1e7 the data were taken for whole numbers, the DP counted the wrong sums and p was 0
    reference = scipy_exhaustive(READINGS_X, READINGS_Y)  # scipy reference (12,870 splits)
    result = p_exact(READINGS_X + offset, READINGS_Y + offset)
    assert result.p_value == pytest.approx(reference, rel=1e-12)
    assert result.p_value >= 1 / result.arrangements
    assert not [w for w in result.warnings if w.code == "degenerate-distribution"]


def test_monte_carlo_p_on_a_1e9_offset_is_not_degenerate():
    # once: the tie tolerance 1e-10·max|x| = 0.1 made every arrangement a tie: p = 1 and a false warning
    options = PermutationOptions(resamples=4999, alternative="two-sided", exact="never")
    plain = permutation_test((READINGS_X, READINGS_Y), MEAN_DIFFERENCE, options, stream=stream_for(1, "mc"))
    moved = permutation_test((READINGS_X + 1e9, READINGS_Y + 1e9), MEAN_DIFFERENCE, options,
                             stream=stream_for(1, "mc"))
    assert not [w for w in moved.warnings if w.code == "degenerate-distribution"]
    # at 1e9 a double holds these readings to 1.2e-7 and the tolerance (2**-43·1e9 = 1.1e-4) spans a
    # few steps of the null's grid (1.25e-5), so nearby values count as ties: p grows, but stays small
    assert moved.p_value < 0.05 and plain.p_value < 0.05
    nearer = permutation_test((READINGS_X + 1e7, READINGS_Y + 1e7), MEAN_DIFFERENCE, options,
                              stream=stream_for(1, "mc"))
    assert nearer.p_value == plain.p_value  # the same draws; at 1e7 the tolerance is 1.1e-6


def test_integer_scores_are_detected_exactly():
    assert integer_scores(np.array([1.0, 2.0, 3.0]))[1] == 1.0
    assert integer_scores(np.array([1.5, 2.0, 3.5]))[1] == 2.0  # mid-ranks
    assert integer_scores(np.array([10000000.0031, 10000000.0047])) is None  # once rounded to whole


def test_bca_does_not_collapse_to_percentile_under_an_offset():
    options = BootstrapOptions(resamples=2000, confidence=0.95, intervals=("percentile", "bca"))
    mean = get_statistic("mean")
    data = np.r_[READINGS_X, READINGS_Y]
    plain = bootstrap((data,), mean, options, stream=stream_for(2, "bca"))
    moved = bootstrap((data + 1e7,), mean, options, stream=stream_for(2, "bca"))
    # z0 counts replicates below the estimate: equal on the same draws unless rounding blurs a tie
    assert moved.z0 == pytest.approx(plain.z0, abs=0.05)
    assert plain.z0 != 0.0


# --- property: location statistics are invariant under offset and scale ---------------------------

small_design = st.tuples(
    st.lists(st.integers(-500, 500), min_size=2, max_size=6),
    st.lists(st.integers(-500, 500), min_size=2, max_size=6),
    st.sampled_from([1e-3, 1e-2, 1.0, 10.0, 1e3]),  # resolution of the readings
    st.sampled_from([0.0, 1.0, -250.0, 1e4, 1e6]),  # common offset
)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_design)
# found by hypothesis: readings in thousandths whose mean differences tie exactly at |0.001|; scipy's
# float enumeration (scipy 1.17) separates four of those ties by rounding and gives 62/70, while the
# exact count is 66/70 (exact_rational_p), which planrunner gives
@example(([103, 120, 85, 0], [119, 104, 89, 0], 0.001, 0.0))
def test_exact_p_is_invariant_under_offset_and_scale(design):
    xs, ys, unit, offset = design
    x, y = np.array(xs) * unit, np.array(ys) * unit
    if np.ptp(np.r_[x, y]) == 0:
        return
    reference = scipy_exhaustive(x, y)  # scipy reference, exhaustive enumeration
    for stat in ("mean_difference", "median_difference", "rank_sum"):
        plain = p_exact(x, y, get_statistic(stat))
        moved = p_exact(x + offset, y + offset, get_statistic(stat))
        # a tie that only the offset's rounding could separate is the one allowed difference:
        # one arrangement's weight (two for the doubled rule)
        assert abs(moved.p_value - plain.p_value) <= 2 / plain.arrangements + 1e-12, stat
        assert plain.p_value > 0 and moved.p_value > 0
    exact, tied_weight = exact_rational_p(xs, ys)  # the readings are integers times the unit: counted exactly
    assert p_exact(x, y).p_value == pytest.approx(exact, rel=1e-9, abs=1e-12)
    # scipy counts ties only within a relative 1e-14 of the observed difference, so float rounding may
    # split an exact tie: it can differ by at most the weight of the arrangements tied exactly
    assert abs(reference - exact) <= tied_weight + 1e-12


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.floats(-100, 100, allow_nan=False), min_size=2, max_size=7, unique=True),
       st.lists(st.floats(-100, 100, allow_nan=False), min_size=2, max_size=7, unique=True))
def test_exact_rank_sum_equals_scipy_mann_whitney(x, y):
    if set(x) & set(y):
        return  # no ties: scipy's exact method assumes none
    for alternative, scipy_alternative in (("greater", "greater"), ("less", "less"), ("two-sided", "two-sided")):
        ours = p_exact(x, y, get_statistic("rank_sum"), alternative)
        theirs = stats.mannwhitneyu(x, y, alternative=scipy_alternative, method="exact").pvalue  # scipy reference
        assert ours.p_value == pytest.approx(theirs, rel=1e-9)


# --- exact nulls whose counts pass 1.8e308 ------------------------------------------------------

@pytest.mark.parametrize("n1, n2, events1, events2", [
    (40, 60, 9, 20), (600, 600, 60, 78), (1100, 900, 110, 120), (2000, 2000, 200, 260), (3000, 1500, 150, 100)])
def test_exact_binary_p_equals_fisher_and_the_hypergeometric(n1, n2, events1, events2):
    # once: C(N, N/2) overflowed float64 near N = 1030; the run crashed or p was 1.0
    x = np.r_[np.ones(events1), np.zeros(n1 - events1)]
    y = np.r_[np.ones(events2), np.zeros(n2 - events2)]
    table = [[events1, n1 - events1], [events2, n2 - events2]]
    total_events = events1 + events2
    for alternative in ("greater", "less"):
        result = p_exact(x, y, get_statistic("risk_difference"), alternative)
        assert result.computation == "dynamic programming"
        fisher = stats.fisher_exact(table, alternative=alternative).pvalue  # scipy reference
        assert result.p_value == pytest.approx(fisher, rel=1e-9)
    hyper = stats.hypergeom(n1 + n2, total_events, n1)  # scipy reference: events of group 1 under the null
    result = p_exact(x, y, get_statistic("risk_difference"), "two-sided")
    doubled = min(1.0, 2 * min(hyper.sf(events1 - 1), hyper.cdf(events1)))
    assert result.p_value == pytest.approx(doubled, rel=1e-9)
    assert math.isfinite(result.p_value) and result.p_value > 0
    count = result.count_greater
    if isinstance(count, str):  # beyond the float range: decimal text, 13 significant digits
        assert float(count.split("e")[0]) > 0 and int(count.split("e")[1]) > 300
        assert math.lgamma(n1 + n2 + 1) / math.log(10) > 300


def test_rescaled_sums_keep_the_ratios():
    scores = np.r_[np.zeros(700), np.ones(700)].astype(np.int64)
    offset, counts, exponent = sum_distribution([(scores, 700)])
    assert exponent > 0 and np.isfinite(counts).all()
    # the hypergeometric probabilities, from scipy (reference), against the rescaled counts
    probabilities = counts / counts.sum()
    expected = stats.hypergeom(1400, 700, 700).pmf(np.arange(offset, offset + counts.size))
    assert np.allclose(probabilities, expected, rtol=1e-9, atol=1e-300)


# --- zero cells, overflow, and numpy's warnings ------------------------------------------------

def test_jackknife_of_a_risk_ratio_with_a_zero_cell_warns():
    from planrunner.engines.jackknife import jackknife
    # once: SE = 0 printed with no word; the ratio is 0 in every deletion because group 1 has no events
    result = jackknife((np.zeros(6), np.array([1.0, 0, 0, 0, 0, 1])), get_statistic("risk_ratio"))
    assert result.standard_error == 0.0
    codes = [w.code for w in result.warnings]
    assert "zero-cell" in codes and "zero-standard-error" in codes
    moving = jackknife((np.array([1.0, 0, 1, 0, 0, 0]), np.array([1.0, 0, 0, 0, 0, 1])), get_statistic("risk_ratio"))
    assert not {"zero-cell", "zero-standard-error"} & {w.code for w in moving.warnings}


def test_values_whose_squares_overflow_are_refused_by_the_engine():
    from planrunner.errors import EngineError
    x = np.r_[np.arange(10.0), 1e300]  # once: Welch's t was 0, p = 1, a false 'degenerate' warning
    with pytest.raises(EngineError, match="magnitude 1e\\+300 .observation 11"):
        p_exact(x, np.arange(10.0) + 0.5, get_statistic("t_welch"))


def test_no_numpy_warning_reaches_stderr(write_plan):
    import subprocess
    import sys
    plan = write_plan("""
    plan: quiet
    title: numpy warnings
    seed: 1
    datasets:
      d:
        file: d.csv
        columns:
          y: {type: number}
    analyses:
      - id: one
        data: d
        outcome: y
        statistic: sd
        method: bootstrap
        exhaustive: true
    """, {"d.csv": "y\n1\n2\n"})
    # the sd of one value (a jackknife deletion inside BCa) divides by zero: a message, no RuntimeWarning
    done = subprocess.run([sys.executable, "-m", "planrunner", "run", str(plan), "--quiet"], capture_output=True,
                          text=True, timeout=300)
    assert "RuntimeWarning" not in done.stderr and "Traceback" not in done.stderr, done.stderr
    assert done.returncode in (0, 2), done.stderr


def test_exhaustive_bca_on_tiny_degenerate_data_writes_its_reports(write_plan, tmp_path):
    from planrunner.pipeline.run import run_plan
    # once: jinja2 UndefinedError (an interval end without its Monte Carlo band), and no record
    plan = write_plan("""
    plan: tiny
    title: Exhaustive BCa on 0, 0, 0, 1
    seed: 1
    datasets:
      d:
        file: d.csv
        columns:
          y: {type: number}
    analyses:
      - id: one
        data: d
        outcome: y
        statistic: mean
        method: bootstrap
        exhaustive: true
        intervals: [bca]
    """, {"d.csv": "y\n0\n0\n0\n1\n"})
    outcome = run_plan(plan, out=tmp_path / "runs", operator="tester")
    assert (outcome.folder / "report.html").is_file() and (outcome.folder / "report.md").is_file()
    assert outcome.record["analyses"][0]["intervals"][0]["method"] == "bca"


def test_exact_signed_rank_beyond_1024_pairs_keeps_its_p_value():
    from planrunner.engines.signflip import signflip_test
    # once: the 2**n sign patterns overflowed float64 from n = 1024 (an infinite total, p NaN or 1)
    rng = np.random.default_rng(5)
    n = 1100
    d = rng.normal(0.08, 1.0, n)  # invented differences, continuous: no ties
    result = signflip_test(d, np.zeros(n), get_statistic("signed_rank"),
                           PermutationOptions(resamples=999, alternative="greater", exact="always"),
                           stream=stream_for(1, "pairs"))
    assert result.computation == "dynamic programming"
    ranks = stats.rankdata(np.abs(d))
    w = float(ranks[d > 0].sum())
    mean, var = n * (n + 1) / 4, n * (n + 1) * (2 * n + 1) / 24
    normal = stats.norm.sf((w - 0.5 - mean) / math.sqrt(var))  # normal approximation with continuity
    # correction (common practice; at n = 1100 it is within about 1e-3 of the exact p)
    assert result.p_value == pytest.approx(normal, abs=2e-3)
    assert 0 < result.p_value < 1
