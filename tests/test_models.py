"""Model statistics and their bootstrap, against statsmodels on data shipped inside statsmodels, and
against stated identities (V-MODEL-OLS, V-MODEL-GLM, V-MODEL-WILD, V-MODEL-RESIDUAL, V-MODEL-WCB)."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import fixed_clock

from planrunner.engines.blocks import mapping_ranges, resample_ranges
from planrunner.engines.modelboot import ModelBootstrapOptions, model_bootstrap
from planrunner.engines.models import Design, check_rank, fit_logistic, fit_ols, robust_covariance, standardized
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError
from planrunner.pipeline.run import run_plan


def spector() -> tuple[np.ndarray, ...]:
    """statsmodels.datasets.spector (Spector & Mazzeo 1980, 32 students, shipped in statsmodels):
    GPA, TUCE, PSI (0/1 teaching method), GRADE (0/1 improvement)."""
    d = sm.datasets.spector.load_pandas().data
    return tuple(d[c].to_numpy(dtype=float) for c in ("GPA", "TUCE", "PSI", "GRADE"))


def grunfeld(firms: int | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """statsmodels.datasets.grunfeld (Grunfeld 1958 investment data, 11 firms × 20 years, shipped in
    statsmodels): invest, value, capital, firm code."""
    d = sm.datasets.grunfeld.load_pandas().data
    names = list(dict.fromkeys(d["firm"]))
    if firms is not None:
        d = d[d["firm"].isin(names[:firms])]
    codes = np.array([names.index(f) for f in d["firm"]], dtype=np.intp)
    return (d["invest"].to_numpy(float), d["value"].to_numpy(float), d["capital"].to_numpy(float), codes)


def design(y: np.ndarray, target: np.ndarray, *covariates: np.ndarray, clusters: np.ndarray | None = None,
           cells: np.ndarray | None = None) -> Design:
    x = np.column_stack([np.ones(y.size), target, *covariates])
    names = ("(intercept)", "target", *[f"c{k}" for k in range(len(covariates))])
    return Design(y=y, x=x, names=names, cells=np.zeros(y.size, np.intp) if cells is None else cells,
                  clusters=clusters)


def options(**kw) -> ModelBootstrapOptions:
    base = {"resamples": 999, "confidence": 0.95, "intervals": ("percentile",), "model": "linear"}
    return ModelBootstrapOptions(**{**base, **kw})


# ------------------------------------------------------------------ estimates and robust SEs


def test_ols_and_robust_covariances_equal_statsmodels():
    # V-MODEL-OLS; Source: statsmodels OLS on statsmodels.datasets.grunfeld (reference function)
    invest, value, capital, firm = grunfeld()
    x = sm.add_constant(np.column_stack([value, capital]))
    fit = fit_ols(x, invest)
    for kind, reference in (("HC0", sm.OLS(invest, x).fit(cov_type="HC0")),
                            ("HC1", sm.OLS(invest, x).fit(cov_type="HC1")),
                            ("cluster", sm.OLS(invest, x).fit(cov_type="cluster", cov_kwds={"groups": firm}))):
        assert np.allclose(fit.beta, reference.params, rtol=1e-10, atol=0)
        covariance = robust_covariance(x, fit, kind, firm)
        assert np.allclose(covariance, reference.cov_params(), rtol=1e-10, atol=0), kind


def test_logistic_fit_and_g_computation_equal_statsmodels():
    # V-MODEL-GLM; Source: statsmodels GLM(Binomial) on statsmodels.datasets.spector (reference function)
    gpa, tuce, psi, grade = spector()
    x = sm.add_constant(np.column_stack([psi, gpa, tuce]))
    fit = fit_logistic(x, grade, "test")
    reference = sm.GLM(grade, x, family=sm.families.Binomial()).fit(tol=1e-14)
    assert np.allclose(fit.beta, reference.params, rtol=1e-10, atol=0)
    hc0 = sm.GLM(grade, x, family=sm.families.Binomial()).fit(tol=1e-14, cov_type="HC0")
    assert np.allclose(robust_covariance(x, fit, "HC0"), hc0.cov_params(), rtol=1e-8, atol=0)
    x1, x0 = x.copy(), x.copy()
    x1[:, 1], x0[:, 1] = 1.0, 0.0
    p1, p0 = standardized(fit.beta, x, 1)
    assert p1 == pytest.approx(reference.predict(x1).mean(), rel=1e-10)
    assert p0 == pytest.approx(reference.predict(x0).mean(), rel=1e-10)


def test_estimates_from_a_plan_equal_statsmodels(write_plan, tmp_path):
    # V-MODEL-OLS, V-MODEL-GLM: the same fits reached from a plan file (data written from statsmodels'
    # spector dataset; the category covariate is TUCE split into three bands, expanded to indicators)
    gpa, tuce, psi, grade = spector()
    band = np.where(tuce < 20, "low", np.where(tuce < 25, "mid", "high"))
    rows = "\n".join(f"{'psi' if p else 'classic'},{float(g)!r},{float(t)!r},{b},{int(r)}"
                     for p, g, t, b, r in zip(psi, gpa, tuce, band, grade))
    plan = write_plan("""
        plan: spector
        title: Spector data
        seed: 11
        datasets:
          d:
            file: d.csv
            columns:
              method: {type: category, levels: [classic, psi]}
              gpa: {type: number}
              tuce: {type: number}
              band: {type: category, levels: [low, mid, high]}
              grade: {type: boolean}
        analyses:
          - {id: amd, data: d, outcome: gpa, groups: {by: method, compare: [psi, classic]}, covariates: [tuce, band],
             statistic: adjusted_mean_difference, method: bootstrap, resamples: 200, intervals: [percentile]}
          - {id: srd, data: d, outcome: grade, groups: {by: method, compare: [psi, classic]}, covariates: [gpa, tuce],
             role: secondary, statistic: standardized_risk_difference, method: bootstrap, resamples: 200,
             intervals: [percentile]}
          - {id: srr, data: d, outcome: grade, groups: {by: method, compare: [psi, classic]}, covariates: [gpa, tuce],
             role: secondary, statistic: standardized_risk_ratio, method: bootstrap, resamples: 200,
             intervals: [percentile]}
          - {id: sor, data: d, outcome: grade, groups: {by: method, compare: [psi, classic]}, covariates: [gpa, tuce],
             role: secondary, statistic: standardized_odds_ratio, method: bootstrap, resamples: 200,
             intervals: [percentile]}
          - {id: lin, role: secondary, data: d, outcome: gpa, predictor: tuce, statistic: coefficient, model: linear,
             method: bootstrap, resamples: 200, intervals: [percentile]}
          - {id: logit, data: d, outcome: grade, predictor: gpa, covariates: [tuce], statistic: coefficient,
             role: secondary, model: logistic, method: bootstrap, resamples: 200, intervals: [percentile]}
        """, {"d.csv": "method,gpa,tuce,band,grade\n" + rows + "\n"})
    entries = {a["id"]: a for a in run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record["analyses"]}
    bands = np.column_stack([band == "mid", band == "high"]).astype(float)
    ols = sm.OLS(gpa, sm.add_constant(np.column_stack([psi, tuce, bands]))).fit()
    assert entries["amd"]["estimate"] == pytest.approx(ols.params[1], rel=1e-10)
    x = sm.add_constant(np.column_stack([psi, gpa, tuce]))
    glm = sm.GLM(grade, x, family=sm.families.Binomial()).fit(tol=1e-14)
    x1, x0 = x.copy(), x.copy()
    x1[:, 1], x0[:, 1] = 1.0, 0.0
    p1, p0 = glm.predict(x1).mean(), glm.predict(x0).mean()
    assert entries["srd"]["estimate"] == pytest.approx(p1 - p0, rel=1e-10)
    assert entries["srr"]["estimate"] == pytest.approx(p1 / p0, rel=1e-10)
    assert entries["sor"]["estimate"] == pytest.approx(p1 / (1 - p1) / (p0 / (1 - p0)), rel=1e-10)
    assert entries["lin"]["estimate"] == pytest.approx(sm.OLS(gpa, sm.add_constant(tuce)).fit().params[1], rel=1e-10)
    logit = sm.GLM(grade, sm.add_constant(np.column_stack([gpa, tuce])), family=sm.families.Binomial()).fit(tol=1e-14)
    assert entries["logit"]["estimate"] == pytest.approx(logit.params[1], rel=1e-10)
    assert entries["amd"]["details"]["columns"] == ["(intercept)", "method=psi", "tuce", "band=mid", "band=high"]


# ------------------------------------------------------------------ bootstrap identities


def _heteroskedastic(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    group = (rng.random(n) < 0.4).astype(float)
    covariate = rng.normal(size=n)
    y = 1 + 0.5 * group + covariate + rng.normal(size=n) * (0.5 + np.abs(covariate) + group)
    return y, group, covariate


def _mc_sd(standard_error: float, distribution: np.ndarray) -> float:
    # V-TOL: sd of a B-replicate SE ≈ SE·sqrt((κ − 1)/(4B))
    centred = distribution - distribution.mean()
    kurtosis = np.mean(centred ** 4) / np.mean(centred ** 2) ** 2
    return standard_error * math.sqrt((kurtosis - 1) / (4 * distribution.size))


@pytest.mark.parametrize("weights", ["rademacher", "mammen"])
def test_wild_bootstrap_se_matches_hc0(weights):
    # V-MODEL-WILD: var*(aᵀ(e∘v)) = Σ a_i² e_i² = HC0 exactly in expectation (E v = 0, E v² = 1)
    y, group, covariate = _heteroskedastic(3000, 1)
    d = design(y, group, covariate)
    result = model_bootstrap(d, "adjusted_mean_difference", options(model_resampling="wild", weights=weights,
                                                                    resamples=4000), stream=stream_for(5, "wild"))
    hc0 = math.sqrt(sm.OLS(y, d.x).fit(cov_type="HC0").cov_params()[1, 1])  # statsmodels reference
    assert abs(result.standard_error - hc0) < 4 * _mc_sd(hc0, result.distribution)
    assert result.estimate == pytest.approx(sm.OLS(y, d.x).fit().params[1], rel=1e-10)


def test_residual_bootstrap_se_matches_the_analytic_se():
    # V-MODEL-RESIDUAL: residuals rescaled by sqrt(n/(n-p)) give E*[var] = s²(XᵀX)⁻¹ (identity in expectation)
    rng = np.random.default_rng(2)
    predictor = rng.normal(size=400)
    y = 2 + 0.3 * predictor + rng.normal(size=400)
    d = design(y, predictor)
    result = model_bootstrap(d, "coefficient", options(model_resampling="residual", resamples=4000),
                             stream=stream_for(5, "residual"))
    analytic = sm.OLS(y, d.x).fit().bse[1]  # statsmodels reference: s·sqrt((XᵀX)⁻¹_jj)
    assert abs(result.standard_error - analytic) < 4 * _mc_sd(analytic, result.distribution)


def test_wild_cluster_enumeration_equals_a_loop_over_every_sign_vector():
    # V-MODEL-WCB: 6 firms of statsmodels' grunfeld data, all 2^6 = 64 Rademacher sign vectors with the
    # null imposed, each refitted by statsmodels OLS with cov_type='cluster' (a loop per vector); the
    # p-value is the share of |t*| >= |t| (Cameron, Gelbach & Miller 2008)
    invest, value, capital, firm = grunfeld(firms=6)
    d = design(invest, value, capital, clusters=firm)
    result = model_bootstrap(d, "coefficient", options(model_resampling="wild-cluster", impose_null=True),
                             stream=stream_for(5, "wcb"))
    full = sm.OLS(invest, d.x).fit(cov_type="cluster", cov_kwds={"groups": firm})
    restricted = sm.OLS(invest, d.x[:, [0, 2]]).fit()
    t = full.params[1] / full.bse[1]
    hits = 0
    thetas = []
    for number in range(64):
        signs = np.array([1.0 if (number >> g) & 1 else -1.0 for g in range(6)])
        y_star = restricted.fittedvalues + restricted.resid * signs[firm]
        refit = sm.OLS(y_star, d.x).fit(cov_type="cluster", cov_kwds={"groups": firm})
        thetas.append(refit.params[1])
        hits += abs(refit.params[1] / refit.bse[1]) >= abs(t) - 1e-10 * max(abs(t), 1)
    assert result.exact and result.resamples == 64
    assert np.allclose(result.distribution, thetas, rtol=1e-9, atol=1e-12 * np.max(np.abs(thetas)))
    assert result.p_value == pytest.approx(hits / 64, abs=0)
    assert result.details["t"] == pytest.approx(t, rel=1e-10)


def test_a_hand_computed_enumeration_of_five_clusters():
    # identity: with y = cluster effects only and X = [1, x] where x is constant within clusters, the
    # enumerated replicates are θ̂₀ + aᵀ(ẽ∘v) over the 32 sign vectors; their weighted mean is θ̃ = the
    # restricted fit's slope (0), and their weighted variance is Σ_g (Σ_{i∈g} a_i ẽ_i)² (E v_g v_h = δ_gh)
    clusters = np.repeat(np.arange(5), 2)
    x = np.array([0.0, 0.0, 1.0, 1.0, 2.0, 2.0, 3.0, 3.0, 4.0, 4.0])
    y = np.array([1.0, 2.0, 1.5, 2.5, 4.0, 3.0, 2.0, 5.0, 6.0, 4.5])
    d = design(y, x, clusters=clusters)
    result = model_bootstrap(d, "coefficient", options(model_resampling="wild-cluster", impose_null=True),
                             stream=stream_for(5, "five"))
    a = np.linalg.pinv(d.x)[1]
    residual = y - y.mean()  # the restricted model is the intercept alone
    per_cluster = np.array([np.sum(a[clusters == g] * residual[clusters == g]) for g in range(5)])
    by_hand = [float(np.dot(signs, per_cluster)) for signs in itertools.product((-1.0, 1.0), repeat=5)]
    assert sorted(result.distribution) == pytest.approx(sorted(by_hand), abs=1e-12)
    assert result.standard_error == pytest.approx(math.sqrt(np.sum(per_cluster ** 2)), rel=1e-12)


def test_the_numbers_do_not_depend_on_how_resamples_are_split():
    y, group, covariate = _heteroskedastic(300, 3)
    cells = group.astype(np.intp)
    for scheme in ("cases", "wild", "residual"):
        d = design(y, group, covariate, cells=cells)
        opts = options(model_resampling=scheme, resamples=203, intervals=("percentile", "studentized"))
        whole = model_bootstrap(d, "adjusted_mean_difference", opts, stream=stream_for(9, scheme))

        def uneven(task, total):
            return [task(a, b) for a, b in [(0, 7), (7, 40), (40, 41), (41, 200), (200, total)]]

        with mapping_ranges(uneven):
            split = model_bootstrap(d, "adjusted_mean_difference", opts, stream=stream_for(9, scheme))
        with mapping_ranges(lambda task, total: [task(a, b) for a, b in resample_ranges(total, 3)]):
            thirds = model_bootstrap(d, "adjusted_mean_difference", opts, stream=stream_for(9, scheme))
        assert np.array_equal(whole.distribution, split.distribution), scheme
        assert np.array_equal(whole.distribution, thirds.distribution), scheme
        assert whole.intervals == split.intervals


def test_cases_bootstrap_agrees_with_a_statsmodels_refit_of_the_same_resample():
    # the batched normal equations of a resample equal statsmodels OLS on the rows drawn (reference)
    from planrunner.engines.modelboot import CHUNK, _case_counts, _cases, _prepare
    y, group, covariate = _heteroskedastic(120, 4)
    d = design(y, group, covariate, cells=group.astype(np.intp))
    p = _prepare(d, "adjusted_mean_difference", options(intervals=("studentized",)), "test")
    counts = _case_counts(p, stream_for(3, "cases"), 0)
    theta, se = _cases(p, counts, True)
    for r in range(0, CHUNK, 8):
        rows = np.repeat(np.arange(d.n), counts[r].astype(int))
        refit = sm.OLS(y[rows], d.x[rows]).fit(cov_type="HC1")
        assert theta[r] == pytest.approx(refit.params[1], rel=1e-10)
        assert se[r] == pytest.approx(refit.bse[1], rel=1e-9)
        # each group keeps its size (rows drawn within cells)
        assert np.sum(counts[r][group == 1]) == np.sum(group == 1)


# ------------------------------------------------------------------ refusals


def test_constant_and_collinear_covariates_are_refused_whatever_their_scale():
    y, group, covariate = _heteroskedastic(200, 5)
    with pytest.raises(EngineError, match="column 'c0' is constant"):
        check_rank(design(y, group, np.full(200, 1e9 + 3.0)), "test")
    for shift, scale in ((0.0, 1.0), (1e6, 1.0), (0.0, 1e-6), (-1e4, 1e8)):
        collinear = shift + scale * (2 * group - 0.5 * covariate)
        with pytest.raises(EngineError, match="column 'c1' is collinear with target, c0"):
            check_rank(design(y, group, covariate, collinear), "test")
        # a nearly collinear but genuine covariate is kept at every scale
        check_rank(design(y, group, covariate, shift + scale * (covariate + 1e-3 * np.sin(np.arange(200)))), "test")


def test_separation_is_refused_never_a_huge_coefficient():
    gpa, tuce, psi, grade = spector()
    separated = (gpa > 3.0).astype(float)  # the outcome is perfectly predicted by gpa
    d = design(separated, psi, gpa)
    with pytest.raises(EngineError, match="separation"):
        model_bootstrap(d, "standardized_risk_difference", options(model="logistic"), stream=stream_for(1, "s"))


def test_scheme_refusals():
    y, group, covariate = _heteroskedastic(100, 6)
    clusters = np.arange(100) % 4
    with pytest.raises(EngineError, match="residual bootstrap treats the residuals as exchangeable"):
        model_bootstrap(design(y, group, covariate, clusters=clusters), "adjusted_mean_difference",
                        options(model_resampling="residual"), stream=stream_for(1, "r"))
    with pytest.raises(EngineError, match="4 clusters are too few"):
        model_bootstrap(design(y, group, covariate, clusters=clusters), "adjusted_mean_difference",
                        options(model_resampling="wild-cluster"), stream=stream_for(1, "r"))
    with pytest.raises(EngineError, match="logistic regression has none"):
        model_bootstrap(design((y > 1).astype(float), group, covariate), "standardized_risk_ratio",
                        options(model="logistic", model_resampling="wild"), stream=stream_for(1, "r"))


def test_invariance_of_the_estimate_under_shifting_and_scaling_covariates():
    # the group coefficient is unchanged by an affine change of a covariate; scaling the outcome scales it
    y, group, covariate = _heteroskedastic(250, 7)
    base = model_bootstrap(design(y, group, covariate), "adjusted_mean_difference",
                           options(resamples=50), stream=stream_for(1, "i"))
    moved = model_bootstrap(design(y, group, 1e6 + 1e3 * covariate), "adjusted_mean_difference",
                            options(resamples=50), stream=stream_for(1, "i"))
    scaled = model_bootstrap(design(1e-8 * y, group, covariate), "adjusted_mean_difference",
                             options(resamples=50), stream=stream_for(1, "i"))
    assert moved.estimate == pytest.approx(base.estimate, rel=1e-9)
    assert scaled.estimate == pytest.approx(1e-8 * base.estimate, rel=1e-12)
    assert np.allclose(moved.distribution, base.distribution, rtol=1e-8)


# ------------------------------------------------------------------ the demo plan


def test_the_orchard_demo_plan_locks_runs_and_verifies(tmp_path, capsys):
    import json
    import shutil
    from pathlib import Path

    from planrunner.cli import main as cli
    source = Path(__file__).resolve().parents[1] / "plans" / "orchard-irrigation"
    folder = tmp_path / "orchard"
    shutil.copytree(source, folder)
    plan = folder / "plan.yaml"
    assert cli.main(["lock", str(plan)]) == 0
    assert cli.main(["run", str(plan), "--refuse-deviations", "--out", str(tmp_path / "runs")]) == 0
    out = capsys.readouterr().out
    run_folder = Path(out.strip().splitlines()[-1].removeprefix("record written to "))
    record = json.loads((run_folder / "record.json").read_text(encoding="utf-8"))
    entries = {a["id"]: a for a in record["analyses"]}
    assert record["plan"]["lock"] is not None
    assert entries["primary-ancova-test"]["p_value"] is not None and entries["primary-ancova-test"]["exact"]
    assert all(not a["warnings"] for a in record["analyses"])
    assert record["datasets"][0]["derived"][0]["name"] == "gain"
    assert cli.main(["verify", str(run_folder / "record.json"), "--plan", str(plan)]) == 0


# ------------------------------------------------------------------ Freedman–Lane for a group comparison


FL_PLAN = """
plan: freedman-lane
title: Freedman–Lane for a group comparison
seed: 21
datasets:
  d:
    file: d.csv
    columns:
      arm: {{type: category, levels: [new, old]}}
      base: {{type: number}}
      y: {{type: number}}
    derive:
      is_new: "arm == 'new'"
