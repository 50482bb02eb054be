"""True values of a statistic under a scenario's model (planrunner/simulate/truth.py) against
scipy.stats' own means and medians of each family (V-SIM-TRUTH), and the cases where none is defined."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from planrunner.pipeline.check import load_plan
from planrunner.simulate.scenarios import DatasetModel
from planrunner.simulate.truth import true_value

PLAN = """\
plan: truth
title: True values
seed: 1
datasets:
  d:
    file: d.csv
    columns:
      g: {type: category, levels: [a, b]}
      y: {type: number, min: 0}
      k: {type: integer, min: 0}
      x: {type: number}
    ROWS_WHERE
analyses:
  - {id: t, data: d, outcome: OUTCOME, groups: {by: g, compare: [a, b]}, statistic: STATISTIC,
     method: jackknife, role: primary}
"""


def scipy_law(family: str, p: dict):
    from scipy import stats

    return {"normal": lambda: stats.norm(p["mean"], p["sd"]),
            "lognormal": lambda: stats.lognorm(p["sdlog"], scale=math.exp(p["meanlog"])),
            "gamma": lambda: stats.gamma(p["shape"], scale=p["scale"]),
            "exponential": lambda: stats.expon(scale=p["mean"]),
            "weibull": lambda: stats.weibull_min(p["shape"], scale=p["scale"]),
            "bernoulli": lambda: stats.bernoulli(p["p"]),
            "binomial": lambda: stats.binom(p["size"], p["p"]),
            "poisson": lambda: stats.poisson(p["mean"])}[family]()


def setup(tmp_path: Path, statistic: str, outcome: str = "y", rows_where: str = ""):
    path = tmp_path / "plan.yaml"
    text = PLAN.replace("STATISTIC", statistic).replace("OUTCOME", outcome)
    path.write_text(text.replace("ROWS_WHERE", f'rows_where: "{rows_where}"' if rows_where else ""), encoding="utf-8")
    return load_plan(path)[0].plan


def model(column: str, family: dict, first: dict, **extra) -> dict:
    return {"d": DatasetModel.model_validate({
        "rows": {"groups": {"column": "g", "sizes": {"a": 10, "b": 30}}},
        "columns": {column: {"model": family, "by_group": {"a": first}, **extra}}})}


CASES = [
    ({"family": "normal", "mean": 5.0, "sd": 2.0}, {"mean": 6.5}),
    ({"family": "lognormal", "meanlog": 1.0, "sdlog": 0.7}, {"meanlog": 1.4}),
    ({"family": "gamma", "shape": 2.5, "scale": 3.0}, {"scale": 2.0}),
    ({"family": "exponential", "mean": 4.0}, {"mean": 6.0}),
    ({"family": "weibull", "shape": 1.3, "scale": 200.0}, {"scale": 150.0}),
]


@pytest.mark.parametrize(("family", "first"), CASES)
@pytest.mark.parametrize("statistic", ["mean_difference", "median_difference", "ratio_of_means"])
def test_differences_and_ratios_of_each_family_equal_scipy(tmp_path, family, first, statistic):
    plan = setup(tmp_path, statistic, outcome="x" if family["family"] == "normal" else "y")
    column = "x" if family["family"] == "normal" else "y"
    found = true_value(plan.analyses[0], plan, model(column, family, first))
    law_a, law_b = scipy_law(family["family"], {**family, **first}), scipy_law(family["family"], family)
    if statistic == "median_difference":
        expected = law_a.median() - law_b.median()  # scipy reference
    elif statistic == "ratio_of_means":
        expected = law_a.mean() / law_b.mean()  # scipy reference
    else:
        expected = law_a.mean() - law_b.mean()  # scipy reference
    assert found["value"] == pytest.approx(expected, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize(("family", "first"), [({"family": "binomial", "size": 12, "p": 0.3}, {"p": 0.5}),
                                               ({"family": "poisson", "mean": 3.0}, {"mean": 4.5})])
def test_discrete_means_equal_scipy_and_their_medians_are_not_defined(tmp_path, family, first):
    plan = setup(tmp_path, "mean_difference", outcome="k")
    found = true_value(plan.analyses[0], plan, model("k", family, first))
    expected = scipy_law(family["family"], {**family, **first}).mean() - scipy_law(family["family"], family).mean()
    assert found["value"] == pytest.approx(expected, rel=1e-12)  # scipy reference
    median = setup(tmp_path, "median_difference", outcome="k")
    assert true_value(median.analyses[0], median, model("k", family, first))["value"] is None


def test_a_filter_on_the_outcome_or_covariates_leave_the_true_value_undefined(tmp_path):
    lognormal = {"family": "lognormal", "meanlog": 1.0, "sdlog": 0.7}
    plan = setup(tmp_path, "mean_difference", rows_where="y * 2 < 100")
    found = true_value(plan.analyses[0], plan, model("y", lognormal, {"meanlog": 1.2}))
    assert found["value"] is None and "rows_where reads y" in found["reason"]
    plan = setup(tmp_path, "mean_difference", rows_where="x < 100")  # x has no model: independent of y
    assert true_value(plan.analyses[0], plan, model("y", lognormal, {"meanlog": 1.2}))["value"] is not None
    plan = setup(tmp_path, "mean_difference")
    with_covariate = {"d": DatasetModel.model_validate({
        "rows": {"groups": {"column": "g", "sizes": {"a": 10, "b": 30}}},
        "columns": {"x": {"model": {"family": "normal", "mean": 0.0, "sd": 1.0}},
                    "y": {"model": lognormal, "covariates": {"x": 0.1}}}})}
    assert "covariates" in true_value(plan.analyses[0], plan, with_covariate)["reason"]
    plan = setup(tmp_path, "hodges_lehmann")
    assert true_value(plan.analyses[0], plan, model("y", lognormal, {}))["value"] is None


@pytest.mark.parametrize(("family", "first"), CASES)
@pytest.mark.parametrize("rows_where", ["y < 7.5", "y >= 2.5"])
def test_a_filter_of_the_outcome_against_a_number_gives_the_truncated_law(tmp_path, family, first, rows_where):
    """The mean of the kept rows against scipy's numerical conditional expectation; the median is the
    point that halves the kept probability."""
    column = "x" if family["family"] == "normal" else "y"
    condition = rows_where.replace("y", column)
    plan = setup(tmp_path, "mean_difference", outcome=column, rows_where=condition)
    low, high = (-math.inf, 7.5) if "<" in rows_where else (2.5, math.inf)
    laws = [scipy_law(family["family"], {**family, **first}), scipy_law(family["family"], family)]
    found = true_value(plan.analyses[0], plan, model(column, family, first))
    expected = [law.expect(lambda v: v, lb=low, ub=high, conditional=True) for law in laws]  # scipy reference
    # quad (inside expect) works to about 1.5e-8 of each integral: abs 1e-7 on their difference
    assert found["value"] == pytest.approx(expected[0] - expected[1], rel=1e-7, abs=1e-7)
    assert "rows kept" in found["formula"]
    median = setup(tmp_path, "median_difference", outcome=column, rows_where=condition)
    found = true_value(median.analyses[0], median, model(column, family, first))
    halves = []
    for law in laws:
        def excess(m, law=law):
            return law.cdf(m) - (law.cdf(low) + law.cdf(high)) / 2.0
        from scipy import optimize
        halves.append(optimize.brentq(excess, -1e3, 1e4, xtol=1e-12))  # scipy reference
    assert found["value"] == pytest.approx(halves[0] - halves[1], rel=1e-8, abs=1e-9)


def designed(column: str, family: dict, first: dict, design: dict, **extra) -> dict:
    """A model of two groups of 20 rows, paired or clustered as `design` says."""
    return {"d": DatasetModel.model_validate({
        "rows": {"groups": {"column": "g", "sizes": {"a": 20, "b": 20}}, **design},
        "columns": {column: {"model": family, "by_group": {"a": first}, **extra}}})}


PAIRED = {"pairs": {"column": "x", "correlation": 0.6}}
CLUSTERED = {"clusters": {"column": "x", "count": 4, "icc": 0.3}}
DISCRETE = [({"family": "bernoulli", "p": 0.3}, {"p": 0.45}), ({"family": "binomial", "size": 12, "p": 0.3},
                                                               {"p": 0.5}),
            ({"family": "poisson", "mean": 3.0}, {"mean": 4.5})]


@pytest.mark.parametrize(("family", "first"), CASES + DISCRETE)
def test_pairs_keep_each_rows_law_so_the_true_values_are_the_familys(tmp_path, family, first):
    """Paired rows are correlated normal scores through each family's quantile function (generate.py),
    so each row keeps its family's law: a difference of means (and, continuous, of medians) is scipy's."""
    continuous = family["family"] not in ("bernoulli", "binomial", "poisson")
    column = "y" if continuous else "k"
    laws = [scipy_law(family["family"], {**family, **first}), scipy_law(family["family"], family)]
    for statistic, expected in [("mean_difference", laws[0].mean() - laws[1].mean()),  # scipy reference
                                ("median_difference", laws[0].median() - laws[1].median())]:  # scipy reference
        plan = setup(tmp_path, statistic, outcome=column)
        found = true_value(plan.analyses[0], plan, designed(column, family, first, PAIRED))
        if statistic == "median_difference" and not continuous:
            assert found["value"] is None and "discrete" in found["reason"]
            continue
        assert found["value"] == pytest.approx(expected, rel=1e-12, abs=1e-12)
        assert "pairs" in found["formula"]


@pytest.mark.parametrize(("family", "first"), [CASES[0], CASES[1], DISCRETE[0]])
def test_clusters_of_normal_lognormal_and_bernoulli_keep_each_rows_law(tmp_path, family, first):
    column = "y" if family["family"] != "bernoulli" else "k"
    laws = [scipy_law(family["family"], {**family, **first}), scipy_law(family["family"], family)]
    plan = setup(tmp_path, "mean_difference", outcome=column)
    found = true_value(plan.analyses[0], plan, designed(column, family, first, CLUSTERED))
    assert found["value"] == pytest.approx(laws[0].mean() - laws[1].mean(), rel=1e-12)  # scipy reference
    assert "clusters" in found["formula"]
    plan = setup(tmp_path, "ratio_of_means", outcome=column)
    found = true_value(plan.analyses[0], plan, designed(column, family, first, CLUSTERED, icc=0.1))
    assert found["value"] == pytest.approx(laws[0].mean() / laws[1].mean(), rel=1e-12)  # scipy reference
    if family["family"] != "bernoulli":
        plan = setup(tmp_path, "median_difference", outcome=column)
        found = true_value(plan.analyses[0], plan, designed(column, family, first, CLUSTERED))
        assert found["value"] == pytest.approx(laws[0].median() - laws[1].median(), rel=1e-12)  # scipy reference


def test_a_clustered_poisson_count_is_negative_binomial_with_the_same_mean(tmp_path):
    """The gamma–Poisson mixture of generate.py (rate multiplier Gamma(k, 1/k), k = mean·(1 − icc)/icc)
    gives each row scipy's nbinom(k, k/(k + mean)): its mean is the poisson mean; its median is
    discrete, so not used."""
    from scipy import stats

    icc = 0.3
    means = {"a": 4.5, "b": 3.0}
    laws = {g: stats.nbinom(m * (1 - icc) / icc, (m * (1 - icc) / icc) / (m * (1 - icc) / icc + m))
            for g, m in means.items()}
    assert laws["a"].mean() == pytest.approx(4.5, rel=1e-12)  # the construction keeps the mean
    family = {"family": "poisson", "mean": 3.0}
    plan = setup(tmp_path, "mean_difference", outcome="k")
    found = true_value(plan.analyses[0], plan, designed("k", family, {"mean": 4.5}, CLUSTERED))
    assert found["value"] == pytest.approx(laws["a"].mean() - laws["b"].mean(), rel=1e-12)  # scipy reference
    assert "negative binomial" in found["formula"]
    plan = setup(tmp_path, "median_difference", outcome="k")
    found = true_value(plan.analyses[0], plan, designed("k", family, {"mean": 4.5}, CLUSTERED))
    assert found["value"] is None and "negative binomial" in found["reason"]


def test_clustered_gamma_keeps_each_rows_law_and_binomial_rows_are_beta_binomial_with_the_same_mean(tmp_path):
    """Gamma: a shared Gamma(icc·shape) part plus the row's own Gamma((1 − icc)·shape) part is
    Gamma(shape) (a sum of independent gammas of one scale), so the means and medians are scipy's gamma
    ones. Binomial: each row is scipy's betabinom(size, a, b) with a = p(1 − icc)/icc, b = (1 − p)(1 − icc)/icc
    (Ridout, Demétrio & Firth 1999, Biometrics 55: icc = 1/(a + b + 1)), whose mean is size·p."""
    from scipy import stats

    gamma, first = CASES[2]
    laws = [scipy_law("gamma", {**gamma, **first}), scipy_law("gamma", gamma)]
    for statistic, expected in (("mean_difference", laws[0].mean() - laws[1].mean()),  # scipy reference
                                ("median_difference", laws[0].median() - laws[1].median())):  # scipy reference
        plan = setup(tmp_path, statistic, outcome="y")
        found = true_value(plan.analyses[0], plan, designed("y", gamma, first, CLUSTERED))
        assert found["value"] == pytest.approx(expected, rel=1e-12) and "shared gamma part" in found["formula"]
    icc, size = 0.3, 12
    a_b = {p: (p * (1 - icc) / icc, (1 - p) * (1 - icc) / icc) for p in (0.5, 0.3)}
    assert all(1 / (a + b + 1) == pytest.approx(icc, rel=1e-12) for a, b in a_b.values())  # the ICC identity
    laws = [stats.betabinom(size, *a_b[0.5]), stats.betabinom(size, *a_b[0.3])]
    plan = setup(tmp_path, "mean_difference", outcome="k")
    found = true_value(plan.analyses[0], plan, designed("k", *DISCRETE[1], CLUSTERED))
    assert found["value"] == pytest.approx(laws[0].mean() - laws[1].mean(), rel=1e-12)  # scipy reference
    assert "beta-binomial" in found["formula"]


FRAILTY = {"clusters": {"column": "x", "count": 4, "frailty": 0.4}}


def _frailty_law(family: dict, theta: float):
    """The marginal law of a time whose hazard is multiplied by Z ~ Gamma(1/θ, θ), by a route of its
    own: an exponential is Lomax(c = 1/θ, scale = mean/θ) (an exponential mixed over a gamma rate,
    scipy.stats.lomax); a Weibull's mean is scale·Γ(1 + 1/shape)·E[Z^(−1/shape)], the gamma moment
    E[Z^m] = θ^m Γ(1/θ + m)/Γ(1/θ), and its median solves E[exp(−Z·(m/scale)^shape)] = 1/2, the
    expectation taken by scipy.stats.gamma.expect (numerical integration)."""
    from scipy import optimize, special, stats

    if family["family"] == "exponential":
        law = stats.lomax(1 / theta, scale=family["mean"] / theta)
        return law.mean(), law.median()
    shape, scale = family["shape"], family["scale"]
    moment = theta ** (-1 / shape) * special.gamma(1 / theta - 1 / shape) / special.gamma(1 / theta)
    frailty = stats.gamma(1 / theta, scale=theta)

    def survival(m):
        return frailty.expect(lambda z: np.exp(-z * (m / scale) ** shape)) - 0.5

    return scale * special.gamma(1 + 1 / shape) * moment, optimize.brentq(survival, 1e-9 * scale, 1e3 * scale,
                                                                          xtol=1e-13)


@pytest.mark.parametrize(("family", "first"), [CASES[3], CASES[4]], ids=["exponential", "weibull"])
def test_a_gamma_frailty_gives_the_marginal_mean_and_median_of_the_mixture(tmp_path, family, first):
    theta = FRAILTY["clusters"]["frailty"]
    expected = [_frailty_law({**family, **first}, theta), _frailty_law(family, theta)]
    for k, statistic in enumerate(("mean_difference", "median_difference")):
        plan = setup(tmp_path, statistic, outcome="y")
        found = true_value(plan.analyses[0], plan, designed("y", family, first, FRAILTY))
        # the Weibull median by quad inside brentq: about 1e-8 relative
        assert found["value"] == pytest.approx(expected[0][k] - expected[1][k], rel=1e-7), statistic
        assert "gamma frailty" in found["formula"] and "θ = 0.4" in found["formula"]
    # a frailty variance at or above the shape leaves the mean infinite: not defined, with the reason
    plan = setup(tmp_path, "mean_difference", outcome="y")
    heavy = {"clusters": {"column": "x", "count": 4, "frailty": 1.5}}
    found = true_value(plan.analyses[0], plan, designed("y", family, first, heavy))
    assert found["value"] is None and "finite only when the variance is below its shape" in found["reason"]


PAIRED_PLAN = """\
plan: paired-truth
title: Paired coverage
seed: 3
datasets:
  d:
    file: d.csv
    columns:
      pair: {type: integer}
      g: {type: category, levels: [a, b]}
      y: {type: number}
