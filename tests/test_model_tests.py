"""Model statistics: the p-value of a null value (imposed, or by inverting the interval), one-sided
bounds, resamples to a precision and decision rules, against statsmodels loops on data shipped in
statsmodels and stated identities (V-MODEL-WCB-NULL, V-MODEL-BOUNDS)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import fixed_clock
from test_models import _heteroskedastic, design, grunfeld, options, spector

from planrunner.engines.modelboot import model_bootstrap
from planrunner.engines.models import robust_covariance
from planrunner.engines.precision import BootstrapPrecision
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError, PlanError
from planrunner.pipeline.run import run_plan
from planrunner.plan.load import read_plan


def test_the_imposed_null_at_a_stated_value_equals_a_loop_over_every_sign_vector():
    # V-MODEL-WCB-NULL: 6 firms of statsmodels' grunfeld data; H0: the coefficient of value is 0.1.
    # The restricted fit regresses invest − 0.1·value on [1, capital]; each of the 2^6 Rademacher sign
    # vectors is refitted by statsmodels OLS (cov_type='cluster'), t* = (b* − 0.1)/se*; the p-values
    # are the shares of |t*| >= |t|, t* >= t and t* <= t (Cameron, Gelbach & Miller 2008; one-sided
    # shares as README states)
    invest, value, capital, firm = grunfeld(firms=6)
    d = design(invest, value, capital, clusters=firm)
    null = 0.1
    full = sm.OLS(invest, d.x).fit(cov_type="cluster", cov_kwds={"groups": firm})
    restricted = sm.OLS(invest - null * value, d.x[:, [0, 2]]).fit()
    t = (full.params[1] - null) / full.bse[1]
    t_star = []
    for number in range(64):
        signs = np.array([1.0 if (number >> g) & 1 else -1.0 for g in range(6)])
        y_star = restricted.fittedvalues + null * value + restricted.resid * signs[firm]
        refit = sm.OLS(y_star, d.x).fit(cov_type="cluster", cov_kwds={"groups": firm})
        t_star.append((refit.params[1] - null) / refit.bse[1])
    t_star = np.array(t_star)
    tol = 1e-10 * max(abs(t), 1)
    expected = {"two-sided": np.mean(np.abs(t_star) >= abs(t) - tol), "greater": np.mean(t_star >= t - tol),
                "less": np.mean(t_star <= t + tol)}
    assert 0 < expected["greater"] < 1 and 0 < expected["less"] < 1  # the case exercises both tails
    for alternative, share in expected.items():
        result = model_bootstrap(d, "coefficient", options(model_resampling="wild-cluster", impose_null=True,
                                                           null_value=null, alternative=alternative),
                                 stream=stream_for(5, "wcb"))
        assert result.exact and result.p_value == pytest.approx(share, abs=1e-15), alternative
        assert result.null_test.p_greater == pytest.approx(expected["greater"], abs=1e-15)
        assert result.null_test.p_less == pytest.approx(expected["less"], abs=1e-15)
        assert result.details["t"] == pytest.approx(t, rel=1e-10)
        assert all(i.lower is None and i.note for i in result.intervals)


def test_monte_carlo_imposed_null_p_value_counts_plus_one():
    # Monte Carlo p = (1 + count)/(B + 1) with its Clopper-Pearson interval; Mammen weights are drawn
    invest, value, capital, firm = grunfeld(firms=8)
    d = design(invest, value, capital, clusters=firm)
    result = model_bootstrap(d, "coefficient", options(model_resampling="wild-cluster", weights="mammen",
                                                       impose_null=True, resamples=399, alternative="greater"),
                             stream=stream_for(5, "mammen"))
    count = result.details["count_greater_equal"]
    assert not result.exact
    assert result.p_value == pytest.approx((1 + count) / 400, abs=1e-15)
    low, high = result.null_test.monte_carlo_interval
    assert low <= count / 399 <= high


def test_one_sided_bound_is_the_end_of_the_two_sided_interval_at_2c_minus_1():
    # identity (README, One-sided bootstrap bounds): a one-sided bound at confidence c is the same end
    # of the two-sided interval at 2c − 1 read from the same replicates, for every method
    y, group, covariate = _heteroskedastic(200, 11)
    d = design(y, group, covariate, cells=group.astype(np.intp))
    methods = ("percentile", "basic", "normal", "studentized", "bca")
    two = model_bootstrap(d, "adjusted_mean_difference", options(intervals=methods, confidence=0.90,
                                                                 resamples=400), stream=stream_for(2, "b"))
    lower = model_bootstrap(d, "adjusted_mean_difference", options(intervals=methods, confidence=0.95,
                                                                   alternative="greater", resamples=400),
                            stream=stream_for(2, "b"))
    upper = model_bootstrap(d, "adjusted_mean_difference", options(intervals=methods, confidence=0.95,
                                                                   alternative="less", resamples=400),
                            stream=stream_for(2, "b"))
    for t, lo, up in zip(two.intervals, lower.intervals, upper.intervals):
        assert lo.side == "lower" and up.side == "upper"
        assert lo.lower == pytest.approx(t.lower, rel=1e-12), t.method
        assert up.upper == pytest.approx(t.upper, rel=1e-12), t.method


def test_null_value_without_imposing_it_inverts_the_prespecified_interval():
    # README, Bootstrap p-values of a null value: percentile p_greater = share of replicates <= V,
    # p_less = share >= V; two-sided min(1, 2 min)
    y, group, covariate = _heteroskedastic(150, 12)
    d = design(y, group, covariate)
    null = 0.3
    result = model_bootstrap(d, "adjusted_mean_difference", options(resamples=500, null_value=null),
                             stream=stream_for(4, "inv"))
    share_le = np.mean(result.distribution <= null)
    share_ge = np.mean(result.distribution >= null)
    assert result.null_test.p_greater == pytest.approx(share_le, abs=1e-15)
    assert result.null_test.p_less == pytest.approx(share_ge, abs=1e-15)
    assert result.p_value == pytest.approx(min(1.0, 2 * min(share_le, share_ge)), abs=1e-15)


def test_precision_runs_the_fixed_b_bootstrap_of_the_rule():
    # Andrews & Buchinsky (2000): B = (κ − 1)/(4r²) from a first stage of 1/(2r²), rounded up to whole
    # blocks of 1000; the result equals the fixed-B run with that B (the same stream)
    y, group, covariate = _heteroskedastic(150, 13)
    d = design(y, group, covariate)
    target = BootstrapPrecision(max_resamples=20000, se_relative=0.02)
    result = model_bootstrap(d, "adjusted_mean_difference", options(model_resampling="wild", precision=target),
                             stream=stream_for(4, "prec"))
    first = model_bootstrap(d, "adjusted_mean_difference", options(model_resampling="wild", resamples=2000),
                            stream=stream_for(4, "prec"))
    centred = first.distribution - first.distribution.mean()
    kurtosis = np.mean(centred ** 4) / np.mean(centred ** 2) ** 2
    wanted = max(2000, int(np.ceil((kurtosis - 1) / (4 * 0.02 ** 2) / 1000)) * 1000)
    assert result.resamples == wanted
    fixed = model_bootstrap(d, "adjusted_mean_difference", options(model_resampling="wild", resamples=wanted),
                            stream=stream_for(4, "prec"))
    assert np.array_equal(result.distribution, fixed.distribution)
    assert result.precision.resamples_used == wanted


def test_precision_is_refused_where_the_sign_vectors_are_enumerated():
    invest, value, capital, firm = grunfeld(firms=6)
    d = design(invest, value, capital, clusters=firm)
    with pytest.raises(EngineError, match="enumerates all 2\\^6 sign vectors exactly"):
        model_bootstrap(d, "coefficient", options(model_resampling="wild-cluster",
                                                  precision=BootstrapPrecision(max_resamples=5000, se_relative=0.05)),
                        stream=stream_for(1, "p"))


# ------------------------------------------------------------------ from a plan file


PLAN = """
plan: model-tests
title: Model statistics with a null value, bounds and a decision
seed: 5
datasets:
  d:
    file: d.csv
    columns:
      arm: {{type: category, levels: [new, old]}}
      base: {{type: number}}
      site: {{type: category}}
      y: {{type: number}}
