"""Residual permutation with covariates: Freedman–Lane and ter Braak, over all rows, within strata
and as whole clusters' blocks (engines/association.py).

Definitions: Freedman & Lane (1983) permute the residuals of the reduced model (the covariates
alone) and refit; ter Braak (1992) permutes the residuals of the full model and compares b* − b̂
with b̂; both as stated by Anderson & Legendre (1999, J. Statist. Comput. Simul. 62, 271–303) and
Winkler et al. (2014, NeuroImage 92, 381–397, Table 2). Within strata (exchangeability blocks) and
whole-block permutation as in Winkler et al. (2014).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import statsmodels.api as sm
from conftest import fixed_clock

from planrunner.engines.association import ResidualScheme, association_test
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import UniformRows, stream_for
from planrunner.errors import EngineError
from planrunner.pipeline.run import run_plan

SLOPE = get_statistic("slope")


def _spector() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """statsmodels' shipped Spector & Mazzeo (1980) data: TUCE score, PSI (0/1 teaching method),
    GPA, GRADE (0/1), 32 students."""
    d = sm.datasets.spector.load_pandas().data
    return (d["TUCE"].to_numpy(float), d["PSI"].to_numpy(float), d["GPA"].to_numpy(float),
            d["GRADE"].to_numpy(float))


def _full_slope(y: np.ndarray, x: np.ndarray, z: np.ndarray) -> float:
    """The predictor's coefficient of y ~ 1 + x + Z by statsmodels OLS (the reference fit)."""
    return float(sm.OLS(y, np.column_stack([np.ones(y.size), x, z])).fit().params[1])


# ------------------------------------------------------------------ identities without covariates


def test_without_covariates_freedman_lane_is_the_label_shuffle_exactly():
    # identity: with the intercept alone, the reduced residuals are y − ȳ, and the partial slope of a
    # 0/1 indicator on permuted residuals is the mean difference of the permuted outcomes (Σw = 0).
    # Each of the C(n, n1) label sets is n1!·n0! of the n! permutations, so the exact p-values are equal
    y = np.array([5.1, 6.3, 4.8, 7.2, 3.9, 4.4, 5.0, 3.1])  # invented
    x = np.array([1, 1, 1, 1, 0, 0, 0, 0], dtype=float)
    options = PermutationOptions(9999, "two-sided", exact="always")
    fl = association_test(np.column_stack([x, y]), SLOPE, options, stream=stream_for(3, "a"),
                          covariates=np.empty((8, 0)))
    plain = permutation_test([y[:4], y[4:]], get_statistic("mean_difference"), options, stream=stream_for(3, "a"))
    assert fl.arrangements == 40320 and plain.exact and fl.exact
    assert fl.observed == pytest.approx(plain.observed, rel=1e-12)
    assert fl.p_value == pytest.approx(plain.p_value, abs=1e-15)
    assert fl.p_greater == pytest.approx(plain.p_greater, abs=1e-15)


def test_without_covariates_freedman_lane_draws_the_label_shuffle_of_the_same_stream():
    # identity under the same stream: with the first group's rows first, resample r of both engines
    # is argsort(keys of row r) (slot s gets the outcome at that place), so the Monte Carlo nulls are
    # equal up to the order of summation and the p-values are equal
    y, psi, _, _ = _spector()
    order = np.argsort(-psi, kind="stable")  # PSI = 1 first
    y, psi = y[order], psi[order]
    options = PermutationOptions(3999, "two-sided", exact="never")
    fl = association_test(np.column_stack([psi, y]), SLOPE, options, stream=stream_for(8, "same"),
                          covariates=np.empty((32, 0)))
    plain = permutation_test([y[psi == 1], y[psi == 0]], get_statistic("mean_difference"), options,
                             stream=stream_for(8, "same"))
    assert np.max(np.abs(np.asarray(fl.null) - np.asarray(plain.null))) < 1e-12
    assert fl.p_value == plain.p_value


def test_without_covariates_ter_braak_agrees_with_the_label_shuffle_within_monte_carlo_error():
    # ter Braak permutes within-group-centred residuals: not the same null as the label shuffle, but
    # asymptotically equivalent under the null (Anderson & Legendre 1999); on the shipped data, whose
    # PSI effect on TUCE is small, the p-values agree within 3 Monte Carlo standard errors of each
    y, psi, _, _ = _spector()
    options = PermutationOptions(3999, "two-sided", exact="never")
    tb = association_test(np.column_stack([psi, y]), SLOPE, options, stream=stream_for(8, "tb"),
                          covariates=np.empty((32, 0)), residuals=ResidualScheme("ter-braak"))
    plain = permutation_test([y[psi == 1], y[psi == 0]], get_statistic("mean_difference"), options,
                             stream=stream_for(8, "plain"))
    error = np.hypot(tb.monte_carlo_se, plain.monte_carlo_se)
    assert abs(tb.p_value - plain.p_value) < 3 * error + 0.02  # 0.02: the finite-n gap # common practice
    assert tb.computation == "Monte Carlo"