analyses:
  - {id: t, data: d, outcome: y, groups: {by: g, compare: [a, b]}, pairs: pair, statistic: mean_difference,
     method: bootstrap, resamples: 399, intervals: [percentile], role: primary}
"""

PAIRED_SCENARIOS = """\
scenarios_for: paired-truth
title: Paired normal scenario
seed: 21
datasets:
  d:
    rows:
      groups: {column: g, sizes: {a: 60, b: 60}}
      pairs: {column: pair, correlation: 0.7}
    columns:
      y: {model: {family: normal, mean: 10.0, sd: 2.0}, by_group: {a: {mean: 10.5}}}
scenarios:
  - {name: shifted, replicates: 200}
"""


def test_coverage_of_a_paired_mean_difference_is_nominal(tmp_path):
    """V-SIM-TRUTH-PAIRED: the simulation reports the true value of a paired mean difference (0.5) and the
    percentile interval's coverage of it is within 4 Monte Carlo s.d. of 95% (V-TOL)."""
    from planrunner.simulate.simulation import simulate_plan

    (tmp_path / "plan.yaml").write_text(PAIRED_PLAN, encoding="utf-8")
    (tmp_path / "scenarios.yaml").write_text(PAIRED_SCENARIOS, encoding="utf-8")
    document = simulate_plan(tmp_path / "plan.yaml", tmp_path / "scenarios.yaml", out=tmp_path / "out").document
    found = document["scenarios"][0]["analyses"][0]
    assert found["true_value"]["value"] == pytest.approx(0.5, rel=1e-12)  # 10.5 − 10.0, the scenario's means
    assert found["failed"]["count"] == 0
    coverage = found["intervals"][0]["coverage"]
    assert coverage["of"] == 200
    assert abs(coverage["rate"] - 0.95) <= 4 * math.sqrt(0.95 * 0.05 / 200), coverage
    assert found["bias"] is not None and found["rmse"] is not None


