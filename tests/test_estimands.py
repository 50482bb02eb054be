"""Estimands, roles and the pre-specified interval, from plan to record, reports and lock
(README: Estimands, roles and the pre-specified interval)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from planrunner.cli.main import summary_table
from planrunner.errors import PlanError
from planrunner.pipeline.run import run_plan
from planrunner.plan.load import read_plan
from planrunner.record.canonical import differences
from planrunner.report import render
from planrunner.trail.lock import build_lock, compare_with_lock
from tests.conftest import fixed_clock

# Source: V-MOUSE-BOOT (Efron & Tibshirani 1993, Table 2.1: the mouse survival data, treatment group)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]

HEADER = """
plan: estimands
title: Estimands and roles
seed: 20261203
datasets:
  d:
    file: d.csv
    columns:
      group: {type: category, levels: [treatment, control]}
      days: {type: number, unit: days}
estimands:
  survival-difference:
    population: Mice of the survival experiment
    treatment: New treatment versus control
    endpoint: Days of survival after surgery
    intercurrent_events:
      - {event: death from an unrelated cause, strategy: composite variable}
      - {event: rescue treatment, strategy: hypothetical}
    summary: Difference in mean survival, treatment minus control
analyses:
"""
CSV = "group,days\n" + "".join(f"treatment,{v}\n" for v in TREATMENT) + "".join(f"control,{v}\n" for v in CONTROL)


def analysis(aid: str, more: str, statistic: str = "mean_difference", method: str = "bootstrap") -> str:
    return f"""  - id: {aid}
    data: d
    outcome: days
    groups: {{by: group, compare: [treatment, control]}}
    statistic: {statistic}
    method: {method}
{"" if method == "jackknife" else "    resamples: 2000"}
{more}"""


def run(write_plan, tmp_path, body: str):
    plan = write_plan(HEADER + body, {"d.csv": CSV})
    return run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record


def test_first_listed_interval_is_prespecified_and_defaults_follow_the_role(write_plan, tmp_path):
    body = (analysis("main", "    role: primary\n    estimand: survival-difference\n    intervals: [bca, percentile]\n")
            + analysis("check", "    role: sensitivity\n    estimand: survival-difference\n")
            + analysis("median", "    role: secondary\n", statistic="median_difference")
            + analysis("test", "    role: secondary\n    estimand: survival-difference\n", method="permutation"))
    record = run(write_plan, tmp_path, body)
    by_id = {a["id"]: a for a in record["analyses"]}
    main = by_id["main"]
    assert [(i["method"], i["prespecified"]) for i in main["intervals"]] == [("bca", True), ("percentile", False)]
    # not listed: one interval suited to the statistic (BCa for a smooth mean difference, percentile for a median)
    assert [(i["method"], i["prespecified"]) for i in by_id["check"]["intervals"]] == [("bca", True)]
    assert [(i["method"], i["prespecified"]) for i in by_id["median"]["intervals"]] == [("percentile", True)]
    assert by_id["test"]["intervals"] == []
    assert [a["estimand"] for a in record["analyses"]] == ["survival-difference"] * 2 + [None, "survival-difference"]
    estimand = record["estimands"]["survival-difference"]
    assert estimand["intercurrent_events"][1] == {"event": "rescue treatment", "strategy": "hypothetical"}
    assert estimand["summary"] == "Difference in mean survival, treatment minus control"
    # the interval ends do not depend on which is pre-specified: the percentile interval is the
    # replicates' quantiles as scipy reads them (V-TOL: same replicates, same definition)
    percentile = main["intervals"][1]
    assert percentile["lower"] < np.mean(TREATMENT) - np.mean(CONTROL) < percentile["upper"]


def test_role_left_out_keeps_the_old_default_and_numbers(write_plan, tmp_path):
    record = run(write_plan, tmp_path, analysis("only", ""))
    only = record["analyses"][0]
    assert only["role"] == "primary" and only["estimand"] is None
    assert [(i["method"], i["prespecified"]) for i in only["intervals"]] == [("percentile", True), ("bca", False)]


def test_reports_and_terminal_label_the_supplementary_interval_and_show_the_estimand(write_plan, tmp_path):
    body = (analysis("main", "    role: primary\n    estimand: survival-difference\n    intervals: [bca, percentile]\n")
            + analysis("loose", "    role: secondary\n", method="jackknife"))
    record = run(write_plan, tmp_path, body)
    markdown = render.render(record, "md")
    assert "BCa interval, 95%, pre-specified" in markdown and "percentile interval, 95%, supplementary" in markdown
    assert "## Estimands" in markdown and "### Estimand `survival-difference`" in markdown
    assert "rescue treatment (hypothetical strategy)" in markdown and "### Analyses that name no estimand" in markdown
    assert "- Analyses: `main` (primary)" in markdown
    html = render.render(record, "html")
    assert '<section id="estimands">' in html and "<em>composite variable</em> strategy" in html
    assert "percentile interval, 95%<br><span class=\"small\">supplementary</span>" in html
    table = summary_table(record)
    assert "supplementary percentile 95%" in table and table.index("BCa 95%") < table.index("supplementary")


@pytest.mark.parametrize("body, fragment", [
    (analysis("a", "") + analysis("b", "", statistic="median_difference"),
     "a second primary analysis (an analysis without role is primary): 'a' (analyses[0]) is primary too"),
    (analysis("a", "    role: primary\n    estimand: survival-difference\n    intervals: [bca]\n")
     + analysis("b", "    estimand: survival-difference\n    intervals: [bca]\n"),
     "estimand 'survival-difference' already has a primary analysis"),
    (analysis("a", "    role: sensitivity\n"), "a sensitivity analysis names the estimand it probes"),
    (analysis("a", "    role: primary\n"), "a primary bootstrap analysis lists its intervals"),
    (analysis("a", "    estimand: survival\n"), "no estimand is named 'survival' (declared: survival-difference)"),
])
def test_role_rules_are_checked_before_data(write_plan, body, fragment):
    plan = write_plan(HEADER + body)  # no data file: check refuses the plan before any data are read
    with pytest.raises(PlanError) as caught:
        read_plan(plan)
    assert fragment in str(caught.value)


def test_one_primary_per_estimand_and_one_without(write_plan):
    body = (analysis("a", "    role: primary\n    estimand: survival-difference\n    intervals: [bca]\n")
            + analysis("b", "    intervals: [bca]\n"))  # a primary analysis of no estimand beside it
    assert len(read_plan(write_plan(HEADER + body)).plan.analyses) == 2


def test_a_changed_prespecified_interval_or_estimand_is_a_deviation_named_by_its_path(write_plan):
    body = analysis("main", "    role: primary\n    estimand: survival-difference\n    intervals: [bca, percentile]\n")
    locked = read_plan(write_plan(HEADER + body))
    lock = build_lock(plan_file="plan.yaml", plan_sha256=locked.sha256, content=locked.yaml.data,
                      locked_utc="2026-12-01T09:30:00Z", operator="ana", note=None, parameters={}, data=[])
    edited = (HEADER.replace("strategy: hypothetical", "strategy: treatment policy") + body
              .replace("[bca, percentile]", "[percentile, bca]"))
    now = read_plan(write_plan(edited, name="edited.yaml"))
    entry = compare_with_lock(lock, lock_file="plan.lock.json", plan_sha256=now.sha256, content=now.yaml.data,
                              data_now={})
    assert [d["path"] for d in entry["deviations"]] == [
        "estimands.survival-difference.intercurrent_events[1].strategy",
        "analyses[0].intervals[0]", "analyses[0].intervals[1]"]
    assert entry["deviations"][1] == {"path": "analyses[0].intervals[0]", "locked": "bca", "now": "percentile"}
    assert differences(lock["content"], locked.yaml.data) == []


def test_bootstrap_percentile_interval_agrees_with_scipy_whichever_is_prespecified(write_plan, tmp_path):
    """The flag changes no number: the supplementary percentile interval still matches scipy's on
    the same data within Monte Carlo error (V-TOL)."""
    record = run(write_plan, tmp_path, analysis(
        "main", "    role: primary\n    estimand: survival-difference\n    intervals: [bca, percentile]\n"))
    ours = record["analyses"][0]["intervals"][1]
    theirs = scipy.stats.bootstrap((np.array(TREATMENT, float), np.array(CONTROL, float)),
                                   lambda x, y, axis=-1: np.mean(x, axis=axis) - np.mean(y, axis=axis),
                                   method="percentile", n_resamples=20000, random_state=1).confidence_interval
    sd = record["analyses"][0]["monte_carlo"]["intervals"][1]
    # about 4 Monte Carlo s.d. of the difference of two independent estimates (ours at B = 2000, scipy's at 20000)
    assert abs(ours["lower"] - theirs.low) < 4 * sd["lower_sd"] * np.sqrt(1 + 2000 / 20000)
    assert abs(ours["upper"] - theirs.high) < 4 * sd["upper_sd"] * np.sqrt(1 + 2000 / 20000)


@pytest.mark.parametrize("demo", ["liner-trial", "monthly-fill", "seal-endurance"])
def test_every_estimand_of_a_demo_plan_is_targeted_and_every_primary_names_one(demo):
    from pathlib import Path

    plan = read_plan(Path(__file__).resolve().parents[1] / "plans" / demo / "plan.yaml").plan
    targeted = {a.estimand for a in plan.analyses if a.estimand is not None}
    assert plan.estimands and targeted == set(plan.estimands)  # none declared for nothing, none missing
    assert all(a.estimand is not None for a in plan.analyses if a.role == "primary")
    if demo == "seal-endurance":  # a test of equal curves estimates no summary: the log-rank tests name none
        assert {a.id for a in plan.analyses if a.estimand is None} == {"leak-logrank", "rinse-logrank"}
