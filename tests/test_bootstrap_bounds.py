"""One-sided bootstrap confidence bounds (`alternative: greater | less` on a bootstrap analysis).

Outside values: scipy.stats.bootstrap's one-sided intervals on the SAME replicates (its
`bootstrap_distribution`, fed to our interval methods), where the conventions coincide exactly
(percentile and basic at B = 2001, where the inverse-CDF and the linear-interpolation quantiles
pick the same order statistic) and for BCa, whose adjusted level must give scipy's bound through
scipy's own quantile rule (V-ONESIDED). Identity 20: a one-sided bound at confidence c is the same
end of the two-sided interval at confidence 2c − 1, read from the same replicates, with the same
Monte Carlo band.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from planrunner.engines.bootstrap import BootstrapOptions, bca_acceleration, bootstrap, percentile_of_score
from planrunner.engines.intervals import INTERVAL_METHODS, Summary
from planrunner.engines.jackknife import jackknife_replicates
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

# invented continuous sample (no ties among the replicates or at the estimate)
SAMPLE = np.random.default_rng(7).lognormal(mean=1.0, sigma=0.6, size=15)
# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)


def _summary(replicates: np.ndarray, estimate: float, confidence: float, alternative: str,
             samples: tuple[np.ndarray, ...] = (SAMPLE,)) -> Summary:
    """Our interval methods' input from given replicates: z0 and a as the engine computes them."""
    ordered = np.sort(replicates)
    z0 = float(scipy.stats.norm.ppf(percentile_of_score(ordered, estimate, 0.0)))
    a = bca_acceleration(jackknife_replicates(samples, get_statistic("mean" if len(samples) == 1
                                                                    else "mean_difference")))
    se = float(np.std(replicates, ddof=1))
    return Summary(estimate, ordered, None, confidence, se, float(np.mean(replicates)) - estimate, 0.0, 0.0,
                   z0, a, alternative=alternative)


@pytest.mark.parametrize("alternative", ["greater", "less"])
def test_percentile_and_basic_bounds_equal_scipy_on_the_same_replicates(alternative: str) -> None:
    # B = 2001, α = 0.05: scipy's linear quantile at position (B − 1)·α = 100 and our inverse-CDF
    # rank ⌈αB⌉ = 101 are the same order statistic, so the bounds must agree exactly
    for method, ours_name in (("percentile", "percentile"), ("basic", "basic")):
        ref = scipy.stats.bootstrap((SAMPLE,), np.mean, n_resamples=2001, confidence_level=0.95, method=method,
                                    alternative=alternative, rng=np.random.default_rng(11))  # scipy reference
        summary = _summary(ref.bootstrap_distribution, float(np.mean(SAMPLE)), 0.95, alternative)
        ours = INTERVAL_METHODS[ours_name](summary)
        want = ref.confidence_interval
        assert ours.side == ("lower" if alternative == "greater" else "upper")
        if alternative == "greater":
            assert ours.lower == pytest.approx(float(want.low), rel=1e-13) and ours.upper == math.inf == want.high
        else:
            assert ours.upper == pytest.approx(float(want.high), rel=1e-13) and ours.lower == -math.inf == want.low


@pytest.mark.parametrize("alternative", ["greater", "less"])
@pytest.mark.parametrize("samples", [(SAMPLE,), (TREATMENT + 0.01 * np.arange(7), CONTROL)], ids=["one", "two"])
def test_bca_bound_matches_scipy_on_the_same_replicates(alternative: str, samples: tuple[np.ndarray, ...]) -> None:
    statistic = np.mean if len(samples) == 1 else (lambda x, y, axis=-1: np.mean(x, axis) - np.mean(y, axis))
    ref = scipy.stats.bootstrap(samples, statistic, n_resamples=4000, confidence_level=0.9, method="BCa",
                                alternative=alternative, rng=np.random.default_rng(5))  # scipy reference
    replicates = ref.bootstrap_distribution
    estimate = float(statistic(*samples))
    ours = INTERVAL_METHODS["bca"](_summary(replicates, estimate, 0.9, alternative, samples))
    level = ours.quantile_levels[0 if alternative == "greater" else 1]
    assert level is not None
    # our adjusted level, read by scipy's quantile rule (linear), gives scipy's bound
    want = ref.confidence_interval.low if alternative == "greater" else ref.confidence_interval.high
    assert float(np.percentile(replicates, 100 * level)) == pytest.approx(float(want), rel=1e-12)
    # and our own end is the inverse-CDF quantile at that level (V-CONV-QUANTILE)
    end = ours.lower if alternative == "greater" else ours.upper
    assert end == float(np.quantile(replicates, level, method="inverted_cdf"))