def test_a_filter_of_a_time_under_a_gamma_frailty_truncates_its_lomax_law(tmp_path):
    """An exponential time under a gamma frailty is Lomax (scipy.stats.lomax): the mean of the rows kept
    by `y < 7.5` against scipy's numerical conditional expectation, the median against the point that
    halves the kept probability (lomax.ppf)."""
    from scipy import stats

    family, first = CASES[3]
    theta = FRAILTY["clusters"]["frailty"]
    laws = [stats.lomax(1 / theta, scale=m / theta) for m in (first["mean"], family["mean"])]
    expected = [law.expect(lambda v: v, ub=7.5, conditional=True) for law in laws]  # scipy reference
    plan = setup(tmp_path, "mean_difference", rows_where="y < 7.5")
    found = true_value(plan.analyses[0], plan, designed("y", family, first, FRAILTY))
    assert found["value"] == pytest.approx(expected[0] - expected[1], rel=1e-7, abs=1e-7)
    halves = [law.ppf(law.cdf(7.5) / 2) for law in laws]  # scipy reference
    plan = setup(tmp_path, "median_difference", rows_where="y < 7.5")
    found = true_value(plan.analyses[0], plan, designed("y", family, first, FRAILTY))
    assert found["value"] == pytest.approx(halves[0] - halves[1], rel=1e-10)
