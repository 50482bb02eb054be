"""Reading data: declared types, missing values, filters, hashes and pins, paths."""

from __future__ import annotations

import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from planrunner.errors import DataError
from planrunner.pipeline.check import check_plan

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
                  extra="    rows_where: \"y < 3 or day < '2026-02-01'\"").tables["d"]
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
        check(write_plan, GOOD, extra="    rows_where: \"site == 'a'\"")


def test_not_utf8(write_plan, tmp_path):
    plan = write_plan(PLAN.format(file="d.csv", extra=""))
    (plan.parent / "d.csv").write_bytes(GOOD.encode("utf-8") + "a,1,1,yes,2026-01-02,\xe9\n".encode("latin-1"))
    with pytest.raises(DataError, match="not UTF-8"):
        check_plan(plan)


# --- hostile paths and files -------------------------------------------------------------------

def test_symlink_loop_is_one_message(write_plan):
    plan = write_plan(PLAN.format(file="loop.csv", extra=""))
    os.symlink("loop.csv", plan.parent / "loop.csv")  # a link to itself
    with pytest.raises(DataError, match="cannot be resolved.*points .* back to itself"):
        check_plan(plan)


def test_a_pipe_as_data_file_is_refused_without_waiting(write_plan):
    # before, the path was checked and then opened: a file swapped for a pipe in between hung the
    # run forever; now the open descriptor is what is checked, and opening never waits on a pipe
    plan = write_plan(PLAN.format(file="d.csv", extra=""))
    os.mkfifo(plan.parent / "d.csv")
    with pytest.raises(DataError, match="not a regular file"):
        check_plan(plan)


def test_a_symlink_swapped_in_after_the_check_is_not_followed(tmp_path):
    from planrunner.data.tables import read_regular_file
    (tmp_path / "real.csv").write_text(GOOD, encoding="utf-8")
    os.symlink(tmp_path / "real.csv", tmp_path / "d.csv")
    with pytest.raises(DataError, match="replaced by a symbolic link"):
        read_regular_file(tmp_path / "d.csv", "d.csv", "datasets.d.file")
    assert read_regular_file(tmp_path / "real.csv", "real.csv", "datasets.d.file") == GOOD.encode()


# --- one Unicode form, and levels that only look alike ----------------------------------------

def test_decomposed_levels_in_the_data_match_composed_levels_in_the_plan(write_plan):
    composed, decomposed = "caf\u00e9", "cafe\u0301"  # the same word, two Unicode forms
    text = PLAN.format(file="d.csv", extra="").replace("levels: [a, b]", f"levels: [{composed}, b]") \
        .replace("compare: [a, b]", f"compare: [{composed}, b]")
    rows = GOOD.replace("\na,", f"\n{decomposed},")
    checked = check_plan(write_plan(text, {"d.csv": rows}))
    assert checked.tables["d"].columns["site"].tolist().count(composed) == 2
    # and the other way round: a decomposed plan reads composed data
    text = text.replace(composed, decomposed)
    checked = check_plan(write_plan(text, {"d.csv": GOOD.replace("\na,", f"\n{composed},")}))
    assert checked.tables["d"].columns["site"].tolist().count(composed) == 2


def test_a_missing_level_that_differs_only_invisibly_shows_the_code_points(write_plan):
    text = PLAN.format(file="d.csv", extra="").replace("levels: [a, b]", "levels: [a, b, 'b\u200b']") \
        .replace("compare: [a, b]", "compare: [a, 'b\u200b']")
    with pytest.raises(DataError, match=r"group 'b\u200b' does not occur.*U\+0062 U\+200B.*'b' is U\+0062"):
        check_plan(write_plan(text, {"d.csv": GOOD}))


def test_declared_levels_that_differ_by_case_are_two_groups(write_plan):
    text = PLAN.format(file="d.csv", extra="").replace("levels: [a, b]", "levels: [a, A, b]")
    rows = GOOD + "A,9.0,5,yes,2026-02-03,v\n"
    assert check_plan(write_plan(text, {"d.csv": rows})).tables["d"].rows_used == 5


# --- integers: exact, or refused -----------------------------------------------------------------

def test_integers_beyond_2_53_keep_their_differences(write_plan):
    # 2**53 + 1 read through a double became 2**53: neighbouring ids merged
    rows = GOOD.replace(",1,yes", f",{2**53 + 1},yes").replace(",2,no", f",{2**53 + 2},no") \
        .replace(",3,true", f",{2**63 - 1},true").replace(",4,false", f",{-2**63},false")
    table = check(write_plan, rows).tables["d"]
    assert table.columns["k"].tolist() == [2**53 + 1, 2**53 + 2, 2**63 - 1, -2**63]


@pytest.mark.parametrize("value", [str(2**63), str(-2**63 - 1), "1e19", "9223372036854775807.5", "-1e300"])
def test_integers_beyond_64_bits_are_refused(write_plan, value):
    with pytest.raises(DataError, match="outside the range of a 64-bit integer"):
        check(write_plan, GOOD.replace(",1,yes", f",{value},yes"))


def test_cluster_ids_beyond_2_53_stay_distinct(write_plan):
    ids = [2**60 + i for i in range(12)]  # 12 clusters whose doubles would merge into fewer
    assert len({float(i) for i in ids}) < 12
    lines = ["g,y,c"] + [f"{'a' if i < 6 else 'b'},{1.0 + i % 5},{ids[i]}" for i in range(12) for _ in range(2)]
    plan_text = """
    plan: clusters
    title: Cluster ids
    seed: 3
    datasets:
      d:
        file: d.csv
        columns:
          g: {type: category}
          y: {type: number}
          c: {type: integer}
    analyses:
      - id: one
        data: d
        outcome: y
        groups: {by: g, compare: [a, b]}
        clusters: c
        statistic: mean_difference
        method: bootstrap
        resamples: 99
    """
    checked = check_plan(write_plan(plan_text, {"d.csv": "\n".join(lines) + "\n"}))
    job = checked.jobs[0]
    assert sum(len(set(c.tolist())) for c in job.clusters) == 12


@settings(max_examples=60, deadline=None)
@given(st.lists(st.one_of(st.integers(-2**63, 2**63 - 1), st.integers(-2**54, 2**54),
                          st.integers(2**53 - 3, 2**53 + 3)), min_size=4, max_size=4))
def test_integers_at_the_edges_read_exactly(tmp_path_factory, values):
    from planrunner.data.tables import read_table
    from planrunner.plan.schema import Dataset
    folder = tmp_path_factory.mktemp("ints")
    rows = "k\n" + "".join(f"{v}\n" for v in values)
    (folder / "d.csv").write_text(rows, encoding="utf-8")
    spec = Dataset.model_validate({"file": "d.csv", "columns": {"k": {"type": "integer"}}})
    assert read_table("d", spec, folder).columns["k"].tolist() == values
