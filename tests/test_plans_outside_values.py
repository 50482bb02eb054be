"""Outside check values reproduced end to end: from a plan file and a CSV to the record.

Values and tolerances from docs/VALIDATION.md; the source is named beside each one.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import csv_of_groups, fixed_clock
from scipy import stats

from planrunner.pipeline.run import run_plan

# Source: E&T Table 2.1 (mouse survival data, published, confirmed)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]
MOUSE_CSV = csv_of_groups("days", {"treatment": TREATMENT, "control": CONTROL})

PLAN = """
plan: outside
title: Outside values
seed: {seed}
datasets:
  mice:
    file: mice.csv
    columns:
      group: {{type: category, levels: [treatment, control]}}
      days: {{type: number}}
analyses:
{analyses}
"""


def run(write_plan, tmp_path, analyses: str, seed: int = 20261201) -> dict:
    plan = write_plan(PLAN.format(seed=seed, analyses=analyses), {"mice.csv": MOUSE_CSV})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    return {a["id"]: a for a in record["analyses"]}


def test_pt_mouse_exact_permutation_from_a_plan(write_plan, tmp_path):
    result = run(write_plan, tmp_path, """
  - id: greater
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: permutation
    alternative: greater
    resamples: 20000
  - id: both
    role: secondary
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: permutation
    resamples: 20000
""")
    greater = result["greater"]
    assert greater["exact"] is True
    # Source: V-MOUSE-PERM, exact: 1613 of C(16,7) = 11440 splits
    assert greater["details"]["arrangements"] == 11440
    assert greater["details"]["count_greater_equal"] == 1613
    assert greater["p_value"] == 1613 / 11440
    # Source: V-MOUSE-PERM (published, as cited): difference of means 30.63
    assert greater["estimate"] == pytest.approx(30.6349206349, rel=1e-10)
    # scipy reference: permutation_test two-sided = 2·min, 0.281993007 (V-MOUSE-PERM)
    expected = stats.permutation_test((TREATMENT, CONTROL), lambda x, y: np.mean(x) - np.mean(y),
                                      permutation_type="independent", n_resamples=np.inf).pvalue
    assert result["both"]["p_value"] == pytest.approx(expected, rel=1e-12)
    assert result["both"]["p_value"] == pytest.approx(0.2819930070, rel=1e-9)  # Source: V-MOUSE-PERM


def test_pt_mouse_monte_carlo_within_tolerance(write_plan, tmp_path):
    m = 4000
    result = run(write_plan, tmp_path, f"""
  - id: mc
    role: secondary
    data: mice
    outcome: days
    groups: {{by: group, compare: [treatment, control]}}
    statistic: mean_difference
    method: permutation
    alternative: greater
    exact: never
    resamples: {m}
""")["mc"]
    p = 1613 / 11440  # Source: V-MOUSE-PERM, exact
    assert result["exact"] is False and result["resamples"] == m
    assert abs(result["p_value"] - p) <= 4 * math.sqrt(p * (1 - p) / m)  # tolerance: V-TOL
    assert result["p_value"] >= 1 / (m + 1)


def test_bs_mouse_standard_errors_from_a_plan(write_plan, tmp_path):
    b = 2000
    result = run(write_plan, tmp_path, f"""
  - id: mean-se
    role: secondary
    data: mice
    outcome: days
    groups: {{by: group, compare: [treatment, control]}}
    statistic: mean_difference
    method: bootstrap
    resamples: {b}
""")
    # Source: V-MOUSE-STRATA / V-MOUSE-BOOT: ideal two-sample SE 26.908107910089 (exact),
    # E&T §8.3 B = 1400: 26.85 (published, as cited); tolerance ±1.7 at B = 2000 (4 s.d.)
    assert abs(result["mean-se"]["standard_error"] - 26.908107910089) <= 1.7
    assert result["mean-se"]["resamples"] == b


def test_bs_mouse_one_group_mean_and_median(write_plan, tmp_path):
    plan = write_plan("""
plan: outside-one
title: Treatment group only
seed: 7
datasets:
  treated:
    file: treated.csv
    columns:
      days: {type: number}
analyses:
  - id: mean
    data: treated
    outcome: days
    statistic: mean
    method: bootstrap
    resamples: 2000
  - id: median
    role: secondary
    data: treated
    outcome: days
    statistic: median
    method: bootstrap
    resamples: 2000