analyses:
{analyses}
"""


ADJUSTED = """    data: d
    outcome: y
    groups: {by: arm, compare: [new, old]}
    statistic: adjusted_mean_difference
    covariates: [base]
"""


def adjusted(analyses: str) -> str:
    """The analyses with each {adjusted} replaced by the adjusted mean difference's common keys."""
    return analyses.replace("{adjusted}", ADJUSTED)


def _data(n: int = 120) -> str:
    """Invented data: eight sites, the first four on the new arm (a cluster lies within one arm)."""
    rng = np.random.default_rng(14)
    site = np.arange(n) % 8
    group = (site < 4).astype(float)
    base = rng.normal(size=n)
    y = 1 + 0.3 * group + base + rng.normal(size=n) + 0.3 * rng.normal(size=8)[site]
    return "arm,base,site,y\n" + "".join(
        f"{'new' if g else 'old'},{float(c)!r},s{k},{float(v)!r}\n" for k, g, c, v in zip(site, group, base, y))


def test_a_plan_with_bounds_a_null_value_an_imposed_null_and_a_margin(write_plan, tmp_path, capsys):
    plan = write_plan(PLAN.format(analyses=adjusted("""
  - id: ni
{adjusted}    method: bootstrap
    resamples: 999
    intervals: [studentized, percentile]
    alternative: greater
    null_value: -0.5
    decision: {rule: non-inferiority, margin: -0.5}
  - id: wcb
    role: secondary
{adjusted}    clusters: site
    method: bootstrap
    model_resampling: wild-cluster
    impose_null: true
    null_value: 0.2
    alternative: less
  - id: prec
    role: secondary
{adjusted}    method: bootstrap
    model_resampling: wild
    intervals: [percentile]
    precision: {interval_end_sd: 0.02, max_resamples: 5000}
multiplicity:
  - family: [ni, wcb]
    method: holm
""")), {"d.csv": _data()})
    record = run_plan(plan, out=tmp_path / "runs", clock=fixed_clock).record
    entries = {a["id"]: a for a in record["analyses"]}
    ni, wcb, prec = entries["ni"], entries["wcb"], entries["prec"]
    assert ni["intervals"][0]["side"] == "lower" and ni["intervals"][0]["upper"] is None
    assert ni["details"]["null_test"]["interval_inverted"] == "studentized"
    assert ni["decision"]["verdict"] in ("met", "not met", "unresolved")
    # the non-inferiority comparison reads the lower bound against the margin
    assert ni["decision"]["compared"]["value"] == pytest.approx(ni["intervals"][0]["lower"])
    assert wcb["exact"] and wcb["p_value"] is not None
    assert wcb["details"]["null_test"]["interval_inverted"] is None
    assert wcb["details"]["imposed_null"]["null_value"] == 0.2
    assert wcb["details"]["null_test"]["p_less"] == wcb["p_value"]
    assert prec["precision"]["resamples_used"] == prec["resamples"]
    assert record["multiplicity"][0]["method"] == "holm"
    text = (tmp_path / "runs").rglob("report.md").__next__().read_text(encoding="utf-8")
    assert "bootstrap-t with the null value 0.2 imposed" in text
    methods = json.dumps(record["methods"]) if "methods" in record else text
    assert "with the null imposed" in methods


