"""Reading data: declared types, missing values, filters, hashes and pins, paths."""

from __future__ import annotations

import os

import numpy as np
import pytest

from planrunner.errors import DataError
from planrunner.pipeline.run import check_plan

PLAN = """
plan: data-check
title: Data checks
seed: 3
datasets:
  d:
    file: {file}
    columns:
      site: {{type: category, levels: [a, b]}}
      y: {{type: number, min: 0}}
      k: {{type: integer}}
      ok: {{type: boolean}}
      day: {{type: date}}
{extra}
analyses:
  - id: one
    data: d
    outcome: y
    groups: {{by: site, compare: [a, b]}}
    statistic: mean_difference
    method: jackknife
"""
GOOD = """site,y,k,ok,day,note
a,1.5,1,yes,2026-01-02,x
a,2.5,2,no,2026-01-03,y
b,3.0,3,true,2026-02-01,z
b,0.5,4,false,2026-02-02,w
"""


def check(write_plan, csv_text, extra="", file="d.csv"):
    plan = write_plan(PLAN.format(file=file, extra=extra), {file: csv_text} if csv_text is not None else {})
    return check_plan(plan)


def test_types_are_converted(write_plan):
    table = check(write_plan, GOOD).tables["d"]
    assert table.columns["y"].dtype == float and table.columns["k"].dtype == np.int64
    assert table.columns["ok"].tolist() == [True, False, True, False]
    assert table.columns["day"].dtype == np.dtype("datetime64[D]")
    assert table.rows_read == table.rows_used == 4


@pytest.mark.parametrize("bad, fragment", [
    ("a,abc,1,yes,2026-01-02,x", "are not finite numbers, e.g. 'abc' on line(s) 6"),
    ("a,inf,1,yes,2026-01-02,x", "are not finite numbers"),
    ("a,1,1.5,yes,2026-01-02,x", "are not whole numbers"),
    ("c,1,1,yes,2026-01-02,x", "not among the declared levels"),
    ("a,-1,1,yes,2026-01-02,x", "outside the declared min 0"),
    ("a,1,1,maybe,2026-01-02,x", "are not true/false"),
    ("a,1,1,yes,02/01/2026,x", "YYYY-MM-DD"),
    ("a,,1,yes,2026-01-02,x", "missing value(s) on line(s) 6"),
])
def test_bad_values_name_column_and_line(write_plan, bad, fragment):
    with pytest.raises(DataError) as caught:
        check(write_plan, GOOD + bad + "\n")
    assert fragment in str(caught.value) and "d.csv" in str(caught.value)


def test_missing_rows_dropped_and_counted(write_plan):
    table = check(write_plan, GOOD + "a,,1,yes,2026-01-02,x\nb,NA,1,yes,2026-01-02,x\n",
                  extra="    missing: drop").tables["d"]
    assert table.rows_read == 6 and table.rows_used == 4
    assert [(e.reason, e.rows, e.lines) for e in table.excluded] == [("missing value in 'y'", 2, (6, 7))]


def test_keep_filter_counts_exclusions(write_plan):
    # one more row of group b, so that the jackknife still has two rows there after the filter
    table = check(write_plan, GOOD + "b,1.0,5,no,2026-02-03,v\n",
                  extra="    keep: \"y < 3 or day < '2026-02-01'\"").tables["d"]
    assert table.rows_used == 4
    assert table.excluded[0].rows == 1 and table.excluded[0].lines == (4,)


def test_missing_column_names_the_header(write_plan):
    with pytest.raises(DataError) as caught:
        check(write_plan, GOOD.replace("day,", "date,"))
    assert "missing from the header: day" in str(caught.value)


def test_missing_file_and_empty_file(write_plan):
    with pytest.raises(DataError, match="data file not found"):
        check(write_plan, None)
    with pytest.raises(DataError, match="empty"):
        check(write_plan, "")


def test_sha256_pin(write_plan):
    checked = check(write_plan, GOOD)
    digest = checked.tables["d"].sha256
    assert check(write_plan, GOOD, extra=f"    sha256: '{digest}'").tables["d"].sha256 == digest
    with pytest.raises(DataError, match="the file has changed"):
        check(write_plan, GOOD + "a,1,1,yes,2026-01-02,x\n", extra=f"    sha256: '{digest}'")


def test_symlink_out_of_the_plan_folder_is_refused(write_plan, tmp_path_factory):
    outside = tmp_path_factory.mktemp("outside") / "secret.csv"
    outside.write_text(GOOD, encoding="utf-8")
    plan = write_plan(PLAN.format(file="link.csv", extra=""))
    os.symlink(outside, plan.parent / "link.csv")
    with pytest.raises(DataError, match="outside"):
        check_plan(plan)


def test_empty_group_after_filter(write_plan):
    with pytest.raises(DataError, match=r"no rows of group 'b' \(column 'site'\) are left"):
        check(write_plan, GOOD, extra="    keep: \"site == 'a'\"")


def test_not_utf8(write_plan, tmp_path):
    plan = write_plan(PLAN.format(file="d.csv", extra=""))
    (plan.parent / "d.csv").write_bytes(GOOD.encode("utf-8") + "a,1,1,yes,2026-01-02,\xe9\n".encode("latin-1"))
    with pytest.raises(DataError, match="not UTF-8"):
        check_plan(plan)