""", {"treated.csv": "days\n" + "\n".join(map(str, TREATMENT)) + "\n"})
    record = {a["id"]: a for a in run_plan(plan, out=plan.parent / "out", clock=fixed_clock).record["analyses"]}
    # Source: E&T Table 2.2, B = ∞ column (from memory 23.36 / 37.83), confirmed exactly in
    # V-MOUSE-BOOT: 23.3635234373 / 37.8346743939; MC tolerance at B = 2000: ±1.42 / ±2.12
    assert abs(record["mean"]["standard_error"] - 23.3635234373) <= 1.42
    assert abs(record["median"]["standard_error"] - 37.8346743939) <= 2.12


def test_jackknife_two_sample_se_from_a_plan(write_plan, tmp_path):
    result = run(write_plan, tmp_path, """
  - id: jack
    role: secondary
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: jackknife
""")["jack"]
    # Source: identity 6 (mouse): sqrt(s1²/n1 + s2²/n2) = 28.936067137
    assert result["standard_error"] == pytest.approx(28.936067137, rel=1e-9)
    assert result["bias"] == pytest.approx(0.0, abs=1e-9)  # identity 3: jackknife bias of a mean is 0


def test_percentile_and_bca_agree_with_scipy_bootstrap(write_plan, tmp_path):
    """Mean of the treatment group, one sample: both at B = 20000, endpoints within 4 MC s.d."""
    b = 20000
    plan = write_plan(f"""
plan: versus-scipy
title: Agreement with scipy.stats.bootstrap
seed: 99
datasets:
  treated:
    file: treated.csv
    columns:
      days: {{type: number}}
analyses:
  - id: mean
    data: treated
    outcome: days
    statistic: mean
    method: bootstrap
    resamples: {b}
    confidence: 0.9
    intervals: [percentile, bca]
""", {"treated.csv": "days\n" + "\n".join(map(str, TREATMENT)) + "\n"})
    ours = run_plan(plan, out=plan.parent / "out", clock=fixed_clock).record["analyses"][0]
    se = ours["standard_error"]
    for interval in ours["intervals"]:
        method = {"percentile": "percentile", "bca": "BCa"}[interval["method"]]
        theirs = stats.bootstrap((np.array(TREATMENT, float),), np.mean, n_resamples=b, confidence_level=0.9,
                                 method=method, rng=np.random.default_rng(5)).confidence_interval
        # MC s.d. of a 5% / 95% endpoint: sqrt(q(1-q)/B)/f(x_q), with f the normal density of the
        # bootstrap distribution (scale se) at its 5% point; both sides are random, hence sqrt(2).
        sd = math.sqrt(0.05 * 0.95 / b) / (stats.norm.pdf(stats.norm.ppf(0.05)) / se) * math.sqrt(2)
        assert abs(interval["lower"] - theirs.low) <= 4 * sd, (method, interval, theirs)
        assert abs(interval["upper"] - theirs.high) <= 4 * sd, (method, interval, theirs)


# Source: E&T Table 3.1 (law school LSAT, GPA; published, confirmed; V-LAW-JACK uses 2.76 for school 13)
LAW = [(576, 3.39), (635, 3.30), (558, 2.81), (578, 3.03), (666, 3.44), (580, 3.07), (555, 3.00), (661, 3.43),
       (651, 3.36), (605, 3.13), (653, 3.12), (575, 2.74), (545, 2.76), (572, 2.88), (594, 2.96)]
LAW_PLAN = """
plan: law
title: Law school correlation
seed: 12345
datasets:
  law:
    file: law.csv
    columns:
      lsat: {type: number}
      gpa: {type: number}
analyses:
  - id: jack
    data: law
    outcome: gpa
    predictor: lsat
    statistic: correlation
    method: jackknife
  - id: boot
    role: secondary
    data: law
    outcome: gpa
    predictor: lsat
    statistic: correlation
    method: bootstrap
    resamples: 2000
"""


def test_jk_law_and_bs_law_from_a_plan(write_plan, tmp_path):
    csv = "lsat,gpa\n" + "\n".join(f"{x},{y}" for x, y in LAW) + "\n"
    plan = write_plan(LAW_PLAN, {"law.csv": csv})
    result = {a["id"]: a for a in run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record["analyses"]}
    jack = result["jack"]
    # Source: V-LAW-JACK, exact: r = 0.776374491289, se_jack = 0.142518618602, bias = −0.006473623046
    # (E&T p. 19 prints r = .776, published, confirmed)
    assert jack["estimate"] == pytest.approx(0.776374491289407, rel=1e-12)
    assert jack["standard_error"] == pytest.approx(0.14251861860227, rel=1e-12)
    assert jack["bias"] == pytest.approx(-0.00647362304592, rel=1e-10)
    # Source: V-LAW-BOOT: SE 0.13378 (B = 10⁶, MC); tolerance ±0.0103 at B = 2000 (4 s.d.)
    assert abs(result["boot"]["standard_error"] - 0.1338) <= 0.0103
    assert "Pearson correlation of lsat and gpa" in result["boot"]["question"]