@pytest.mark.parametrize(("extra", "message"), [
    ("    model_resampling: wild-cluster\n    clusters: site\n    impose_null: true\n    intervals: [percentile]\n"
     "    decision: {rule: above-limit, limit: 0}\n", "with impose_null the replicates are drawn under the null"),
    ("    model_resampling: wild-cluster\n    clusters: site\n    impose_null: true\n"
     "    precision: {interval_end_sd: 0.1, max_resamples: 5000}\n", "no interval whose ends a precision"),
])
def test_what_a_model_test_cannot_read_is_refused_where_it_is_written(write_plan, extra, message):
    plan = write_plan(PLAN.format(analyses=adjusted("""
  - id: a
{adjusted}    method: bootstrap
""" + extra)), {"d.csv": _data()})
    with pytest.raises(PlanError, match=message) as caught:
        read_plan(plan)
    assert "plan.yaml:" in str(caught.value)


def test_check_refuses_precision_on_enumerated_sign_vectors_as_run_does(write_plan, tmp_path):
    from planrunner.api.session import check as check_plan
    plan = write_plan(PLAN.format(analyses=adjusted("""
  - id: a
{adjusted}    clusters: site
    method: bootstrap
    model_resampling: wild-cluster
    intervals: [percentile]
    precision: {se_relative: 0.05, max_resamples: 5000}
""")), {"d.csv": _data()})
    with pytest.raises(Exception, match="enumerates all 2\\^8 sign vectors") as checked:
        check_plan(plan)
    with pytest.raises(Exception, match="enumerates all 2\\^8 sign vectors") as ran:
        run_plan(plan, out=tmp_path / "r", clock=fixed_clock)
    assert "analysis 'a'" in str(checked.value) and "analysis 'a'" in str(ran.value)