def _run(alternative: str, confidence: float, intervals: tuple[str, ...], samples=(SAMPLE,), B=3000, **kw):
    stat = get_statistic("mean" if len(samples) == 1 else "mean_difference")
    options = BootstrapOptions(resamples=B, confidence=confidence, intervals=intervals, alternative=alternative, **kw)
    return bootstrap(samples, stat, options, stream=stream_for(2026, "bounds"))


ALL = ("percentile", "basic", "normal", "bca", "studentized")


@pytest.mark.parametrize("exhaustive", [False, True])
@pytest.mark.parametrize("confidence", [0.95, 0.9])
def test_identity_20_one_sided_bound_is_an_end_of_the_2c_minus_1_interval(exhaustive: bool, confidence: float) -> None:
    samples = (TREATMENT,) if exhaustive else (SAMPLE,)
    two = _run("two-sided", 2 * confidence - 1, ALL, samples, exhaustive=exhaustive)
    low = _run("greater", confidence, ALL, samples, exhaustive=exhaustive)
    high = _run("less", confidence, ALL, samples, exhaustive=exhaustive)
    assert low.exact is exhaustive
    for t, lo, hi in zip(two.intervals, low.intervals, high.intervals):
        assert (lo.side, hi.side, t.side) == ("lower", "upper", "two-sided")
        assert lo.lower == pytest.approx(t.lower, rel=1e-12) and lo.upper == math.inf, t.method
        assert hi.upper == pytest.approx(t.upper, rel=1e-12) and hi.lower == -math.inf, t.method
        if exhaustive:
            assert lo.monte_carlo is None and hi.monte_carlo is None
            continue
        assert t.monte_carlo is not None and t.monte_carlo_sd is not None
        assert lo.monte_carlo is not None and lo.monte_carlo_sd is not None
        assert hi.monte_carlo is not None and hi.monte_carlo_sd is not None
        assert lo.monte_carlo[1] is None and hi.monte_carlo[0] is None  # the open end has no band
        assert lo.monte_carlo[0] == pytest.approx(t.monte_carlo[0], rel=1e-12)
        assert hi.monte_carlo[1] == pytest.approx(t.monte_carlo[1], rel=1e-12)
        assert lo.monte_carlo_sd[0] == pytest.approx(t.monte_carlo_sd[0], rel=1e-9)
        assert hi.monte_carlo_sd[1] == pytest.approx(t.monte_carlo_sd[1], rel=1e-9)


def test_bounds_follow_shifts_and_scales_and_a_negative_scale_swaps_the_side() -> None:
    base = _run("greater", 0.95, ALL)
    for shift, scale in ((1e6, 1.0), (0.0, 1e-3), (-250.0, 1e4)):
        moved = _run("greater", 0.95, ALL, samples=(shift + scale * SAMPLE,))
        for a, b in zip(base.intervals, moved.intervals):
            assert b.lower == pytest.approx(shift + scale * a.lower, rel=1e-9, abs=1e-9 * abs(shift)), a.method
    # −x: every replicate is negated exactly (same stream), so a lower bound becomes an upper bound;
    # the normal bound reflects exactly, a quantile bound to within one order statistic (the
    # inverse-CDF quantile at α of −θ* is −θ*_(B+1−⌈αB⌉), not −θ*_(⌈(1−α)B⌉))
    flipped = _run("less", 0.95, ("percentile", "basic", "normal"), samples=(-SAMPLE,))
    assert np.array_equal(flipped.distribution, -base.distribution)
    ordered = np.sort(base.distribution)
    # percentile reads near rank ⌈αB⌉, basic near ⌈(1 − α)B⌉: the largest neighbouring gap there
    gap = max(float(np.max(np.diff(ordered[k - 3:k + 2]))) for k in (math.ceil(0.05 * ordered.size),
                                                                     math.ceil(0.95 * ordered.size)))
    for a, b in zip(base.intervals, flipped.intervals):
        assert b.side == "upper" and b.lower == -math.inf
        if a.method == "normal":
            assert b.upper == pytest.approx(-a.lower, rel=1e-12)
        else:
            assert abs(b.upper + a.lower) <= gap, a.method


def test_two_sided_default_is_unchanged() -> None:
    # the same stream, with and without the explicit two-sided default: identical numbers
    implicit = bootstrap((SAMPLE,), get_statistic("mean"), BootstrapOptions(resamples=999, confidence=0.95,
                                                                             intervals=ALL),
                         stream=stream_for(2026, "bounds"))
    explicit = _run("two-sided", 0.95, ALL, B=999)
    assert [(i.lower, i.upper, i.monte_carlo) for i in implicit.intervals] == \
        [(i.lower, i.upper, i.monte_carlo) for i in explicit.intervals]


