"""Kaplan–Meier statistics and the log-rank statistic, against outside values (V-GEHAN, V-KM-REF).

References: scipy.stats.ecdf on scipy.stats.CensoredData and statsmodels' SurvfuncRight for the
curve (statsmodels reference, scipy reference), statsmodels' survdiff for the log-rank chi-square,
an independent step-function area for the RMST, exact rational arithmetic for the quantile rule,
and the published values of Gehan's 6-MP remission data (V-GEHAN).
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats
from statsmodels.duration.survfunc import SurvfuncRight, survdiff

from planrunner.engines import schemes, survival
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.jackknife import jackknife
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import bind, get_statistic
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError

# V-GEHAN: remission times in weeks (Freireich et al. 1963, Blood 21, 699–716; as analysed by
# Gehan 1965, Biometrika 52, 203–223), 0 = still in remission (censored)
MP_WEEKS = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
MP_RELAPSE = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]
PLACEBO_WEEKS = [1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23]
PLACEBO_RELAPSE = [1] * 21


def sample(times, events) -> np.ndarray:
    return np.column_stack([np.asarray(times, float), np.asarray(events, float)])


def value(name: str, *groups: np.ndarray, parameter: float | None = None) -> float:
    statistic = get_statistic(name)
    if statistic.parameter is not None:
        statistic = bind(statistic, parameter)
    return float(statistic.compute(*[np.ascontiguousarray(g.T) for g in groups]))


def random_censored(rng: np.random.Generator, n: int, ties: bool = True) -> np.ndarray:
    times = rng.integers(0, 15, n).astype(float) if ties else rng.exponential(10.0, n)
    return sample(times, rng.random(n) < 0.7)


def test_gehan_published_medians_and_logrank() -> None:
    mp, placebo = sample(MP_WEEKS, MP_RELAPSE), sample(PLACEBO_WEEKS, PLACEBO_RELAPSE)
    # V-GEHAN: medians 23 and 8 weeks, log-rank chi-square 16.79 (Kleinbaum & Klein, Survival Analysis,
    # ch. 2; from memory); the chi-square also against statsmodels' survdiff (statsmodels reference)
    assert value("km_median", mp) == 23.0
    assert value("km_median", placebo) == 8.0
    assert value("km_median_difference", mp, placebo) == 15.0
    zero = np.zeros((21, 1))
    z = value("logrank", np.hstack([mp, zero]), np.hstack([placebo, zero]))
    assert round(z ** 2, 2) == 16.79  # from memory (V-GEHAN)
    chisq, _ = survdiff(np.r_[MP_WEEKS, PLACEBO_WEEKS], np.r_[MP_RELAPSE, PLACEBO_RELAPSE], np.repeat([1, 2], 21))
    assert z ** 2 == pytest.approx(chisq, rel=1e-12)
    assert z < 0  # fewer relapses than expected on 6-MP


@pytest.mark.parametrize("seed", range(6))
def test_curve_equals_scipy_ecdf_and_statsmodels(seed: int) -> None:
    rng = np.random.default_rng(seed)
    data = random_censored(rng, 40, ties=seed % 2 == 0)
    times, events = data[:, 0], data[:, 1].astype(bool)
    found = survival.curve(times, events)
    # scipy reference: ecdf of right-censored data
    censored = stats.CensoredData.right_censored(times, ~events)
    sf = stats.ecdf(censored).sf
    assert np.allclose(found.survival, sf.evaluate(found.times), rtol=0, atol=1e-12)
    # statsmodels reference: the curve at its event times
    reference = SurvfuncRight(times, events.astype(int))
    mine = found.survival[np.searchsorted(found.times, reference.surv_times)]
    assert np.allclose(mine, reference.surv_prob, rtol=0, atol=1e-12)
    # survival_at reads the same curve
    for at in (0.5, 3.0, float(np.median(times))):
        assert value("survival_at", data, parameter=at) == pytest.approx(float(sf.evaluate(at)), abs=1e-12)


def test_quantile_rule_in_exact_arithmetic() -> None:
    # S(t) ≤ 1 − q judged exactly: a plateau at exactly 0.5 counts as reached (the README's rule)
    rng = np.random.default_rng(5)
    for _ in range(40):
        data = random_censored(rng, int(rng.integers(4, 16)))
        if not data[:, 1].any():
            continue
        for q in (0.25, 0.5, 0.75):
            exact = _exact_quantile(data, Fraction(q))
            assert value("km_quantile", data, parameter=q) == exact
    plateau = sample([1, 2, 3, 4], [1, 1, 0, 0])  # S = 3/4 after 1, then 3/4 · 2/3 = 1/2 exactly
    assert value("km_median", plateau) == 2.0
    # statsmodels reference: its quantile asks S < 1 − q, so this plateau never reaches its median
    assert math.isnan(SurvfuncRight(plateau[:, 0], plateau[:, 1]).quantile(0.5))


def _exact_quantile(data: np.ndarray, q: Fraction) -> float:
    surv = Fraction(1)
    for t in sorted(set(data[:, 0])):
        at_risk = int(np.sum(data[:, 0] >= t))
        deaths = int(np.sum((data[:, 0] == t) & (data[:, 1] == 1)))
        surv *= 1 - Fraction(deaths, at_risk)
        if surv <= 1 - q:
            return float(t)
    return math.inf


@pytest.mark.parametrize("seed", range(5))
def test_rmst_is_the_area_under_the_step_function(seed: int) -> None:
    rng = np.random.default_rng(100 + seed)
    data = random_censored(rng, 30, ties=seed % 2 == 1)
    horizon = float(np.quantile(data[:, 0], 0.7))
    found = survival.curve(data[:, 0], data[:, 1])
    # independently: the sum over the steps of S times the step's width, cut at the horizon
    area, last_t, last_s = 0.0, 0.0, 1.0
    for t, s in zip(found.times, found.survival):
        if t > horizon:
            break
        area += last_s * (t - last_t)
        last_t, last_s = t, s
    area += last_s * (horizon - last_t)
    assert value("rmst", data, parameter=horizon) == pytest.approx(area, rel=1e-12)
    other = random_censored(rng, 25)
    other[:, 0] = np.minimum(other[:, 0], horizon + 1.0)
    other[np.argmax(other[:, 0]), 0] = horizon + 1.0
    a, b = value("rmst", data, parameter=horizon), value("rmst", other, parameter=horizon)
    assert value("rmst_difference", data, other, parameter=horizon) == a - b
    assert value("rmst_ratio", data, other, parameter=horizon) == a / b


@pytest.mark.parametrize("seed", range(4))
def test_logrank_equals_survdiff_also_stratified(seed: int) -> None:
    rng = np.random.default_rng(200 + seed)
    x, y = random_censored(rng, 25), random_censored(rng, 30)
    sx, sy = rng.integers(0, 3, 25), rng.integers(0, 3, 30)
    times, events = np.r_[x[:, 0], y[:, 0]], np.r_[x[:, 1], y[:, 1]]
    group = np.repeat([1, 2], [25, 30])
    z = value("logrank", np.column_stack([x, np.zeros(25)]), np.column_stack([y, np.zeros(30)]))
    assert z ** 2 == pytest.approx(survdiff(times, events, group)[0], rel=1e-10)
    z = value("logrank", np.column_stack([x, sx]), np.column_stack([y, sy]))
    assert z ** 2 == pytest.approx(survdiff(times, events, group, strata=np.r_[sx, sy])[0], rel=1e-10)


def test_scaling_times_scales_the_statistics_and_keeps_the_logrank() -> None:
    rng = np.random.default_rng(9)
    x, y = random_censored(rng, 30, ties=False), random_censored(rng, 30, ties=False)
    for c in (2.0 ** -20, 1024.0, 2.0 ** 40):
        xs, ys = x * [c, 1], y * [c, 1]
        assert value("km_median", xs) == c * value("km_median", x)
        assert value("rmst", xs, parameter=5 * c) == pytest.approx(c * value("rmst", x, parameter=5), rel=1e-13)
        zero = np.zeros((30, 1))
        assert value("logrank", np.hstack([xs, zero]), np.hstack([ys, zero])) == value(
            "logrank", np.hstack([x, zero]), np.hstack([y, zero]))
    big = x * [1e300, 1]  # near the largest double: still finite, still exact for the median
    assert value("km_median", big) == 1e300 * value("km_median", x)


def boot(samples, name, *, B=400, parameter=None, **kw):
    statistic = get_statistic(name)
    if statistic.parameter is not None:
        statistic = bind(statistic, parameter)
    keys = {"intervals", "on_degenerate"}
    options = BootstrapOptions(resamples=B, confidence=0.9, **{k: v for k, v in kw.items() if k in keys}
                               | {"intervals": kw.get("intervals", ("percentile",))})
    rest = {k: v for k, v in kw.items() if k not in keys}
    return bootstrap(samples, statistic, options, stream=stream_for(11, "km"), **rest)


@pytest.mark.parametrize("name,parameter", [("km_median_difference", None), ("rmst_difference", 20.0),
                                            ("survival_difference", 10.0), ("km_mean_difference", None)])
def test_fast_path_equals_the_plain_gather_bit_for_bit(name: str, parameter: float | None) -> None:
    rng = np.random.default_rng(4)
    x, y = random_censored(rng, 60), random_censored(rng, 50)
    x[0] = (40.0, 1.0)
    y[0] = (40.0, 1.0)  # every curve reaches 0 at 40: RMST and survival defined in every resample
    statistic = get_statistic(name)
    if statistic.parameter is not None:
        statistic = bind(statistic, parameter)
    strata = (rng.integers(0, 3, 60), rng.integers(0, 3, 50))
    lay = schemes.layout((x, y), strata)
    stream = stream_for(3, "fast")
    fast, _ = schemes.draw_cells(lay, statistic, 300, stream, 5000, None)
    plain, _ = schemes.draw_cells(lay, statistic, 300, stream, 5000, None, fast=False)
    assert np.array_equal(fast, plain, equal_nan=True)
    # clusters of unequal size: multiplicities counted, or rows gathered one resample at a time
    codes = (rng.integers(0, 12, 60), rng.integers(12, 20, 50))
    clay = schemes.cluster_layout((x, y), codes, None)
    fast = schemes.draw_clusters((x, y), clay, statistic, 200, stream, 5000)
    plain = schemes.draw_clusters((x, y), clay, statistic, 200, stream, 5000, fast=False)
    assert np.array_equal(fast, plain, equal_nan=True)


def test_batch_size_never_changes_the_numbers() -> None:
    rng = np.random.default_rng(8)
    x, y = random_censored(rng, 40), random_censored(rng, 40)
    small = boot([x, y], "rmst_difference", parameter=8.0, batch_elements=1, on_degenerate="estimate-only")
    large = boot([x, y], "rmst_difference", parameter=8.0, batch_elements=10 ** 8, on_degenerate="estimate-only")
    assert np.array_equal(small.distribution, large.distribution, equal_nan=True)


def test_median_not_reached_in_some_resamples_is_counted_and_handled() -> None:
    mp, placebo = sample(MP_WEEKS, MP_RELAPSE), sample(PLACEBO_WEEKS, PLACEBO_RELAPSE)
    result = boot([mp, placebo], "km_median_difference", B=1000)
    share = result.details["not_estimable"]
    inf = int(np.isinf(result.distribution).sum())
    assert share["resamples"] == inf > 0 and share["share"] == inf / 1000
    assert result.intervals[0].lower is None and result.standard_error is None
    assert any(w.code == "not-estimable-resamples" and "not reached" in w.message for w in result.warnings)
    fallback = boot([mp, placebo], "km_median_difference", B=1000, on_degenerate="percentile")
    ordered = np.sort(fallback.distribution)  # not reached (+inf) sorts beyond every finite replicate
    assert np.array_equal(ordered, np.sort(result.distribution))
    lower, upper = ordered[49], ordered[949]  # ranks 50 and 950 of 1000 (levels 0.05 and 0.95)
    if np.isfinite(upper):
        assert (fallback.intervals[0].lower, fallback.intervals[0].upper) == (lower, upper)
    else:
        assert fallback.intervals[0].lower is None and "not-reached" in fallback.intervals[0].note
    one = boot([sample(PLACEBO_WEEKS, PLACEBO_RELAPSE)], "km_median", B=1000, on_degenerate="percentile")
    assert "not_estimable" not in one.details and one.intervals[0].lower is not None
    with pytest.raises(EngineError, match="not estimable in"):
        boot([mp, placebo], "km_median_difference", B=1000, on_degenerate="fail")


def test_jackknife_warns_for_quantiles_and_matches_deletion_by_hand() -> None:
    mp = sample(MP_WEEKS, MP_RELAPSE)
    statistic = bind(get_statistic("rmst"), 20.0)
    result = jackknife([mp], statistic)
    by_hand = [float(statistic.compute(np.delete(mp, i, axis=0).T)) for i in range(21)]
    assert np.array_equal(result.replicates[0], by_hand)
    median = jackknife([sample(PLACEBO_WEEKS, PLACEBO_RELAPSE)], get_statistic("km_median"))
    assert any(w.code == "jackknife-non-smooth" for w in median.warnings)


def test_logrank_permutation_exact_enumeration_and_monte_carlo() -> None:
    rng = np.random.default_rng(12)
    x, y = random_censored(rng, 7), random_censored(rng, 6)
    x3, y3 = np.column_stack([x, np.zeros(7)]), np.column_stack([y, np.zeros(6)])
    statistic = get_statistic("logrank")
    exact = permutation_test([x3, y3], statistic, PermutationOptions(resamples=9999, alternative="two-sided"),
                             stream=stream_for(1, "lr"))
    assert exact.computation == "enumeration" and exact.arrangements == math.comb(13, 7)
    # by hand: every choice of the first group's 7 rows among the 13, the same statistic
    pooled = np.vstack([x3, y3])
    values = []
    for chosen in __import__("itertools").combinations(range(13), 7):
        rest = [i for i in range(13) if i not in chosen]
        values.append(value("logrank", pooled[list(chosen)], pooled[rest]))
    values = np.array(values)
    t = value("logrank", x3, y3)
    tol = 1e-10 * max(abs(t), 1.0)
    p_greater = np.mean(values >= t - tol)
    p_less = np.mean(values <= t + tol)
    assert exact.p_value == pytest.approx(min(1.0, 2 * min(p_greater, p_less)), rel=1e-12)
    # Monte Carlo on the same data: within four binomial s.d. of the exact p-value (V-TOL)
    drawn = permutation_test([x3, y3], statistic, PermutationOptions(resamples=4000, alternative="two-sided",
                                                                      exact="never"), stream=stream_for(1, "lr"))
    assert drawn.computation != "enumeration"
    p_one = min(p_greater, p_less)
    assert abs(drawn.p_value - exact.p_value) <= 4 * 2 * math.sqrt(p_one * (1 - p_one) / 4000) + 2 / 4001


def test_left_censoring_is_the_flipped_right_censored_curve() -> None:
    rng = np.random.default_rng(31)
    x = rng.lognormal(0.0, 1.0, 40).round(2)
    detected = rng.random(40) < 0.7
    largest = float(x.max())
    statistic = survival.flipped(get_statistic("km_median"), largest)
    flipped_times = largest - x
    # scipy reference: the right-censored ecdf of M − x; the median of x is M minus its median
    sf = stats.ecdf(stats.CensoredData.right_censored(flipped_times, ~detected)).sf
    grid = np.unique(flipped_times)
    first = grid[np.argmax(sf.evaluate(grid) <= 0.5 + 1e-12)]
    assert float(statistic.compute(np.vstack([flipped_times, detected]))) == largest - first
    # with every value detected and an odd n, the flipped median is the sample median
    y = rng.normal(10.0, 2.0, 21)
    top = float(y.max())
    assert float(survival.flipped(get_statistic("km_median"), top).compute(np.vstack([top - y, np.ones(21)]))) \
        == pytest.approx(float(np.median(y)), abs=1e-12)
    # the Kaplan–Meier mean with every value detected is the sample mean
    mean = survival.flipped(get_statistic("km_mean"), top).compute(np.vstack([top - y, np.ones(21)]))
    assert float(mean) == pytest.approx(float(np.mean(y)), rel=1e-12)


PLAN = """
plan: remission
title: Remission times
seed: 2026
datasets:
  d:
    file: d.csv
    columns:
      arm: {type: category, levels: [mp, placebo]}
      weeks: {type: number}
      relapse: {type: integer}
      centre: {type: category}