# ------------------------------------------------------------------ studentized logistic statistics


def fair(every: int = 4) -> tuple[np.ndarray, ...]:
    """statsmodels.datasets.fair (Fair 1978, shipped in statsmodels; its rows are sorted by affairs), every
    `every`-th row: any affair (0/1), children > 0 (0/1), age, years married, occupation (1–6, the clusters)."""
    d = sm.datasets.fair.load_pandas().data.iloc[::every]
    occupation = d["occupation"].to_numpy(int)
    return ((d["affairs"] > 0).to_numpy(float), (d["children"] > 0).to_numpy(float), d["age"].to_numpy(float),
            d["yrs_married"].to_numpy(float), np.unique(occupation, return_inverse=True)[1].astype(np.intp))


def _prepared(d, statistic: str, **kw):
    from planrunner.engines.modelboot import _prepare
    return _prepare(d, statistic, options(model="logistic", intervals=("studentized",), **kw), "test")


def test_logistic_coefficient_se_equals_statsmodels_hc1_and_cluster():
    # V-MODEL-GLM-SE; Source: statsmodels GLM(Binomial) with cov_type='HC0' and cov_type='cluster'
    # (groups: occupation) on statsmodels.datasets.fair (reference functions). planrunner's HC1 is
    # HC0·n/(n − p), the OLS definition; statsmodels 0.15 gives a GLM's cov_type='HC1' no such factor
    # (its HC1 equals its HC0 there), so the check is HC0 times the stated factor
    from planrunner.engines.modelboot import data_standard_error
    from planrunner.engines.models import fit_logistic
    y, kids, age, years, occupation = fair()
    x = np.column_stack([np.ones(y.size), kids, age, years])
    glm = sm.GLM(y, x, family=sm.families.Binomial())
    hc0 = glm.fit(tol=1e-14, cov_type="HC0").bse[1]
    assert np.sqrt(robust_covariance(x, fit_logistic(x, y, "test"), "HC0")[1, 1]) == pytest.approx(hc0, rel=1e-8)
    hc1 = hc0 * np.sqrt(y.size / (y.size - 4))
    cluster = glm.fit(tol=1e-14, cov_type="cluster", cov_kwds={"groups": occupation}).bse[1]
    assert data_standard_error(_prepared(design(y, kids, age, years), "coefficient")) == pytest.approx(hc1, rel=1e-8)
    clustered = design(y, kids, age, years, clusters=occupation)
    assert data_standard_error(_prepared(clustered, "coefficient")) == pytest.approx(cluster, rel=1e-8)