# ------------------------------------------------------------------ definitions, by brute force


def _brute_force_freedman_lane(y, x, z, arrangements) -> np.ndarray:
    """b* of y* = ŷ + Pe refitted by statsmodels OLS for each arrangement (Freedman & Lane 1983)."""
    zz = np.column_stack([np.ones(y.size), z])
    reduced = sm.OLS(y, zz).fit()
    return np.array([_full_slope(reduced.fittedvalues + reduced.resid[list(p)], x, z) for p in arrangements])


def _p_two_sided(null: np.ndarray, observed: float) -> float:
    """Doubled rule: 2·min(#{b* ≥ b}, #{b* ≤ b})/N, capped at 1 (the tie allowance is relative 1e-9)."""
    tol = 1e-9 * max(abs(observed), 1.0)
    return min(1.0, 2 * min(np.mean(null >= observed - tol), np.mean(null <= observed + tol)))


@pytest.mark.parametrize("design", ["rows", "strata", "clusters"])
def test_exact_freedman_lane_equals_a_brute_force_enumeration(design):
    # every arrangement listed and refitted in the test (outside the engine), the p-value counted by
    # the doubled two-sided rule; rows: 7! permutations; strata (3 + 4 rows): 3!·4!; clusters
    # (5 of 2 rows, the predictor constant within each): 5! permutations of whole blocks
    y, psi, gpa, _ = _spector()
    if design == "clusters":
        rows = np.arange(10)
        x, codes = np.repeat([1.0, 0.0, 1.0, 0.0, 0.0], 2), np.repeat(np.arange(5), 2)
        blocks = [list(range(2 * c, 2 * c + 2)) for c in range(5)]
        arrangements = [sum((blocks[c] for c in perm), []) for perm in itertools.permutations(range(5))]
        scheme = ResidualScheme(clusters=codes)
    else:
        rows = np.arange(7)
        x = psi[rows] + np.array([1, 0, 0, 1, 1, 0, 0])  # vary the predictor within both strata
        if design == "strata":
            codes = np.array([0, 0, 0, 1, 1, 1, 1])
            arrangements = [a + b for a, b in itertools.product(itertools.permutations(range(3)),
                                                                itertools.permutations(range(3, 7)))]
            scheme = ResidualScheme(strata=codes)
        else:
            arrangements, scheme = list(itertools.permutations(range(7))), None
    yy, z = y[rows] + 0.1 * np.arange(rows.size), gpa[rows]
    result = association_test(np.column_stack([x, yy]), SLOPE, PermutationOptions(9999, "two-sided", exact="always"),
                              stream=stream_for(1, "exact"), covariates=z, residuals=scheme)
    null = _brute_force_freedman_lane(yy, x, z, arrangements)
    observed = _full_slope(yy, x, z)
    assert result.exact and result.arrangements == len(arrangements)
    assert result.observed == pytest.approx(observed, rel=1e-10)  # statsmodels OLS coefficient
    assert np.allclose(np.sort(np.asarray(result.null)), np.sort(null), rtol=1e-9, atol=1e-12)
    assert result.p_value == pytest.approx(_p_two_sided(null, observed), abs=1e-12)


def test_ter_braak_null_is_the_refitted_full_model_by_definition():
    # ter Braak (1992): y* = Xβ̂ + Pf (f the full model's residuals), refit, and b* − b̂ is the null
    # value; resample r's P is argsort(keys of row r) of the analysis's stream, rebuilt here
    y, psi, gpa, _ = _spector()
    options = PermutationOptions(50, "two-sided", exact="never")
    stream = stream_for(4, "ter-braak")
    result = association_test(np.column_stack([psi, y]), SLOPE, options, stream=stream, covariates=gpa,
                              residuals=ResidualScheme("ter-braak"))
    full = sm.OLS(y, np.column_stack([np.ones(32), psi, gpa])).fit()
    orders = np.argsort(UniformRows(stream, 32).take(50), axis=1)
    expected = [_full_slope(full.fittedvalues + full.resid[o], psi, gpa) - full.params[1] for o in orders]
    assert np.allclose(np.asarray(result.null), expected, rtol=1e-9, atol=1e-12)
    assert result.observed == pytest.approx(full.params[1], rel=1e-10)  # statsmodels OLS coefficient


# ------------------------------------------------------------------ size under an exchangeable null


