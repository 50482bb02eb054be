"""Pre-specified decision rules from plan to record, reports and lock (README: Decision rules)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from planrunner.errors import PlanError
from planrunner.pipeline.run import run_plan
from planrunner.plan.load import read_plan
from planrunner.record.decisions import Z_P_INTERVAL
from planrunner.report import render
from planrunner.trail.lock import build_lock, compare_with_lock
from tests.conftest import fixed_clock

# Source: V-MOUSE-BOOT (Efron & Tibshirani 1993, Table 2.1: the mouse survival data)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]

HEADER = """
plan: decisions
title: Decision rules
seed: 20261204
datasets:
  d:
    file: d.csv
    columns:
      group: {type: category, levels: [treatment, control]}
      days: {type: number, unit: days}
analyses:
"""
CSV = "group,days\n" + "".join(f"treatment,{v}\n" for v in TREATMENT) + "".join(f"control,{v}\n" for v in CONTROL)


def analysis(aid: str, more: str, method: str = "permutation", statistic: str = "mean_difference") -> str:
    return f"""  - id: {aid}
    role: secondary
    data: d
    outcome: days
    groups: {{by: group, compare: [treatment, control]}}
    statistic: {statistic}
    method: {method}
{more}"""


def run(write_plan, tmp_path, body: str, name: str = "out"):
    plan = write_plan(HEADER + body, {"d.csv": CSV})
    return {a["id"]: a for a in run_plan(plan, out=tmp_path / name, clock=fixed_clock).record["analyses"]}


def scipy_exact_p(shift: float, alternative: str) -> float:
    """The exact permutation p-value of x − shift against y (scipy enumerates all C(16, 7) splits)."""
    x = np.array(TREATMENT, float) - shift
    y = np.array(CONTROL, float)
    return float(scipy.stats.permutation_test(
        (x, y), lambda a, b, axis=-1: np.mean(a, axis=axis) - np.mean(b, axis=axis),
        permutation_type="independent", alternative=alternative, n_resamples=np.inf).pvalue)


@pytest.mark.parametrize("low, high", [(-40.0, 80.0), (-10.0, 80.0), (-40.0, 40.0), (-60.0, 100.0)])
def test_permutation_equivalence_is_two_one_sided_tests_at_alpha(write_plan, tmp_path, low, high):
    """TOST identity (identity 22): met ⇔ both one-sided tests at the shifted nulls reject at α = (1 − c)/2; the
    two p-values are scipy's exact permutation p-values of the shifted data (scipy reference)."""
    entry = run(write_plan, tmp_path, analysis(
        "eq", "    confidence: 0.90\n    resamples: 20000\n"
              f"    decision: {{rule: equivalence, limits: [{low}, {high}]}}\n"))
    decision = entry["eq"]["decision"]
    p_low, p_high = scipy_exact_p(low, "greater"), scipy_exact_p(high, "less")
    assert decision["compared"]["value"] == pytest.approx([p_low, p_high], rel=1e-12)
    assert decision["alpha"] == 0.05 and decision["limits"] == [low, high]
    assert decision["verdict"] == ("met" if max(p_low, p_high) <= 0.05 else "not met")
    assert decision["resamples_to_resolve"] is None  # exact: all 11440 splits


def test_permutation_non_inferiority_is_the_test_at_the_shifted_null(write_plan, tmp_path):
    entry = run(write_plan, tmp_path, analysis(
        "ni", "    alternative: greater\n    resamples: 20000\n    decision: {rule: non-inferiority, margin: -20}\n"))
    decision = entry["ni"]["decision"]
    p = scipy_exact_p(-20.0, "greater")  # scipy reference
    assert decision["compared"]["value"] == pytest.approx(p, rel=1e-12)
    assert decision["benefit"] == "greater" and decision["alpha"] == 0.05 and decision["margin"] == -20.0
    assert decision["verdict"] == ("met" if p <= 0.05 else "not met")
    # superiority without a margin is the test at 0: the analysis's own one-sided p-value
    sup = run(write_plan, tmp_path, analysis("sup", "    alternative: greater\n    resamples: 20000\n"
                                                    "    decision: {rule: superiority}\n"), "sup")["sup"]
    assert sup["decision"]["margin"] == 0.0
    assert sup["decision"]["compared"]["value"] == pytest.approx(sup["p_value"], rel=1e-12)