analyses:
  - id: median
    data: d
    outcome: weeks
    event: relapse
    groups: {by: arm, compare: [mp, placebo]}
    statistic: km_median_difference
    method: bootstrap
    resamples: 999
    intervals: [percentile]
    on_degenerate: percentile
  - id: rmst
    role: secondary
    data: d
    outcome: weeks
    event: relapse
    groups: {by: arm, compare: [mp, placebo]}
    strata: centre
    statistic: rmst_difference
    horizon: 20
    method: bootstrap
    resamples: 999
  - id: logrank
    role: secondary
    data: d
    outcome: weeks
    event: relapse
    groups: {by: arm, compare: [mp, placebo]}
    statistic: logrank
    method: permutation
    resamples: 999
  - id: logrank-by-centre
    role: secondary
    data: d
    outcome: weeks
    event: relapse
    groups: {by: arm, compare: [mp, placebo]}
    strata: centre
    statistic: logrank
    method: permutation
    resamples: 999
  - id: jack
    role: secondary
    data: d
    outcome: weeks
    event: relapse
    groups: {by: arm, compare: [mp, placebo]}
    statistic: rmst_difference
    horizon: 20
    method: jackknife
"""


def test_plan_runs_end_to_end(write_plan, tmp_path) -> None:
    from conftest import fixed_clock

    from planrunner.pipeline.run import run_plan

    centre = ["north", "south"] * 21
    rows = ["arm,weeks,relapse,centre"] + [
        f"{arm},{t},{e},{centre[i]}" for i, (arm, t, e) in enumerate(
            [("mp", t, e) for t, e in zip(MP_WEEKS, MP_RELAPSE)]
            + [("placebo", t, e) for t, e in zip(PLACEBO_WEEKS, PLACEBO_RELAPSE)])]
    plan = write_plan(PLAN, {"d.csv": "\n".join(rows) + "\n"})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    entries = {a["id"]: a for a in record["analyses"]}
    assert entries["median"]["estimate"] == 15.0  # V-GEHAN: 23 − 8 weeks
    share = entries["median"]["details"]["not_estimable"]
    assert 0 < share["share"] < 1 and share["quantile_not_reached"] == share["resamples"]
    chisq, _ = survdiff(np.r_[MP_WEEKS, PLACEBO_WEEKS], np.r_[MP_RELAPSE, PLACEBO_RELAPSE], np.repeat([1, 2], 21))
    assert entries["logrank"]["estimate"] ** 2 == pytest.approx(chisq, rel=1e-12)  # statsmodels reference
    stratified, _ = survdiff(np.r_[MP_WEEKS, PLACEBO_WEEKS], np.r_[MP_RELAPSE, PLACEBO_RELAPSE],
                             np.repeat([1, 2], 21), strata=np.array(centre))
    assert entries["logrank-by-centre"]["estimate"] ** 2 == pytest.approx(stratified, rel=1e-12)
    assert entries["logrank"]["p_value"] < 0.01
    area = value("rmst_difference", sample(MP_WEEKS, MP_RELAPSE), sample(PLACEBO_WEEKS, PLACEBO_RELAPSE),
                 parameter=20.0)
    assert entries["rmst"]["estimate"] == entries["jack"]["estimate"] == pytest.approx(area, rel=1e-15)
    assert entries["rmst"]["intervals"][0]["lower"] < area < entries["rmst"]["intervals"][0]["upper"]
    text = record["methods_text"]
    assert "The outcome weeks was right-censored; survival was estimated by Kaplan–Meier" in text
    assert f"In {share['resamples']} of 999 resamples ({share['share'] * 100:.1f}%) the statistic was not " \
           "estimable" in text and "on_degenerate: percentile declares" in text


def test_flipped_statistics_travel_to_workers_with_their_limit() -> None:
    import pickle

    import planrunner.execute.executors  # noqa: F401  (registers how statistics pickle)

    flipped = survival.flipped(bind(get_statistic("km_quantile"), 0.25), 12.5)
    back = pickle.loads(pickle.dumps(flipped))
    assert back.compute.spec == flipped.compute.spec and back.compute.spec.flip == 12.5
    plain = bind(get_statistic("km_quantile"), 0.25)
    assert pickle.loads(pickle.dumps(plain)).compute.spec.flip is None


def test_record_holds_the_curves_and_the_report_draws_them(write_plan, tmp_path) -> None:
    from conftest import fixed_clock

    from planrunner.pipeline.run import run_plan
    from planrunner.report.kmplot import curve_plot

    rows = ["arm,weeks,relapse,centre"] + [f"mp,{t},{e},x" for t, e in zip(MP_WEEKS, MP_RELAPSE)] + [
        f"placebo,{t},{e},x" for t, e in zip(PLACEBO_WEEKS, PLACEBO_RELAPSE)]
    plan = write_plan(PLAN, {"d.csv": "\n".join(rows) + "\n"})
    outcome = run_plan(plan, out=tmp_path / "out", clock=fixed_clock)
    entry = {a["id"]: a for a in outcome.record["analyses"]}["logrank"]
    km = entry["details"]["kaplan_meier"]
    assert km["censoring"] == "right" and [g["group"] for g in km["groups"]] == ["mp", "placebo"]
    mp = km["groups"][0]
    reference = SurvfuncRight(MP_WEEKS, MP_RELAPSE)  # statsmodels reference
    stored = {p[0]: p[1] for p in mp["points"]}
    assert np.allclose([stored[t] for t in reference.surv_times], reference.surv_prob, rtol=0, atol=1e-12)
    assert (mp["events"], mp["censored"], mp["n"]) == (9, 12, 21)
    plot = curve_plot(entry)
    assert plot is not None and plot.name == "logrank-kaplan-meier" and "12 censored" in plot.alt
    assert curve_plot(entry).svg == plot.svg  # the same record gives the same bytes
    # the drawn steps: every drop of the first group's line, read back through the axes' tick labels,
    # is at an event time with the height of statsmodels' survival there (to the 2-decimal coordinates)
    from svg_reading import ROUNDING, linear, marks, parse, path_points, tick_maps

    root = parse(plot.svg)
    x_map, y_map = (linear(pairs) for pairs in tick_maps(root))
    [line] = marks(root, "curve-0")
    corners = path_points(line.get("d"))
    drops = [(x, y) for (x, y0), (x1, y) in zip(corners, corners[1:]) if x == x1 and y != y0]
    assert len(drops) == len(reference.surv_times)
    for (x, y), t, s in zip(drops, reference.surv_times, reference.surv_prob):
        assert x == pytest.approx(x_map(t), abs=4 * ROUNDING) and y == pytest.approx(y_map(s), abs=4 * ROUNDING)
    folder = outcome.folder if hasattr(outcome, "folder") else next((tmp_path / "out").glob("remission-*"))
    assert (folder / "figures" / "logrank-kaplan-meier.svg").exists()
    assert "logrank-kaplan-meier" in (folder / "report.md").read_text(encoding="utf-8")


def test_left_censored_plan_reports_on_the_concentration_scale(write_plan, tmp_path) -> None:
    from conftest import fixed_clock

    from planrunner.pipeline.run import run_plan

    text = """
