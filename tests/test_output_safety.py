"""Strings from a plan cannot break out of the reports: HTML escaped, Markdown fenced and escaped."""

from __future__ import annotations

import re

from conftest import fixed_clock

from planrunner.pipeline.run import run_plan
from planrunner.report.render import markdown_fence as code_fence

HOSTILE = """
plan: hostile-strings
title: "<script>alert('t')</script> | **bold**"
seed: 5
description: |
  A description that holds a fence of its own:
  ````
  <img src=x onerror=alert(1)>
  ````
report:
  note: "<iframe src='x'></iframe> | col"
datasets:
  d:
    file: d.csv
    columns:
      g: {type: category, levels: [a, b]}
      "minutes above": {type: number}
    rows_where: "`minutes above` >= 0"
analyses:
  - id: one
    title: "<b>x</b> | y"
    data: d
    outcome: minutes above
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: jackknife
"""
DATA = "g,minutes above\na,1\na,2\na,4\nb,3\nb,5\nb,9\n"


def test_code_fence_is_longer_than_any_backtick_run():
    assert code_fence("no ticks") == "```"  # identity: the shortest CommonMark fence
    assert code_fence("a `b` c") == "```"
    assert code_fence("````\nx\n````") == "`````"
    assert code_fence("`" * 9) == "`" * 10


def test_hostile_plan_strings_are_escaped(write_plan, tmp_path):
    plan = write_plan(HOSTILE, {"d.csv": DATA})
    folder = run_plan(plan, out=tmp_path / "out", clock=fixed_clock, operator="<op>").folder
    html = (folder / "report.html").read_text(encoding="utf-8")
    for raw in ("<script>", "<img src=x", "<iframe", "<b>x</b>", "<op>"):
        assert raw not in html, raw
    assert "&lt;script&gt;" in html and "&lt;b&gt;x&lt;/b&gt;" in html

    md = (folder / "report.md").read_text(encoding="utf-8")
    fence = "`````"  # the description holds a run of four backticks
    opening = md.index(f"\n{fence}yaml\n") + 1
    closing = md.index(f"\n{fence}\n", opening) + 1
    inside = md[opening + len(fence) + len("yaml\n"):closing]
    assert inside.rstrip("\n") == plan.read_text(encoding="utf-8").rstrip("\n")  # the plan, whole
    assert not any(re.match(r"^\s*`{5,}", line) for line in inside.splitlines())
    outside = md[:opening] + md[closing:]
    for raw in ("<script>", "<iframe", "<b>x</b>", "<op>"):
        assert raw not in outside, raw
    title_line = next(line for line in outside.splitlines() if line.startswith("# "))
    assert "\\|" in title_line  # a pipe cannot split a table cell or heading
