"""The descriptive table (`analyses[].descriptives`): per group and stratum, checked against
Python's statistics module and against the dataset's own exclusion counts."""

from __future__ import annotations

import statistics

import pytest
from conftest import fixed_clock

from planrunner.pipeline.run import run_plan
from planrunner.record.schemas import record_schema
from planrunner.report import render as report

ROWS = [  # clinic, arm, site, hours, improved
    ("c1", "new", "east", "41.5", "1"), ("c1", "new", "east", "38.0", "0"), ("c2", "new", "west", "35.25", "1"),
    ("c2", "new", "west", "NA", "1"), ("c3", "new", "west", "44.0", "1"), ("c3", "new", "east", "39.5", "0"),
    ("c4", "usual", "east", "45.0", "0"), ("c4", "usual", "east", "47.5", "1"), ("c5", "usual", "west", "43.0", "0"),
    ("c5", "usual", "west", "51.0", "0"), ("c6", "usual", "east", "999", "0"), ("c6", "usual", "west", "46.5", "1"),
    ("c6", "usual", "east", "", "0"), ("c7", "new", "east", "999", "1"),
]

PLAN = """
plan: described
title: descriptive table
seed: 3
datasets:
  d:
    file: d.csv
    columns:
      clinic: {type: text}
      arm: {type: category, levels: [new, usual]}
      site: {type: category, levels: [east, west]}
      hours: {type: number}
      improved: {type: boolean}
    missing: drop
    rows_where: "hours < 900"
analyses:
  - id: hours
    data: d
    outcome: hours
    groups: {by: arm, compare: [new, usual]}
    strata: site
    clusters: clinic
    statistic: mean_difference
    method: jackknife
  - id: improved
    role: secondary
    data: d
    outcome: improved
    groups: {by: arm, compare: [new, usual]}
    statistic: risk_difference
    method: permutation
    resamples: 199
"""


def write(write_plan, scale=1.0, shift=0.0):
    lines = ["clinic,arm,site,hours,improved"]
    for clinic, arm, site, hours, improved in ROWS:  # 999 marks a failed reading, removed by the rows_where filter
        value = hours if hours in ("", "NA") else repr(float(hours) * scale + shift)
        lines.append(",".join((clinic, arm, site, value, improved)))
    plan = PLAN.replace("hours < 900", f"hours < {900.0 * scale + shift!r}")
    return write_plan(plan, {"d.csv": "\n".join(lines) + "\n"})


@pytest.fixture
def record(write_plan, tmp_path):
    return run_plan(write(write_plan), out=tmp_path / "runs", operator="t", clock=fixed_clock).record


def kept(arm, site=None):
    return [float(h) for c, a, s, h, _ in ROWS
            if a == arm and (site is None or s == site) and h not in ("", "NA", "999")]


def test_each_cell_matches_the_statistics_module(record):
    described = record["analyses"][0]["descriptives"]
    assert "definition 7" in described["quartiles"]
    rows = {(r["group"], r["stratum"]): r for r in described["rows"]}
    assert list(rows) == [("new", None), ("new", "east"), ("new", "west"),
                          ("usual", None), ("usual", "east"), ("usual", "west")]
    for (arm, site), row in rows.items():
        values = kept(arm, site)
        # Source: Python's statistics module (reference functions); quantiles(method="inclusive") is
        # Hyndman & Fan's definition 7, numpy's default
        q1, median, q3 = statistics.quantiles(values, n=4, method="inclusive")
        assert row["n"] == len(values)
        assert row["mean"] == pytest.approx(statistics.fmean(values), rel=1e-14)
        assert row["sd"] == pytest.approx(statistics.stdev(values), rel=1e-12)
        assert row["median"] == pytest.approx(statistics.median(values), rel=1e-14)
        assert (row["q1"], row["q3"]) == (pytest.approx(q1, rel=1e-14), pytest.approx(q3, rel=1e-14))
        assert (row["min"], row["max"]) == (min(values), max(values))
        assert row["events"] is None and row["proportion"] is None
    # clusters: distinct clinics among the rows used
    assert rows[("new", None)]["clusters"] == 3 and rows[("usual", None)]["clusters"] == 3  # c7 only at 999
    assert rows[("usual", "east")]["clusters"] == 1


def test_missing_and_excluded_counts_add_up_to_the_datasets(record):
    rows = {(r["group"], r["stratum"]): r for r in record["analyses"][0]["descriptives"]["rows"]}
    assert (rows[("new", None)]["missing"], rows[("new", None)]["excluded"]) == (1, 1)
    assert (rows[("usual", None)]["missing"], rows[("usual", None)]["excluded"]) == (1, 1)
    assert (rows[("usual", "east")]["missing"], rows[("usual", "west")]["missing"]) == (1, 0)
    excluded = {e["reason"]: e["rows"] for e in record["datasets"][0]["excluded"]}
    assert sum(rows[(g, None)]["missing"] for g in ("new", "usual")) == excluded["missing value in 'hours'"]
    assert sum(rows[(g, None)]["excluded"] for g in ("new", "usual")) == excluded["rows_where: hours < 900.0"]


def test_a_binary_outcome_gets_events_and_proportion(record):
    rows = {r["group"]: r for r in record["analyses"][1]["descriptives"]["rows"]}
    for arm in ("new", "usual"):
        used = [int(i) for c, a, s, h, i in ROWS if a == arm and h not in ("", "NA", "999")]
        assert rows[arm]["events"] == sum(used) and rows[arm]["n"] == len(used)
        assert rows[arm]["proportion"] == pytest.approx(sum(used) / len(used), rel=1e-15)


def test_shift_and_scale_move_the_numbers_as_they_should(write_plan, tmp_path, record):
    moved = run_plan(write(write_plan, scale=1e6, shift=-3e7), out=tmp_path / "moved", operator="t",
                     clock=fixed_clock).record["analyses"][0]["descriptives"]["rows"]
    for before, after in zip(record["analyses"][0]["descriptives"]["rows"], moved):
        for key in ("mean", "median", "q1", "q3", "min", "max"):
            assert after[key] == pytest.approx(before[key] * 1e6 - 3e7, rel=1e-12, abs=1e-3)
        assert after["sd"] == pytest.approx(before["sd"] * 1e6, rel=1e-9)
        assert after["n"] == before["n"] and after["missing"] == before["missing"]


def test_the_schema_describes_it_and_both_reports_show_it(record):
    import jsonschema

    jsonschema.validate(record, record_schema())
    html, md = report.render(record, "html"), report.render(record, "md")
    assert "Data by group and stratum: <code>hours</code>" in html and "<th scope=\"col\">Clusters</th>" in html
    assert "Data by group: `improved` (0/1)" in md and "| Events | Proportion |" in md
    old = {**record, "analyses": [{k: v for k, v in a.items() if k != "descriptives"} for a in record["analyses"]]}
    assert "Data by group" not in report.render(old, "html")  # a record from before the field