def test_logistic_resample_se_equals_a_statsmodels_refit_of_the_same_rows():
    # the batched Newton refit of a cases resample and its HC1 SE equal statsmodels GLM(Binomial)
    # refitted on the rows drawn (cov_type='HC0' times sqrt(n/(n - p)), as above; reference function)
    from planrunner.engines.modelboot import CHUNK, _case_counts, _cases
    y, kids, age, years, _ = fair(16)
    d = design(y, kids, age, years, cells=kids.astype(np.intp))
    p = _prepared(d, "coefficient")
    counts = _case_counts(p, stream_for(3, "logit"), 0)
    theta, se = _cases(p, counts, True)
    for r in range(0, CHUNK, 8):
        rows = np.repeat(np.arange(d.n), counts[r].astype(int))
        refit = sm.GLM(y[rows], d.x[rows], family=sm.families.Binomial()).fit(tol=1e-14, cov_type="HC0")
        assert theta[r] == pytest.approx(refit.params[1], rel=1e-8)
        assert se[r] == pytest.approx(refit.bse[1] * np.sqrt(d.n / (d.n - 4)), rel=1e-7)


def _stacked_sandwich_variance(name: str, x: np.ndarray, y: np.ndarray, beta: np.ndarray) -> float:
    """The HC0 sandwich variance of a standardised effect from the stacked estimating equations
    U_i(β, p₁, p₀) = [x_i(y_i − μ_i), μ¹_i − p₁, μ⁰_i − p₀] (M-estimation: A⁻¹BA⁻ᵀ/n, Stefanski & Boos
    2002, The American Statistician 56(1)), every derivative by central differences (written here,
    independently of planrunner's closed form)."""
    from planrunner.engines.models import effect, expit
    n, k = x.shape
    x1, x0 = x.copy(), x.copy()
    x1[:, 1], x0[:, 1] = 1.0, 0.0

    def u(theta: np.ndarray) -> np.ndarray:
        b, p1, p0 = theta[:k], theta[k], theta[k + 1]
        return np.column_stack([x * (y - expit(x @ b))[:, None], expit(x1 @ b) - p1, expit(x0 @ b) - p0])

    theta = np.concatenate([beta, [expit(x1 @ beta).mean(), expit(x0 @ beta).mean()]])
    h = 1e-6
    a = np.empty((k + 2, k + 2))
    for j in range(k + 2):
        step = np.zeros(k + 2)
        step[j] = h
        a[:, j] = -(u(theta + step).mean(axis=0) - u(theta - step).mean(axis=0)) / (2 * h)
    scores = u(theta)
    b_meat = scores.T @ scores / n
    a_inv = np.linalg.inv(a)
    covariance = a_inv @ b_meat @ a_inv.T / n
    p = theta[k:]
    grad = np.array([(effect(name, np.array(p[0] + h), np.array(p[1])) - effect(name, np.array(p[0] - h),
                      np.array(p[1]))) / (2 * h),
                     (effect(name, np.array(p[0]), np.array(p[1] + h)) - effect(name, np.array(p[0]),
                      np.array(p[1] - h))) / (2 * h)])
    return float(grad @ covariance[k:, k:] @ grad)


@pytest.mark.parametrize("name", ["standardized_risk_difference", "standardized_risk_ratio",
                                  "standardized_odds_ratio"])
def test_delta_method_se_of_a_standardized_effect_equals_a_numerical_stacked_sandwich(name):
    # V-MODEL-DELTA: Σψᵢ² (HC0) against the numerical-derivative sandwich above, on statsmodels' spector data
    from planrunner.engines.models import fit_logistic, standardized_influence
    gpa, tuce, psi, grade = spector()
    x = np.column_stack([np.ones(grade.size), psi, gpa, tuce])
    fit = fit_logistic(x, grade, "test")
    psi_cov, psi_beta = standardized_influence(name, fit.beta[None, :], x, grade, 1, np.ones((1, grade.size)))
    variance = float(np.sum((psi_cov + psi_beta) ** 2))
    assert variance == pytest.approx(_stacked_sandwich_variance(name, x, grade, fit.beta), rel=1e-6)