def test_monte_carlo_permutation_decision_unresolved_when_alpha_is_in_the_p_value_interval(write_plan, tmp_path):
    """With few Monte Carlo arrangements a p-value near α is unresolved; the resamples that would
    resolve it follow z² p(1 − p)/(p − α)², z the 99% normal quantile."""
    # the shift at which scipy's exact one-sided p-value is nearest 0.05 puts p near α
    shifts = np.linspace(-60, 20, 161)
    shift = float(shifts[np.argmin([abs(scipy_exact_p(s, "greater") - 0.05) for s in shifts])])
    entry = run(write_plan, tmp_path, analysis(
        "mc", f"    alternative: greater\n    resamples: 300\n    exact: never\n"
              f"    decision: {{rule: above-limit, limit: {shift}}}\n"))
    decision = entry["mc"]["decision"]
    p = decision["compared"]["value"]
    low, high = decision["compared"]["monte_carlo"][0]
    assert low <= 0.05 <= high and decision["verdict"] == "unresolved"
    assert decision["resamples_to_resolve"] == math.ceil(Z_P_INTERVAL ** 2 * p * (1 - p) / (p - 0.05) ** 2)
    assert Z_P_INTERVAL == pytest.approx(scipy.stats.norm.ppf(0.995), rel=1e-15)  # scipy reference


def test_bootstrap_equivalence_equals_two_one_sided_percentile_tests_on_the_same_replicates(write_plan, tmp_path):
    """TOST identity on the saved replicates (identity 22): the 1 − 2α percentile interval lies inside (low, high)
    ⇔ at most αB replicates fall at or below low and at most αB at or above high. Limits inside an
    end's Monte Carlo band give 'unresolved'; elsewhere the verdict equals the independent count."""
    more = "    method: bootstrap\n    confidence: 0.90\n    intervals: [percentile]\n    resamples: 20000\n" \
           "    save_distribution: true\n"
    first = run(write_plan, tmp_path, analysis("eq", more + "    decision: {rule: equivalence, limits: [-30, 60]}\n",
                                               method="bootstrap").replace("    method: bootstrap\n", "", 1), "first")
    replicates = np.array(first["eq"]["distribution"]["values"])
    lower_band, upper_band = (first["eq"]["intervals"][0]["monte_carlo"][k] for k in ("lower", "upper"))
    cases = [(lower_band[0] - 0.5, upper_band[1] + 0.5), (lower_band[1] + 0.5, upper_band[1] + 0.5),
             (lower_band[0] - 0.5, upper_band[0] - 0.5), (np.mean(lower_band), upper_band[1] + 0.5)]
    for k, (low, high) in enumerate((float(a), float(b)) for a, b in cases):
        entry = run(write_plan, tmp_path, analysis(
            "eq", more + f"    decision: {{rule: equivalence, limits: [{low!r}, {high!r}]}}\n",
            method="bootstrap").replace("    method: bootstrap\n", "", 1), f"case{k}")["eq"]
        assert entry["distribution"]["sha256"] == first["eq"]["distribution"]["sha256"]  # same replicates
        decision = entry["decision"]
        in_band = lower_band[0] <= low <= lower_band[1] or upper_band[0] <= high <= upper_band[1]
        if in_band:
            assert decision["verdict"] == "unresolved" and decision["resamples_to_resolve"] > 20000
            continue
        alpha_b = 0.05 * replicates.size
        tost = np.sum(replicates <= low) <= alpha_b and np.sum(replicates >= high) <= alpha_b
        assert decision["verdict"] == ("met" if tost else "not met"), (low, high, decision)
    assert [c for c in cases if c[0] > lower_band[1]]  # the sweep holds a not-met case