def test_tail_rule_reads_only_the_bound_end() -> None:
    few = _run("greater", 0.99, ("percentile",), B=500)  # 5 replicates below the lower bound
    assert any(w.code == "few-resamples-in-tail" and "below the one-sided percentile lower bound" in w.message
               for w in few.warnings)
    many = _run("greater", 0.9, ("percentile",), B=500)  # 50 below; nothing is read above
    assert not any(w.code == "few-resamples-in-tail" for w in many.warnings)


PLAN = """\
plan: bounds
title: One-sided bounds from a plan
seed: 3
defaults:
  resamples: 1999
  alternative: greater
datasets:
  d:
    file: data.csv
    columns:
      y: {type: number}
      g: {type: category, levels: [a, b]}
analyses:
  - id: lower
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: bootstrap
    alternative: greater
    intervals: [bca, percentile]
  - id: upper
    role: secondary
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    alternative: less
    confidence: 0.9
    intervals: [normal]
  - id: inherits-nothing
    role: secondary
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    intervals: [percentile]
"""


def test_bounds_from_a_plan_reach_record_and_reports(tmp_path: Path) -> None:
    from planrunner.cli.main import main

    rows = ["y,g"] + [f"{v},{'a' if k % 2 else 'b'}" for k, v in enumerate(np.round(SAMPLE * 10, 3).tolist() * 2)]
    (tmp_path / "data.csv").write_text("\n".join(rows) + "\n")
    (tmp_path / "plan.yaml").write_text(PLAN)
    assert main(["run", str(tmp_path / "plan.yaml"), "--out", str(tmp_path / "runs"), "--quiet"]) == 0
    folder = next((tmp_path / "runs").glob("bounds-*"))
    record = json.loads((folder / "record.json").read_text())
    lower, upper, plain = record["analyses"]
    assert lower["alternative"] == "greater" and lower["settings"]["alternative"] == "greater"
    for i in lower["intervals"]:
        assert i["side"] == "lower" and i["upper"] is None and isinstance(i["lower"], float)
        assert i["monte_carlo"]["upper"] is None and len(i["monte_carlo"]["lower"]) == 2
    for band in lower["monte_carlo"]["intervals"]:
        assert band["upper_band"] is None and band["upper_sd"] is None and band["lower_sd"] > 0
    (bound,) = upper["intervals"]
    assert bound["side"] == "upper" and bound["lower"] is None and bound["level"] == 0.9
    # defaults.alternative is for the permutation-type tests: a bootstrap without its own key stays two-sided
    assert plain["alternative"] == "two-sided" and plain["intervals"][0]["side"] == "two-sided"
    assert plain["intervals"][0]["lower"] is not None and plain["intervals"][0]["upper"] is not None
    assert not any("intervals" in path for path in record["nonfinite"])  # an open end is not a lost number
    md = (folder / "report.md").read_text()
    html = (folder / "report.html").read_text()
    for text in (md, html):
        assert "BCa, one-sided lower 95% bound" in text and "normal, one-sided upper 90% bound" in text
        assert "percentile 95%" in text  # the two-sided interval keeps its wording
    assert "one-sided lower 95% confidence bounds" in record["methods_text"]
    # the index of runs names the pre-specified bound as a bound, with its one end
    index = (tmp_path / "runs" / "index.html").read_text()
    assert "BCa, one-sided lower 95% bound" in index and "BCa one-sided lower bound" in index
    import jsonschema

    from planrunner.record.schemas import record_schema

    jsonschema.validate(record, record_schema())


def test_not_estimable_resamples_keep_the_side_of_a_bound() -> None:
    # V-GEHAN: remission times in weeks (Freireich et al. 1963; as analysed by Gehan 1965), 6-MP and
    # placebo; the 6-MP median is not reached in some resamples (+inf), sorted beyond every finite one
    mp = np.column_stack([[6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35],
                          [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]]).astype(float)
    placebo = np.column_stack([[1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23],
                               [1] * 21]).astype(float)
    stat = get_statistic("km_median_difference")
    options = BootstrapOptions(resamples=1000, confidence=0.95, intervals=("percentile",), alternative="greater",
                               on_degenerate="percentile", null_value=0.0)
    r = bootstrap((mp, placebo), stat, options, stream=stream_for(2026, "km-bound"))
    assert "not_estimable" in r.details
    (bound,) = r.intervals
    ordered = np.sort(r.distribution)
    # the lower bound reads rank ⌈0.05·1000⌉ = 50 only; the open upper end does not care about +inf
    assert bound.side == "lower" and bound.upper == math.inf and bound.lower == ordered[49]
    assert r.null_test is not None and r.null_test.p_value is None and "not estimable" in (r.null_test.note or "")