def test_standardized_risk_difference_equals_statsmodels_average_discrete_change():
    # V-MODEL-MARGEFF; Source: statsmodels Logit.get_margeff(at='overall', method='dydx', dummy=True) on
    # statsmodels.datasets.spector: for the 0/1 regressor PSI the average discrete change is the
    # g-computation risk difference (to 1e-10), and its delta-method SE (statsmodels: numerical Jacobian
    # with the HC0 covariance of the fit) is the coefficient part √Σψ_β² of planrunner's SE (1e-6,
    # the accuracy of a numerical derivative)
    from planrunner.engines.models import fit_logistic, standardized, standardized_influence
    gpa, tuce, psi, grade = spector()
    x = np.column_stack([np.ones(grade.size), psi, gpa, tuce])
    fit = fit_logistic(x, grade, "test")
    p1, p0 = standardized(fit.beta, x, 1)
    margins = sm.Logit(grade, x).fit(disp=0, tol=1e-14, cov_type="HC0").get_margeff(
        at="overall", method="dydx", dummy=True)
    assert p1 - p0 == pytest.approx(margins.margeff[0], rel=1e-10, abs=1e-12)
    _, psi_beta = standardized_influence("standardized_risk_difference", fit.beta[None, :], x, grade, 1,
                                         np.ones((1, grade.size)))
    assert np.sqrt(np.sum(psi_beta ** 2)) == pytest.approx(margins.margeff_se[0], rel=1e-6)


def test_studentized_interval_of_a_standardized_risk_difference_from_a_plan(write_plan, tmp_path):
    # end to end: a studentized interval of a logistic statistic; its se_hat is the HC1 delta method
    y, kids, age, years, occupation = fair(10)
    rows = "".join(f"{'yes' if k else 'no'},{float(a)!r},{float(v)!r},{int(o)},{int(r)}\n"
                   for k, a, v, o, r in zip(kids, age, years, occupation, y))
    plan = write_plan("""
        plan: fair
        title: Standardised risk difference, studentized
        seed: 3
        datasets:
          d:
            file: d.csv
            columns:
              kids: {type: category, levels: ['yes', 'no']}
              age: {type: number}
              years: {type: number}
              occupation: {type: category}
              affair: {type: integer}
        analyses:
          - id: srd
            data: d
            outcome: affair
            groups: {by: kids, compare: ['yes', 'no']}
            statistic: standardized_risk_difference
            covariates: [age, years]
            method: bootstrap
            resamples: 200
            intervals: [studentized, percentile]
          - id: logit
            role: secondary
            data: d
            outcome: affair
            predictor: age
            statistic: coefficient
            model: logistic
            covariates: [years]
            clusters: occupation
            method: bootstrap
            resamples: 200
            intervals: [studentized]
    """, {"d.csv": "kids,age,years,occupation,affair\n" + rows})
    record = run_plan(plan, out=tmp_path / "runs", clock=fixed_clock).record
    entries = {a["id"]: a for a in record["analyses"]}
    srd = entries["srd"]
    assert srd["intervals"][0]["method"] == "studentized" and srd["intervals"][0]["lower"] is not None
    from planrunner.engines.models import fit_logistic, standardized_influence
    x = np.column_stack([np.ones(y.size), kids, age, years])
    fit = fit_logistic(x, y, "test")
    parts = standardized_influence("standardized_risk_difference", fit.beta[None, :], x, y, 1, np.ones((1, y.size)))
    hc1 = np.sqrt(y.size / (y.size - 4) * np.sum((parts[0] + parts[1]) ** 2))
    assert srd["details"]["se_hat"] == pytest.approx(hc1, rel=1e-10)
    glm = sm.GLM(y, np.column_stack([np.ones(y.size), age, years]), family=sm.families.Binomial())
    cluster = glm.fit(tol=1e-14, cov_type="cluster", cov_kwds={"groups": occupation}).bse[1]
    assert entries["logit"]["details"]["se_hat"] == pytest.approx(cluster, rel=1e-8)
    assert entries["logit"]["intervals"][0]["lower"] is not None
