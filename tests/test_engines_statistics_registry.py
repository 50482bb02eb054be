"""The statistic registry: every statistic against a scipy/numpy reference or an exact value,
vectorised rows equal to one-at-a-time evaluation, parameters, analytic standard errors, and the
closed-form delete-one quantile against the plain jackknife."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats

from planrunner.engines import statistics as S
from planrunner.engines.jackknife import jackknife, jackknife_replicates
from planrunner.engines.statistics import STATISTICS, bind, get_statistic

# Source: E&T Table 2.1 (V-MOUSE-BOOT, published, confirmed)
TREATMENT = np.array([94, 197, 16, 38, 99, 141, 23], dtype=float)
CONTROL = np.array([52, 104, 146, 10, 51, 30, 40, 27, 46], dtype=float)
# Source: E&T Table 3.1 (V-LAW-JACK, published, confirmed): (LSAT, GPA)
LAW = np.array([[576, 3.39], [635, 3.30], [558, 2.81], [578, 3.03], [666, 3.44], [580, 3.07], [555, 3.00],
                [661, 3.43], [651, 3.36], [605, 3.13], [653, 3.12], [575, 2.74], [545, 2.76], [572, 2.88],
                [594, 2.96]])
# Source: V-TEA (Fisher 1935), table [[3, 1], [1, 3]] as two groups of 0/1 outcomes
TEA_MILK_FIRST = np.array([1, 1, 1, 0], dtype=float)
TEA_TEA_FIRST = np.array([1, 0, 0, 0], dtype=float)


def one(name: str, *args: np.ndarray, value: float | None = None) -> float:
    stat = bind(get_statistic(name), value)
    return float(stat.compute(*[a if a.ndim == 1 else a.T for a in args]))


def test_registry_lists_the_issue_statistics() -> None:
    wanted = {"mean", "median", "quantile", "trimmed_mean", "sd", "variance", "plugin_variance", "cv", "mad",
              "proportion", "ratio", "correlation", "spearman", "slope", "mean_difference", "median_difference",
              "quantile_difference", "ratio_of_means", "risk_difference", "risk_ratio", "odds_ratio",
              "hodges_lehmann"}
    assert wanted <= set(STATISTICS)


def test_one_group_statistics_against_references() -> None:
    x = TREATMENT
    assert one("quantile", x, value=0.9) == pytest.approx(np.quantile(x, 0.9), rel=1e-15)  # numpy reference
    assert one("trimmed_mean", x, value=0.2) == pytest.approx(stats.trim_mean(x, 0.2), rel=1e-15)  # scipy reference
    assert one("sd", x) == pytest.approx(np.std(x, ddof=1), rel=1e-15)
    assert one("variance", x) == pytest.approx(np.var(x, ddof=1), rel=1e-15)
    assert one("cv", x) == pytest.approx(stats.variation(x, ddof=1), rel=1e-14)  # scipy reference
    assert one("mad", x) == pytest.approx(stats.median_abs_deviation(x), rel=1e-15)  # scipy reference
    # Source: V-SPATIAL: θ̂ = plug-in variance of test A = 171.534023668639
    a = np.array([48, 36, 20, 29, 42, 42, 20, 42, 22, 41, 45, 14, 6, 0, 33, 28, 34, 4, 32, 24, 47, 41, 24,
                  26, 30, 41], dtype=float)
    assert one("plugin_variance", a) == pytest.approx(171.534023668639, rel=1e-12)


def test_two_column_statistics_against_references() -> None:
    assert one("spearman", LAW) == pytest.approx(stats.spearmanr(LAW[:, 0], LAW[:, 1]).statistic, rel=1e-12)
    fit = stats.linregress(LAW[:, 0], LAW[:, 1])  # scipy reference: GPA on LSAT
    assert one("slope", LAW) == pytest.approx(fit.slope, rel=1e-12)
    assert one("ratio", LAW) == pytest.approx(LAW[:, 1].mean() / LAW[:, 0].mean(), rel=1e-15)
    # Source: V-LAW-JACK r = 0.776374491289 (exact)
    assert one("correlation", LAW) == pytest.approx(0.776374491289407, rel=1e-12)


def test_two_group_statistics_against_references() -> None:
    x, y = TREATMENT, CONTROL
    assert one("quantile_difference", x, y, value=0.25) == pytest.approx(np.quantile(x, 0.25) - np.quantile(y, 0.25))
    assert one("ratio_of_means", x, y) == pytest.approx(x.mean() / y.mean(), rel=1e-15)
    hl = np.median(np.subtract.outer(x, y))  # definition: median of the 63 pairwise differences
    assert one("hodges_lehmann", x, y) == pytest.approx(hl, rel=1e-15)
    # Source: V-TEA: sample odds ratio 9 (exact); risks 3/4 and 1/4
    assert one("odds_ratio", TEA_MILK_FIRST, TEA_TEA_FIRST) == pytest.approx(9.0, rel=1e-15)
    assert one("risk_ratio", TEA_MILK_FIRST, TEA_TEA_FIRST) == pytest.approx(3.0, rel=1e-15)
    assert one("risk_difference", TEA_MILK_FIRST, TEA_TEA_FIRST) == pytest.approx(0.5, rel=1e-15)
    table = stats.contingency.odds_ratio([[3, 1], [1, 3]], kind="sample")  # scipy reference
    assert one("odds_ratio", TEA_MILK_FIRST, TEA_TEA_FIRST) == pytest.approx(table.statistic, rel=1e-12)


@pytest.mark.parametrize("name", sorted(n for n, s in STATISTICS.items() if s.form != "model"))  # models: own tests
def test_vectorised_rows_equal_one_at_a_time(name: str) -> None:
    stat = get_statistic(name)
    stat = bind(stat, {"quantile": 0.3, "trim": 0.15, "at": 9.0, "horizon": 10.0}.get(stat.parameter)) \
        if stat.parameter else stat
    rng = np.random.default_rng(sum(map(ord, name)))  # deterministic per name

    def draw(n: int) -> np.ndarray:
        if stat.outcome == "censored":  # (time, 0/1 event[, stratum]); the last time an event: S reaches 0
            a = np.stack([rng.normal(10, 2, (5, n)).round(1), (rng.random((5, n)) < 0.7).astype(float),
                          rng.integers(0, 2, (5, n)).astype(float)], axis=1)[:, :stat.columns]
            a[:, :2, -1] = [30.0, 1.0]
            return a
        if stat.outcome == "binary":
            return (rng.random((5, n)) < 0.5).astype(float) if stat.columns == 1 else rng.random((5, 2, n))
        return rng.normal(10, 2, (5, n)) if stat.columns == 1 else rng.normal(10, 2, (5, 2, n))

    groups = stat.samples or 3  # samples == 0: two or more groups (one-way F, rank H)
    sizes = (9, 9) if name == "signed_rank" else (9, 11, 7)  # signed ranks are of pair differences
    args = [draw(n) for n in sizes[:groups]]
    if stat.outcome == "binary":  # keep every row away from 0 and 1 proportions
        for a in args:
            a[:, :2] = [1.0, 0.0]
    rows = stat.compute(*args)
    assert rows.shape == (5,)
    for r in range(5):
        single = stat.compute(*[a[r] for a in args])
        assert float(single) == pytest.approx(float(rows[r]), rel=1e-12, abs=1e-12)


def test_hodges_lehmann_chunks_equal_one_pass(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(2)
    x, y = rng.normal(size=(40, 9)), rng.normal(size=(40, 7))
    whole = S._hodges_lehmann(x, y)
    monkeypatch.setattr(S, "HL_ELEMENTS", 70)  # one row per chunk
    assert np.array_equal(S._hodges_lehmann(x, y), whole)


def test_parameters_are_required_and_checked() -> None:
    with pytest.raises(ValueError, match="needs its 'quantile'"):
        bind(get_statistic("quantile"), None)
    with pytest.raises(ValueError, match=r"quantile must lie in \(0.0, 1.0\)"):
        bind(get_statistic("quantile"), 1.0)
    with pytest.raises(ValueError, match="takes no parameter"):
        bind(get_statistic("mean"), 0.5)
    assert bind(get_statistic("trimmed_mean"), 0.0).compute(TREATMENT) == pytest.approx(TREATMENT.mean())
    assert bind(get_statistic("quantile"), 0.9).label == "0.9 quantile"
    with pytest.raises(ValueError, match="bind"):
        get_statistic("quantile").compute(TREATMENT)


def test_analytic_standard_errors() -> None:
    x = TREATMENT
    n = x.size
    assert float(get_statistic("mean").se(x)) == pytest.approx(25.235489533, rel=1e-10)  # Source: V-MOUSE-BOOT
    # Source: V-MOUSE-PERM / identity 6: sqrt(s1²/n1 + s2²/n2) = 28.936067137
    assert float(get_statistic("mean_difference").se(x, CONTROL)) == pytest.approx(28.936067137, rel=1e-9)
    a = np.array([48, 36, 20, 29, 42, 42, 20, 42, 22, 41, 45, 14, 6, 0, 33, 28, 34, 4, 32, 24, 47, 41, 24,
                  26, 30, 41], dtype=float)
    # Source: V-SPATIAL: delta SE sqrt((m4 − m2²)/n) = 42.4529
    assert float(get_statistic("plugin_variance").se(a)) == pytest.approx(42.4529, abs=1e-4)
    plugin = float(get_statistic("plugin_variance").se(x))
    assert float(get_statistic("variance").se(x)) == pytest.approx(plugin * n / (n - 1))


@pytest.mark.parametrize("q", [0.05, 0.25, 0.5, 0.77, 0.9])
@pytest.mark.parametrize("n", [2, 3, 8, 15])
def test_delete_one_quantile_closed_form_equals_plain(q: float, n: int) -> None:
    x = np.random.default_rng(n).integers(0, 5, n).astype(float)  # ties on purpose
    stat = bind(get_statistic("quantile"), q)
    closed = jackknife_replicates([x], stat)[0]
    plain = jackknife_replicates([x], dataclasses.replace(stat, form=None))[0]
    assert np.array_equal(closed, plain)
    two = bind(get_statistic("quantile_difference"), q)
    y = np.arange(5.0)
    for g in range(2):
        assert np.array_equal(jackknife_replicates([x, y], two)[g],
                              jackknife_replicates([x, y], dataclasses.replace(two, form=None))[g])


def test_median_is_the_half_quantile_in_the_jackknife() -> None:
    # identity 5 (even n): bias_jack(median) = 0 and se = √(n−1)(x_(m+1) − x_(m))/2
    x = np.sort(np.append(TREATMENT, 60.0))
    r = jackknife([x], bind(get_statistic("quantile"), 0.5))
    assert r.bias == 0.0
    assert r.standard_error == pytest.approx(np.sqrt(7) * (x[4] - x[3]) / 2, rel=1e-12)
    assert "jackknife-non-smooth" in [w.code for w in r.warnings]


def test_quantile_jackknife_is_fast_for_a_million() -> None:
    """n = 1e6 through the closed form (a timing is not asserted; the generic path would need n² work)."""
    x = np.random.default_rng(0).normal(size=1_000_000)
    r = jackknife([x], bind(get_statistic("quantile"), 0.9))
    assert np.unique(r.replicates[0]).size <= 3
