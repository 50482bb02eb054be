"""Derived columns (`derive:` in a dataset): parsed by the row-filter parser, typed, checked, recorded,
and usable anywhere a column is."""

from __future__ import annotations

import jsonschema
import numpy as np
import pytest
from conftest import fixed_clock

from planrunner.errors import DataError, ExpressionError
from planrunner.pipeline.run import run_plan
from planrunner.plan.expr import parse_value_expression
from planrunner.plan.load import read_plan
from planrunner.record.schemas import record_schema

ROWS = [("a", 1.5, 2.0, "north"), ("a", 2.0, 3.5, "south"), ("a", 0.5, 0.75, "north"), ("a", 4.0, 4.5, "south"),
        ("a", 3.0, 2.5, "north"), ("b", 1.0, 1.25, "south"), ("b", 2.5, 2.0, "north"), ("b", 0.25, 1.5, "south"),
        ("b", 3.5, 3.0, "south"), ("b", 2.0, 2.25, "south")]


def _csv(with_change: bool = False) -> str:
    head = "g,before,after,site" + (",change" if with_change else "")
    body = [f"{g},{x},{y},{s}" + (f",{y - x}" if with_change else "") for g, x, y, s in ROWS]
    return "\n".join([head, *body]) + "\n"


PLAN = """
plan: derived
title: Derived columns
seed: 7
datasets:
  d:
    file: d.csv
    columns:
      g: {{type: category, levels: [a, b]}}
      before: {{type: number}}
      after: {{type: number}}
      site: {{type: category}}
{extra}
analyses:
  - id: change
    data: d
    outcome: {outcome}
    groups: {{by: g, compare: [a, b]}}
    statistic: mean_difference
    method: bootstrap
    resamples: 499
    intervals: [percentile]
"""


def test_value_expression_computes_what_numpy_computes():
    before = np.array([1.5, 2.0, 0.5])
    after = np.array([2.0, 3.5, 0.75])
    expression = parse_value_expression("log(after / before) * 100 - 1")
    # identity: the same arithmetic written with numpy ufuncs
    assert np.array_equal(expression.evaluate({"before": before, "after": after}),
                          np.log(after / before) * 100 - 1)
    flag = parse_value_expression("after - before > 0.4").evaluate({"before": before, "after": after})
    assert flag.dtype == bool and flag.tolist() == [True, True, False]
    assert parse_value_expression("before * 2").kind({"before": "number"}) == "number"
    assert parse_value_expression("before > 1 and true").kind({"before": "number"}) == "bool"


@pytest.mark.parametrize("text, fragment, rows", [
    ("log(before - 0.5)", "log is defined only for numbers above 0", (2,)),
    ("after / (before - 2)", "division by zero", (1,)),
    ("before * 1e308", "overflows", (1,)),  # 2e308 is beyond the largest double, 1.5e308 is not
    ("sqrt(0.6 - before)", "sqrt is defined only", (0, 1)),
])
def test_non_finite_values_name_their_rows(text, fragment, rows):
    expression = parse_value_expression(text)
    with pytest.raises(ExpressionError) as caught:
        expression.evaluate({"before": np.array([1.5, 2.0, 0.5]), "after": np.array([2.0, 3.5, 0.75])})
    assert fragment in caught.value.message and caught.value.rows == rows


def test_a_value_expression_is_never_code():
    with pytest.raises(ExpressionError):
        parse_value_expression("__import__('os').system('true')")
    with pytest.raises(ExpressionError, match="must be a number or true/false"):
        parse_value_expression("'text'")