analyses:
  - id: adjusted
    data: d
{body}
    covariates: [base]
    method: permutation
    resamples: 1999
"""


def test_freedman_lane_of_the_group_coefficient_is_the_partial_slope_of_its_indicator(write_plan, tmp_path):
    # identity: the adjusted mean difference is the partial slope of the 0/1 indicator of the first
    # group (Frisch–Waugh–Lovell), so with the same analysis id (the same stream) the Freedman–Lane
    # test of each gives the same null and the same p-value; the observed value equals statsmodels OLS
    y, group, covariate = _heteroskedastic(60, 8)
    csv = "arm,base,y\n" + "".join(f"{'new' if g else 'old'},{float(c)!r},{float(v)!r}\n"
                                    for g, c, v in zip(group, covariate, y))
    grouped = write_plan(FL_PLAN.format(body="    outcome: y\n    groups: {by: arm, compare: [new, old]}\n"
                                             "    statistic: adjusted_mean_difference"), {"d.csv": csv})
    first = run_plan(grouped, out=tmp_path / "a", clock=fixed_clock).record["analyses"][0]
    sloped = write_plan(FL_PLAN.format(body="    outcome: y\n    predictor: is_new\n    statistic: slope"),
                        name="slope.yaml")
    second = run_plan(sloped, out=tmp_path / "b", clock=fixed_clock).record["analyses"][0]
    reference = sm.OLS(y, np.column_stack([np.ones(60), group, covariate])).fit().params[1]  # statsmodels
    assert first["estimate"] == pytest.approx(reference, rel=1e-10)
    assert first["estimate"] == pytest.approx(second["estimate"], rel=1e-12)
    assert first["p_value"] == second["p_value"]
    assert "Freedman–Lane" in first["scheme"]


def test_freedman_lane_refuses_what_it_cannot_honour(write_plan, tmp_path):
    from planrunner.errors import PlanError
    from planrunner.plan.load import read_plan
    plan = write_plan(FL_PLAN.format(body="    outcome: y\n    groups: {by: arm, compare: [new, old]}\n"
                                          "    pairs: base\n    statistic: adjusted_mean_difference"),
                      {"d.csv": "arm,base,y\nnew,1,2\nold,2,3\n"})
    with pytest.raises(PlanError, match="pairs are not supported"):
        read_plan(plan)