def test_unresolved_bootstrap_end_states_the_resamples_that_would_resolve_it(write_plan, tmp_path):
    body = analysis("lim", "    intervals: [percentile]\n    resamples: 2000\n"
                           "    decision: {rule: below-limit, limit: LIMIT}\n", method="bootstrap")
    probe = run(write_plan, tmp_path, body.replace("LIMIT", "1000"), "probe")["lim"]
    end = probe["intervals"][0]["upper"]
    band = probe["intervals"][0]["monte_carlo"]["upper"]
    limit = end + 0.25 * (band[1] - end)  # inside the band, above the end
    entry = run(write_plan, tmp_path, body.replace("LIMIT", repr(limit)), "inside")["lim"]
    decision = entry["decision"]
    assert decision["verdict"] == "unresolved" and decision["compared"]["value"] == end
    # B·(h/d)²: the band reaches 4 times as far as the limit lies from the end, so 16 B
    assert decision["resamples_to_resolve"] == math.ceil(2000 * ((band[1] - end) / (limit - end)) ** 2)
    assert 31000 < decision["resamples_to_resolve"] <= 32001
    assert probe["decision"]["verdict"] == "met" and probe["decision"]["resamples_to_resolve"] is None


def test_verdict_stands_beside_the_numbers_with_the_caution(write_plan, tmp_path):
    plan = write_plan(HEADER + analysis("ni", "    alternative: greater\n    resamples: 2000\n"
                                              "    decision: {rule: non-inferiority, margin: -20}\n"), {"d.csv": CSV})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    markdown = render.render(record, "md")
    verdict = record["analyses"][0]["decision"]["verdict"]
    assert f"| Decision: non-inferiority, margin -20 (larger is better) | **{verdict}**:" in markdown
    assert "it is a computation, not a decision" in markdown and "| p-value | Decision | n |" in markdown
    html = render.render(record, "html")
    assert "<th scope=\"col\">Decision</th>" in html and f"<strong>{verdict}</strong>: " in html
    assert "it is a computation, not a decision" in html


def test_a_changed_margin_is_a_deviation_named_by_its_path(write_plan):
    body = analysis("ni", "    alternative: greater\n    decision: {rule: non-inferiority, margin: -20}\n")
    locked = read_plan(write_plan(HEADER + body))
    lock = build_lock(plan_file="plan.yaml", plan_sha256=locked.sha256, content=locked.yaml.data,
                      locked_utc="2026-12-01T09:30:00Z", operator="ana", note=None, parameters={}, data=[])
    now = read_plan(write_plan(HEADER + body.replace("margin: -20", "margin: -25"), name="edited.yaml"))
    entry = compare_with_lock(lock, lock_file="plan.lock.json", plan_sha256=now.sha256, content=now.yaml.data,
                              data_now={})
    assert entry["deviations"] == [{"path": "analyses[0].decision.margin", "locked": -20, "now": -25}]


@pytest.mark.parametrize("more, fragment", [
    ("    decision: {rule: superiority}\n", "superiority needs the direction of benefit"),
    ("    alternative: less\n    decision: {rule: equivalence, limits: [-1, 1]}\n", "equivalence reads both ends"),
    ("    alternative: greater\n    decision: {rule: below-limit, limit: 3}\n", "below-limit reads an upper end"),
    ("    decision: {rule: equivalence, limits: [1, -1]}\n", "limits must be [LOW, HIGH]"),
    ("    decision: {rule: below-limit, margin: 3}\n", "margin does not apply to rule below-limit"),
    ("    decision: {rule: non-inferiority}\n", "rule non-inferiority needs margin"),
])
def test_decision_rules_are_checked_before_data(write_plan, more, fragment):
    with pytest.raises(PlanError) as caught:
        read_plan(write_plan(HEADER + analysis("a", more)))
    assert fragment in str(caught.value)
