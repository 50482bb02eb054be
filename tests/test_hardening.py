"""The data checks and resource limits behind the corpus: what passes, what the estimates count."""

from __future__ import annotations

import json
import math

import pytest

from planrunner.cli import main as cli
from planrunner.compile import limits
from planrunner.data.checks import check_analysis
from planrunner.data.tables import read_table
from planrunner.errors import DataError
from planrunner.pipeline import check as checker
from planrunner.pipeline import run as runner
from planrunner.plan.schema import Plan

PLAN = """
plan: hardening
title: Hardening checks
seed: 2
datasets:
  d:
    file: d.csv
    columns:
      g: {{type: {gtype}}}
      y: {{type: number}}
      unit: {{type: category}}
analyses:
  - id: one
    data: d
    outcome: y
    groups: {{by: g, compare: [{first}, {second}]}}
    statistic: mean_difference
    method: {method}
"""


def plan_of(write_plan, csv, gtype="category", first="a", second="b", method="jackknife", **design):
    text = PLAN.format(gtype=gtype, first=first, second=second, method=method)
    for key, value in design.items():
        text = text.replace("    statistic:", f"    {key}: {value}\n    statistic:")
    return write_plan(text, {"d.csv": csv})


def analysis_and_table(path):
    import yaml
    plan = Plan.model_validate(yaml.safe_load(path.read_text(encoding="utf-8")))
    return plan.analyses[0], read_table("d", plan.datasets["d"], path.parent)


def test_undeclared_columns_are_ignored_and_recorded(write_plan, tmp_path, capsys):
    path = plan_of(write_plan, "g,y,unit,note,\na,1,u,x,\na,2,u,x,\nb,3,u,x,\nb,5,u,x,\n")
    assert cli.main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "ignored columns: note, (unnamed column 5)" in out
    # jackknife of 4 rows: 8 bytes * 4 replicates kept, twice, plus the 32 * 2,000,000 batch allowance
    assert "memory for the analyses: about 61 MB" in out  # the README rule: 64,000,064 bytes
    folder = runner.run_plan(path, out=tmp_path / "out", operator="t").folder
    record = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    assert record["datasets"][0]["ignored_columns"] == ["note", "(unnamed column 5)"]


def test_boolean_groups_and_byte_order_mark(write_plan):
    csv = "\ufeffg,y,unit\nyes,1,u\nTRUE,2,u\nno,3,u\n0,5,u\n"
    path = plan_of(write_plan, csv, gtype="boolean", first="'true'", second="'false'")
    checked = runner.check_plan(path)
    assert checked.tables["d"].values_read["g"] == ("false", "true")
    assert [s.tolist() for s in checked.jobs[0].samples] == [[1.0, 2.0], [3.0, 5.0]]


def test_complete_pairs_and_clusters_within_groups_pass(write_plan):
    pairs = plan_of(write_plan, "g,y,unit\na,1,u1\nb,2,u1\na,3,u2\nb,5,u2\n", pairs="unit")
    check_analysis(*analysis_and_table(pairs))  # no error: each pair has one row per group
    clusters = plan_of(write_plan, "g,y,unit\na,1,c1\na,2,c1\nb,3,c2\nb,5,c3\n", clusters="unit")
    check_analysis(*analysis_and_table(clusters))


def test_a_binary_outcome_of_no_events_is_not_refused(write_plan, tmp_path):
    text = """
    plan: no-events
    title: No events
    seed: 3
    datasets:
      d:
        file: d.csv
        columns: {failed: {type: boolean}}
    analyses:
      - {id: rate, data: d, outcome: failed, statistic: proportion, method: bootstrap, resamples: 99}
    """
    path = write_plan(text, {"d.csv": "failed\nno\nno\nno\nno\n"})
    record = runner.run_plan(path, out=tmp_path / "out", operator="t").record
    assert record["analyses"][0]["estimate"] == 0.0  # identity: no events, proportion 0


def test_arrangements_count_within_strata(write_plan):
    csv = "g,y,unit\n" + "a,1,p\na,2,p\na,3,q\nb,4,p\nb,5,q\nb,6,q\nb,7,q\n"
    path = plan_of(write_plan, csv, method="permutation", strata="unit")
    job = runner.check_plan(path).jobs[0]
    # stratum p: 2 of a, 1 of b -> C(3, 2); stratum q: 1 of a, 3 of b -> C(4, 1)
    assert limits.arrangements(job) == math.comb(3, 2) * math.comb(4, 1)  # identity: product over strata
    assert limits.draws_kept(job) == 12  # auto: all 12 arrangements are enumerated (12 <= 9999)


def test_memory_estimate_follows_the_stated_rule(write_plan, monkeypatch):
    csv = "g,y,unit\na,1,u\na,2,u\na,4,u\nb,3,u\nb,5,u\nb,9,u\n"
    path = plan_of(write_plan, csv, method="bootstrap").read_text(encoding="utf-8")
    path = write_plan(path.replace("method: bootstrap", "method: bootstrap\n    resamples: 100000"), {"d.csv": csv})
    job = runner.check_plan(path).jobs[0]
    # kept 8*B, plus for the largest analysis 8*B more and 32 bytes * 2,000,000 draws
    assert limits.estimate_run_bytes([job]) == 8 * 100_000 * 2 + 32 * 2_000_000  # the README rule
    monkeypatch.setattr(checker, "available_memory", lambda: 10_000_000)
    with pytest.raises(DataError, match="the run needs about 63 MB of memory, more than the 7.6 MB"):
        runner.check_plan(path)
    monkeypatch.setattr(checker, "available_memory", lambda: None)  # unknown: no refusal
    assert runner.check_plan(path).jobs


def test_available_memory_is_a_positive_number_here():
    available = checker.available_memory()
    assert available is None or available > 0


def test_windows_line_endings_and_trailing_commas_read_as_usual(write_plan, tmp_path):
    path = plan_of(write_plan, "")
    (path.parent / "d.csv").write_bytes(b"g,y,unit,\r\na,1,u,\r\na,2,u,\r\n\r\nb,x,u,\r\nb,5,u,\r\n")
    with pytest.raises(DataError, match=r"e\.g\. 'x' on line\(s\) 5"):  # the blank line 4 is counted
        runner.check_plan(path)
    (path.parent / "d.csv").write_bytes(b"g,y,unit,\r\na,1,u,\r\na,2,u,\r\n\r\nb,3,u,\r\nb,5,u,\r\n")
    table = runner.check_plan(path).tables["d"]
    assert table.lines.tolist() == [2, 3, 5, 6] and table.ignored_columns == ("(unnamed column 4)",)


def test_ragged_row_after_a_quoted_field_names_its_line(write_plan):
    path = plan_of(write_plan, 'g,y,unit\na,1,"two\nlines"\na,2,u\nb,3\nb,5,u\n')
    with pytest.raises(DataError, match=r"line 5 has 2 field\(s\) but the header \(line 1\) has 3"):
        runner.check_plan(path)