plan: wells
title: Nitrate below detection limits
seed: 5
datasets:
  d:
    file: d.csv
    columns:
      well: {type: category, levels: [east, west]}
      nitrate: {type: number, unit: mg/L}
      detected: {type: integer}
analyses:
  - id: median
    data: d
    outcome: nitrate
    event: detected
    censoring: left
    groups: {by: well, compare: [east, west]}
    statistic: km_median_difference
    method: bootstrap
    resamples: 500
    intervals: [percentile]
"""
    east = [(0.5, 0), (0.5, 0), (0.8, 1), (1.1, 1), (1.4, 1), (1.0, 0), (2.2, 1), (2.9, 1), (3.5, 1), (0.5, 0),
            (4.0, 1)]
    west = [(0.5, 0), (0.5, 0), (0.5, 0), (0.6, 1), (0.7, 1), (1.0, 0), (0.9, 1), (1.2, 1), (1.9, 1), (2.4, 1)]
    rows = ["well,nitrate,detected"] + [f"east,{x},{d}" for x, d in east] + [f"west,{x},{d}" for x, d in west]
    plan = write_plan(text, {"d.csv": "\n".join(rows) + "\n"})
    entry = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record["analyses"][0]
    largest = 4.0
    medians = []
    for data in (east, west):  # scipy reference on the flipped scale (V-KM-REF)
        x = np.array([v for v, _ in data])
        d = np.array([e for _, e in data], dtype=bool)
        t = largest - x
        sf = stats.ecdf(stats.CensoredData.right_censored(t, ~d)).sf
        grid = np.unique(t)
        medians.append(largest - grid[np.argmax(sf.evaluate(grid) <= 0.5 + 1e-12)])
    assert entry["estimate"] == pytest.approx(medians[0] - medians[1], abs=1e-12)
    km = entry["details"]["kaplan_meier"]
    assert km["censoring"] == "left" and km["flipped_at"] == largest
    values = [p[0] for p in km["groups"][0]["points"]]
    assert values == sorted(values) and values[-1] == largest and km["groups"][0]["points"][-1][1] == 1.0


def test_shifting_times_shifts_quantiles_and_keeps_the_logrank() -> None:
    # the curve depends on the order of the times only: a quantile moves with a shift, the log-rank
    # statistic does not move (shifts by powers of two keep every time exact)
    rng = np.random.default_rng(17)
    x, y = random_censored(rng, 25), random_censored(rng, 25)
    zero = np.zeros((25, 1))
    for c in (0.5, 1024.0, 2.0 ** 40):
        xs, ys = x + [c, 0], y + [c, 0]
        assert value("km_median", xs) == value("km_median", x) + c
        assert value("km_quantile", xs, parameter=0.25) == value("km_quantile", x, parameter=0.25) + c
        assert value("logrank", np.hstack([xs, zero]), np.hstack([ys, zero])) == value(
            "logrank", np.hstack([x, zero]), np.hstack([y, zero]))
    # integer times at the edge of exact doubles (2^53) keep their order and their median
    edge = np.column_stack([2.0 ** 53 - np.arange(10.0)[::-1] * 2, np.ones(10)])
    assert value("km_median", edge) == 2.0 ** 53 - 10


def test_undefined_jackknife_makes_bca_undefined_not_an_error() -> None:
    import dataclasses

    # a statistic finite on every resample of n rows but not on n − 1 rows: the BCa acceleration
    # cannot be formed, which is a note on the BCa interval, never a failed analysis
    def only_full(x: np.ndarray) -> np.ndarray:
        return np.mean(x, axis=-1) if x.shape[-1] == 12 else np.full(x.shape[:-1], np.inf)

    statistic = dataclasses.replace(get_statistic("mean"), compute=only_full, form=None, se=None)
    x = np.random.default_rng(3).normal(size=12)
    result = bootstrap([x], statistic, BootstrapOptions(resamples=200, confidence=0.9,
                                                         intervals=("percentile", "bca")),
                       stream=stream_for(2, "bca"))
    percentile, bca = result.intervals
    assert percentile.lower is not None and bca.lower is None
    assert any(w.code == "bca-undefined" and "jackknife acceleration is undefined" in w.message
               for w in result.warnings)


def test_permutation_refusal_of_a_censored_statistic_points_to_logrank() -> None:
    x = sample([1, 2, 3, 4, 5, 6], [1, 1, 1, 1, 1, 1])
    y = sample([1, 2, 3, 4, 9, 9, 9, 9], [1, 1, 1, 1, 0, 0, 0, 0])  # median 4, reached exactly at S = 1/2
    with pytest.raises(EngineError) as caught:
        permutation_test([x, y], get_statistic("km_median_difference"),
                         PermutationOptions(resamples=999, alternative="two-sided"), stream=stream_for(1, "p"))
    assert "not reached" in caught.value.message and "logrank" in (caught.value.hint or "")


@pytest.mark.parametrize("name, design", [("km_median_difference", "strata"), ("rmst_difference", "clusters"),
                                          ("logrank", "permutation")])
def test_split_ranges_give_the_same_bits(name: str, design: str) -> None:
    from planrunner.engines.blocks import mapping_ranges, resample_ranges

    def out_of_order(task, total):  # three ranges, computed last-first, as a worker pool might
        ranges = resample_ranges(total, 3)
        return [task(a, b) for a, b in reversed(ranges)][::-1]

    rng = np.random.default_rng(77)
    x, y = random_censored(rng, 80), random_censored(rng, 70)
    x[0], y[0] = (40.0, 1.0), (40.0, 1.0)
    statistic = get_statistic(name)
    if statistic.parameter is not None:
        statistic = bind(statistic, 10.0)
    if design == "permutation":
        groups = (np.column_stack([x, np.zeros(80)]), np.column_stack([y, np.zeros(70)]))

        def run():
            return permutation_test(groups, statistic, PermutationOptions(resamples=1234, alternative="two-sided"),
                                    stream=stream_for(8, name)).null.tobytes()
    else:
        extra = ({"strata": (rng.integers(0, 3, 80), rng.integers(0, 3, 70))} if design == "strata"
                 else {"clusters": (rng.integers(0, 20, 80), rng.integers(20, 40, 70))})

        def run():
            return boot([x, y], name, B=1234, parameter=10.0, **extra).distribution.tobytes()
    whole = run()
    with mapping_ranges(out_of_order):
        split = run()
    assert split == whole
