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


def _number(text: str) -> float | None:
    return None if text == "" else float(text)


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
                             for a in record["analyses"])


def test_results_parquet_has_the_documented_types(ward_run):
    pq = pytest.importorskip("pyarrow.parquet")
    table = pq.read_table(ward_run.folder / "results.parquet")
    assert table.column_names == list(NAMES)
    kinds = {"string": "string", "double": "double", "int64": "int64"}
    assert [str(f.type) for f in table.schema] == [kinds[k] for _, k, _ in COLUMNS]
    with (ward_run.folder / "results.csv").open(newline="") as handle:
        csv_rows = list(csv.DictReader(handle))
    parquet_rows = table.to_pylist()
    assert len(parquet_rows) == len(csv_rows)
    for ours, theirs in zip(parquet_rows, csv_rows):
        for name, kind, _ in COLUMNS:
            text = theirs[name]
            expected = None if text == "" else (float(text) if kind == "double" else
                                               int(text) if kind == "int64" else text)
            assert ours[name] == expected, name


def test_every_documented_column_is_in_the_readme_table():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("### Results dataset", 1)[1].split("\n## ", 1)[0]
    documented = []
    for cells in re.findall(r"^\| (`[^|]+`) \| (\w+) \|", section, flags=re.M):
        for name in re.findall(r"`([a-z_0-9]+)`", cells[0]):
            documented.append((name, cells[1]))
    assert documented == [(name, kind) for name, kind, _ in COLUMNS]