def test_a_derived_column_gives_the_numbers_of_the_same_column_in_the_file(write_plan, tmp_path):
    # identity: deriving change = after - before equals reading the precomputed column, digit for digit
    derived = write_plan(PLAN.format(extra='    derive: {change: "after - before"}', outcome="change"),
                         {"d.csv": _csv()})
    record = run_plan(derived, out=tmp_path / "out1", clock=fixed_clock).record
    in_file = write_plan(PLAN.format(extra="      change: {type: number}", outcome="change"),
                         {"d.csv": _csv(with_change=True)}, name="file.yaml")
    reference = run_plan(in_file, out=tmp_path / "out2", clock=fixed_clock).record
    mine, theirs = record["analyses"][0], reference["analyses"][0]
    assert mine["estimate"] == theirs["estimate"]
    assert mine["intervals"] == theirs["intervals"]
    changes = {g: [y - x for gg, x, y, _ in ROWS if gg == g] for g in "ab"}
    assert mine["estimate"] == pytest.approx(np.mean(changes["a"]) - np.mean(changes["b"]), abs=1e-15)
    assert record["datasets"][0]["derived"] == [{"name": "change", "expression": "after - before", "type": "number"}]
    assert "derived" not in reference["datasets"][0]  # a dataset without derived columns keeps its shape
    jsonschema.Draft202012Validator(record_schema()).validate(record)


def test_derived_columns_in_filters_groups_strata_and_each_other(write_plan, tmp_path):
    extra = """    derive:
      ratio: "after / before"
      log_ratio: {expression: "log(ratio)", unit: log}
      improved: "after > before"
    rows_where: "ratio < 2.5"
"""
    plan = write_plan(PLAN.format(extra=extra, outcome="log_ratio").replace(
        "groups: {by: g, compare: [a, b]}", "groups: {by: improved, compare: ['true', 'false']}\n    strata: site"),
        {"d.csv": _csv()})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    kept = [(x, y) for _, x, y, _ in ROWS if y / x < 2.5]
    assert record["datasets"][0]["rows_used"] == len(kept)
    logs = {flag: [np.log(y / x) for x, y in kept if (y > x) == flag] for flag in (True, False)}
    assert record["analyses"][0]["estimate"] == pytest.approx(np.mean(logs[True]) - np.mean(logs[False]), abs=1e-14)
    assert record["analyses"][0]["unit"] == "log"
    assert [d["type"] for d in record["datasets"][0]["derived"]] == ["number", "number", "boolean"]


def test_keep_runs_before_a_derivation_it_does_not_use(write_plan, tmp_path):
    # log(before - 0.5) is undefined on the row the filter drops; the filter does not use it, so it is
    # applied first and the derivation sees only the rows kept
    extra = '    derive: {shifted: "log(before - 0.5)"}\n    rows_where: "before > 0.5"'
    plan = write_plan(PLAN.format(extra=extra, outcome="shifted"), {"d.csv": _csv()})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    assert record["datasets"][0]["rows_used"] == len(ROWS) - 2


def test_an_undefined_value_is_a_located_data_error(write_plan, tmp_path):
    plan = write_plan(PLAN.format(extra='    derive: {shifted: "log(before - 0.5)"}', outcome="shifted"),
                      {"d.csv": _csv()})
    with pytest.raises(DataError) as caught:
        run_plan(plan, out=tmp_path / "out", clock=fixed_clock)
    message = str(caught.value)
    assert "d.csv:4" in message and "line(s) 4, 9 of d.csv" in message and "log is defined only" in message


def test_plan_checks_see_derived_types(write_plan):
    extra = '    derive: {flag: "after > before"}'
    plan = write_plan(PLAN.format(extra=extra, outcome="flag").replace("mean_difference", "risk_difference"),
                      {"d.csv": _csv()})
    assert read_plan(plan).plan.datasets["d"].derived()["flag"].expression == "after > before"
    wrong = write_plan(PLAN.format(extra=extra, outcome="before").replace(
        "groups: {by: g, compare: [a, b]}", "groups: {by: g, compare: [a, b]}\n    strata: nothing"),
        {"d.csv": _csv()}, name="wrong.yaml")
    with pytest.raises(Exception, match="declares no column 'nothing'"):
        read_plan(wrong)