@pytest.mark.parametrize("method", ["freedman-lane", "ter-braak"])
def test_stratified_type_one_error_is_alpha_within_monte_carlo_error(method):
    # 400 data sets under the null (no group effect; stratum and covariate effects; normal errors),
    # each tested by residuals permuted within 3 strata with 199 resamples: the rejection rate at
    # alpha = 0.05 lies within 3 binomial standard errors (0.033) of 0.05
    rng = np.random.default_rng(20261203)
    strata = np.repeat(np.arange(3), 8)
    group = np.tile([1.0, 0.0], 12)
    options = PermutationOptions(199, "two-sided", exact="never")
    rejections = 0
    for k in range(400):
        z = rng.normal(size=24)
        y = 2.0 * strata + 0.8 * z + rng.normal(size=24)
        result = association_test(np.column_stack([group, y]), SLOPE, options, stream=stream_for(k, "size"),
                                  covariates=z, residuals=ResidualScheme(method, strata=strata))
        rejections += result.p_value <= 0.05
    assert abs(rejections / 400 - 0.05) < 3 * np.sqrt(0.05 * 0.95 / 400)


# ------------------------------------------------------------------ refusals


def test_engine_refuses_schemes_that_are_not_valid():
    x = np.tile([1.0, 0.0], 6)
    xy = np.column_stack([x, np.arange(12.0) ** 0.5])
    z = np.linspace(0, 1, 12) ** 2
    options = PermutationOptions(99, "two-sided")
    with pytest.raises(EngineError, match="unknown covariate permutation 'ter braak'"):
        ResidualScheme("ter braak")
    with pytest.raises(EngineError, match="varies within cluster"):
        association_test(xy, SLOPE, options, stream=stream_for(1, "r"), covariates=z,
                         residuals=ResidualScheme(clusters=np.repeat(np.arange(6), 2)))
    with pytest.raises(EngineError, match="constant within every stratum"):
        association_test(xy, SLOPE, options, stream=stream_for(1, "r"), covariates=z,
                         residuals=ResidualScheme(strata=(x == 1).astype(np.int64)))
    with pytest.raises(EngineError, match="no exact null"):
        association_test(xy, SLOPE, PermutationOptions(99, "two-sided", exact="always"), stream=stream_for(1, "r"),
                         covariates=z, residuals=ResidualScheme("ter-braak"))


# ------------------------------------------------------------------ end to end from a plan

PLAN = """
plan: covariate-permutation
title: Residual permutation on shipped data
seed: 17
datasets:
  d:
    file: d.csv
    columns:
      psi: {{type: category, levels: ["1", "0"]}}
      gpa: {{type: number}}
      tuce: {{type: number}}
      grade: {{type: category}}
analyses:
  - id: adjusted
    data: d
    outcome: tuce
    groups: {{by: psi, compare: ["1", "0"]}}
    covariates: [gpa]
    statistic: adjusted_mean_difference
    method: permutation
    resamples: 999
{extra}
"""


@pytest.mark.parametrize("extra, words", [
    ("    covariate_permutation: ter-braak", "ter Braak (ter Braak 1992): residuals of the full model"),
    ("    strata: grade", "Freedman–Lane (Freedman & Lane 1983): residuals of the outcome on 1 covariate(s) "
                        "permuted within 2 strata"),
])
def test_plan_names_the_scheme_and_reports_the_statsmodels_coefficient(write_plan, tmp_path, extra, words):
    y, psi, gpa, grade = _spector()
    csv = "psi,gpa,tuce,grade\n" + "".join(f"{int(p)},{float(g)!r},{float(t)!r},{int(r)}\n"
                                            for p, g, t, r in zip(psi, gpa, y, grade))
    plan = write_plan(PLAN.format(extra=extra), {"d.csv": csv})
    outcome = run_plan(plan, out=tmp_path / "runs", clock=fixed_clock)
    entry = outcome.record["analyses"][0]
    assert entry["estimate"] == pytest.approx(_full_slope(y, psi, gpa), rel=1e-10)  # statsmodels OLS
    assert entry["scheme"].startswith(words)
    method = "ter-braak" if "ter-braak" in extra else "freedman-lane"
    assert entry["settings"]["covariate_permutation"] == method
    assert f"(scheme: {entry['scheme']})" in outcome.record["methods_text"]  # the methods paragraph


@pytest.mark.parametrize("case, words", [
    ("covariate-permutation-unequal-clusters", "clusters differ in size"),
    ("covariate-permutation-stratum-of-one-row", "stratum 'c9' has 1 row(s)"),
    ("covariate-permutation-predictor-varies-within-cluster", "varies within cluster 'a1'"),
])
def test_run_refuses_what_check_refuses(tmp_path, case, words):
    # the bad-input corpus runs these cases through `check` (test_bad_inputs); a run gives the same message
    import shutil
    from pathlib import Path

    folder = tmp_path / case
    shutil.copytree(Path(__file__).resolve().parent / "bad_inputs" / case, folder)
    plan = folder / "plan.yaml"
    with pytest.raises(EngineError, match=words.replace("(", r"\(").replace(")", r"\)")):
        run_plan(plan, out=tmp_path / "runs", clock=fixed_clock)
