"""The results dataset (results.csv, results.parquet): record/results.py.

Schema-checked: the CSV header and the Parquet schema are exactly the documented columns (README
table, COLUMNS), and every number equals the record's (the record is the single source of truth).
"""

from __future__ import annotations

import csv
import re
from pathlib import Path

import pytest

from planrunner.pipeline.run import run_plan
from planrunner.record.results import COLUMNS, NAMES

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def ward_run(tmp_path_factory):
    # ward-hygiene: permutation tests, a shift interval, a max-t family, analysis sets
    import shutil
    folder = tmp_path_factory.mktemp("ward")
    shutil.copytree(ROOT / "plans" / "ward-hygiene", folder / "plan")
    return run_plan(folder / "plan" / "plan.yaml", out=folder / "runs", history=False)


@pytest.fixture(scope="module")
def monthly_run(tmp_path_factory):
    # monthly-fill: estimands, a supplementary interval, an equivalence and a below-limit decision
    import shutil
    folder = tmp_path_factory.mktemp("monthly")
    shutil.copytree(ROOT / "plans" / "monthly-fill", folder / "plan")
    return run_plan(folder / "plan" / "plan.yaml", out=folder / "runs", history=False)


def _number(text: str) -> float | None:
    return None if text == "" else float(text)


def _csv_table(run) -> list[dict[str, str]]:
    with (run.folder / "results.csv").open(newline="") as handle:
        rows = list(csv.reader(handle))
    assert tuple(rows[0]) == NAMES
    return [dict(zip(NAMES, r)) for r in rows[1:]]


def test_results_csv_has_the_documented_columns_and_the_records_numbers(ward_run):
    record = ward_run.record
    with (ward_run.folder / "results.csv").open(newline="") as handle:
        rows = list(csv.reader(handle))
    assert tuple(rows[0]) == NAMES
    table = [dict(zip(NAMES, r)) for r in rows[1:]]
    assert {r["run_id"] for r in table} == {record["run_id"]}
    assert {r["plan_sha256"] for r in table} == {record["plan"]["sha256"]}
    by = {(r["analysis"], r["quantity"], r["interval_method"] or r["adjustment"]): r for r in table}
    hashes = {d["name"]: d["sha256"] for d in record["datasets"]}
    for a in record["analyses"]:
        assert _number(by[(a["id"], "estimate", "")]["value"]) == a["estimate"]
        assert by[(a["id"], "estimate", "")]["data_sha256"] == hashes[a["data"]]
        assert by[(a["id"], "estimate", "")]["set"] == (a.get("set") or "")
        assert int(by[(a["id"], "estimate", "")]["n"]) == sum(a["n"]["groups"].values())
        if a["p_value"] is not None:
            row = by[(a["id"], "p_value", "")]
            assert _number(row["value"]) == a["p_value"]
            assert _number(row["monte_carlo_sd"]) == a["monte_carlo"]["p_value_sd"]
        for adjusted in a["adjusted_p_values"]:
            assert _number(by[(a["id"], "p_value_adjusted", adjusted["method"])]["value"]) == adjusted["p_value"]
        for interval in a["intervals"]:
            row = by[(a["id"], "interval", interval["method"])]
            assert (_number(row["lower"]), _number(row["upper"]), float(row["level"])) == (
                interval["lower"], interval["upper"], interval["level"])
    assert by[("within-ward-change", "estimate", "")]["set"] == "dispenser_wards"
    assert len(table) == sum(1 + (a["p_value"] is not None) + len(a["intervals"]) + len(a["adjusted_p_values"])
                             + (a["standard_error"] is not None) + (a["bias"] is not None)
                             + (a.get("decision") is not None)
                             for a in record["analyses"])


def test_results_carry_the_estimand_the_prespecified_interval_and_the_decision(monthly_run):
    record = monthly_run.record
    table = _csv_table(monthly_run)
    analyses = {a["id"]: a for a in record["analyses"]}
    # the estimand on every row of an analysis, as the record names it
    for row in table:
        assert row["estimand"] == (analyses[row["analysis"]]["estimand"] or "")
    assert {r["estimand"] for r in table} == {"head-difference", "fill-spread"}
    # prespecified on interval rows only: the record's flag, true for the first interval listed
    for row in table:
        if row["quantity"] != "interval":
            assert row["prespecified"] == ""
    for a in record["analyses"]:
        flags = [r["prespecified"] for r in table if r["analysis"] == a["id"] and r["quantity"] == "interval"]
        assert flags == [("true" if i["prespecified"] else "false") for i in a["intervals"]]
        assert flags[:1] in ([], ["true"]) and "true" not in flags[1:]
    assert [r["prespecified"] for r in table if r["analysis"] == "head-difference"
            and r["quantity"] == "interval"] == ["true", "false"]  # percentile pre-specified, BCa supplementary
    # one decision row per analysis with a rule: the rule, its threshold(s) and the verdict of the record
    decisions = {r["analysis"]: r for r in table if r["quantity"] == "decision"}
    assert set(decisions) == {a["id"] for a in record["analyses"] if a["decision"] is not None}
    assert set(decisions) == {"heads-equivalent", "fill-spread"}
    for analysis, row in decisions.items():
        decision = analyses[analysis]["decision"]
        limits = decision["limits"] or [None, None]
        assert (row["decision_rule"], row["verdict"]) == (decision["rule"], decision["verdict"])
        assert (_number(row["margin"]), _number(row["limit"]), _number(row["lower_limit"]),
                _number(row["upper_limit"])) == (decision["margin"], decision["limit"], *limits)
        assert row["value"] == "" and row["lower"] == "" and row["upper"] == ""
    # the plan's own thresholds (plans/monthly-fill/plan.yaml), read from the CSV
    assert (decisions["heads-equivalent"]["decision_rule"], _number(decisions["heads-equivalent"]["lower_limit"]),
            _number(decisions["heads-equivalent"]["upper_limit"])) == ("equivalence", -0.05, 0.05)
    assert (decisions["fill-spread"]["decision_rule"], _number(decisions["fill-spread"]["limit"])) == (
        "below-limit", 0.08)
    for row in table:
        if row["quantity"] != "decision":
            assert row["decision_rule"] == row["verdict"] == row["limit"] == ""


@pytest.mark.parametrize("which", ["ward_run", "monthly_run"])
def test_results_parquet_has_the_documented_types(which, request):
    pq = pytest.importorskip("pyarrow.parquet")
    run = request.getfixturevalue(which)
    table = pq.read_table(run.folder / "results.parquet")
    assert table.column_names == list(NAMES)
    kinds = {"string": "string", "double": "double", "int64": "int64", "bool": "bool"}
    assert [str(f.type) for f in table.schema] == [kinds[k] for _, k, _ in COLUMNS]
    with (run.folder / "results.csv").open(newline="") as handle:
        csv_rows = list(csv.DictReader(handle))
    parquet_rows = table.to_pylist()
    assert len(parquet_rows) == len(csv_rows)
    for ours, theirs in zip(parquet_rows, csv_rows):
        for name, kind, _ in COLUMNS:
            text = theirs[name]
            expected = None if text == "" else (float(text) if kind == "double" else
                                               int(text) if kind == "int64" else
                                               {"true": True, "false": False}[text] if kind == "bool" else text)
            assert ours[name] == expected, name


def test_every_documented_column_is_in_the_readme_table():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Results dataset", 1)[1].split("\n## ", 1)[0]
    documented = []
    for cells in re.findall(r"^\| (`[^|]+`) \| (\w+) \|", section, flags=re.M):
        for name in re.findall(r"`([a-z_0-9]+)`", cells[0]):
            documented.append((name, cells[1]))
    assert documented == [(name, kind) for name, kind, _ in COLUMNS]
