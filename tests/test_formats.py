"""Data formats beside CSV: XPT v5, CDISC Dataset-JSON, Parquet and .xlsx (planrunner/data/formats.py).

The acceptance check: one frame written as CSV, TSV, XPT, Dataset-JSON, Parquet and .xlsx by
outside writers (pandas, pyarrow, openpyxl; pyreadstat for XPT) gives the same record numbers.
The XPT reader is our own; it is checked against the IBM floating-point definition and against
an independent reader of files written by an independent writer (pyreadstat).
"""

from __future__ import annotations

import datetime as dt
import json
import math
import struct
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planrunner.data import formats
from planrunner.data.tables import read_table
from planrunner.data.xpt import ibm_to_double, read_xpt
from planrunner.errors import DataError
from planrunner.pipeline.run import run_plan
from planrunner.plan.schema import Dataset

pyarrow = pytest.importorskip("pyarrow")  # in the test extra: present in CI
openpyxl = pytest.importorskip("openpyxl")
pyreadstat = pytest.importorskip("pyreadstat")

PLAN = """plan: formats-{ext}
title: One frame in six formats
seed: 11
datasets:
  d:
    file: d.{ext}{sheet}
    columns:
      arm: {{type: category, levels: [drug, placebo]}}
      score: {{type: number}}
      visits: {{type: integer, min: 0}}
      day: {{type: date}}
    missing: drop
    rows_where: day >= '2025-01-03'
analyses:
  - id: diff
    data: d
    outcome: score
    groups: {{by: arm, compare: [drug, placebo]}}
    statistic: mean_difference
    method: bootstrap
    resamples: 299
  - id: visits
    role: secondary
    data: d
    outcome: visits
    groups: {{by: arm, compare: [drug, placebo]}}
    statistic: mean_difference
    method: permutation
    resamples: 299
"""


def frame() -> pd.DataFrame:
    rng = np.random.default_rng(20260)
    n = 36
    out = pd.DataFrame({"arm": rng.choice(["drug", "placebo"], n),
                        "score": np.round(rng.normal(10, 2, n), 3),
                        "visits": rng.integers(0, 9, n),
                        "day": [dt.date(2025, 1, 1) + dt.timedelta(days=i) for i in range(n)]})
    out.loc[3, "score"] = 0.0  # an IBM zero (pandas' own XPT reader reads it as 5.4e-79)
    out.loc[5, "score"] = -1e-7
    out.loc[7, "score"] = np.nan  # a missing value in every format: dropped
    return out


def write_all(df: pd.DataFrame, folder: Path) -> None:
    df.to_csv(folder / "d.csv", index=False)
    df.to_csv(folder / "d.tsv", sep="\t", index=False)
    pyreadstat.write_xport(df, str(folder / "d.xpt"), file_format_version=5, table_name="D",
                           column_labels=["Arm", "Score (points)", "Visits", "Visit day"])
    df.to_parquet(folder / "d.parquet")
    df.to_excel(folder / "d.xlsx", sheet_name="scores", index=False)
    columns = [("arm", "string"), ("score", "double"), ("visits", "integer"), ("day", "date")]
    rows = [[r.arm, None if math.isnan(r.score) else float(r.score), int(r.visits), r.day.isoformat()]
            for r in df.itertuples()]
    (folder / "d.json").write_text(json.dumps({
        "datasetJSONVersion": "1.1.0", "name": "D", "label": "Scores", "records": len(rows),
        "columns": [{"itemOID": f"IT.{n.upper()}", "name": n, "label": n.title(), "dataType": t} for n, t in columns],
        "rows": rows}))


def test_one_frame_in_six_formats_gives_identical_numbers(tmp_path: Path):
    write_all(frame(), tmp_path)
    seen = {}
    for ext in ("csv", "tsv", "xpt", "json", "parquet", "xlsx"):
        plan = tmp_path / f"plan_{ext}.yaml"
        plan.write_text(PLAN.format(ext=ext, sheet="\n    sheet: scores" if ext == "xlsx" else ""))
        record = run_plan(plan, out=tmp_path / f"runs_{ext}", history=False).record
        (dataset,) = record["datasets"]
        assert dataset["format"] == formats.format_of(Dataset.model_validate(
            {"file": f"d.{ext}", "columns": {"x": {"type": "text"}}}), Path(f"d.{ext}"))
        seen[ext] = (dataset["rows_read"], dataset["rows_used"], [e["rows"] for e in dataset["excluded"]],
                     [(a["estimate"], a["p_value"], a["standard_error"],
                       [(i["lower"], i["upper"]) for i in a["intervals"]]) for a in record["analyses"]])
    assert seen["csv"][:3] == (36, 33, [1, 2])
    for ext, numbers in seen.items():
        assert numbers == seen["csv"], ext


def test_xpt_labels_and_formats_reach_the_data_dictionary(tmp_path: Path):
    write_all(frame(), tmp_path)
    (tmp_path / "plan.yaml").write_text(PLAN.format(ext="xpt", sheet=""))
    record = run_plan(tmp_path / "plan.yaml", out=tmp_path / "runs", history=False).record
    dictionary = {e["column"]: e for e in record["datasets"][0]["dictionary"]}
    assert dictionary["score"]["label"] == "Score (points)"
    assert dictionary["day"]["label"] == "Visit day"
    assert dictionary["day"]["display_format"].startswith("DATE")
    assert dictionary["arm"]["stored_as"].startswith("character")
    assert dictionary["visits"]["stored_as"] == "numeric"


def _ibm(sign: int, exponent: int, fraction: int) -> bytes:
    return struct.pack(">Q", (sign << 63) | (exponent << 56) | fraction)


def test_ibm_doubles_by_their_definition():
    # Source: V-IBM (IBM System/370 Principles of Operation, hexadecimal floating point: value = ±0.F × 16^(E−64),
    # 7-bit excess-64 exponent, 56-bit fraction); SAS TS-140 stores numbers in this form.
    cases = [(_ibm(0, 65, 1 << 52), 1.0),  # 0x4110000000000000 = 1/16 × 16 = 1
             (_ibm(1, 65, 1 << 52), -1.0),
             (_ibm(0, 64, 1 << 55), 0.5),  # 0x4080000000000000 = 8/16
             (_ibm(0, 66, 0x64 << 48), 100.0),  # 0x4264000000000000 = 0x64/256 × 256
             (_ibm(0, 0, 0), 0.0),  # all zero bytes: zero, never 16^-65
             (_ibm(0, 127, (1 << 56) - 1), (1 - 2.0**-56) * 16.0**63),  # the largest IBM double
             (_ibm(0, 0, 1 << 52), 16.0**-65)]  # the smallest normalised one
    raw = np.frombuffer(b"".join(b for b, _ in cases), dtype=np.uint8).reshape(-1, 8)
    values, missing = ibm_to_double(raw)
    assert not missing.any()
    assert values.tolist() == [v for _, v in cases]
    # missing values: '.', '._' and '.A'-'.Z' in the first byte, zeros after it
    raw = np.frombuffer(b".\0\0\0\0\0\0\0_\0\0\0\0\0\0\0Z\0\0\0\0\0\0\0", dtype=np.uint8).reshape(-1, 8)
    assert ibm_to_double(raw)[1].all()


def test_xpt_from_an_independent_writer_reads_as_that_writers_reader_reads_it(tmp_path: Path):
    # the writer and the reference reader are pyreadstat (ReadStat), independent of our reader
    rng = np.random.default_rng(7)
    values = np.concatenate([rng.normal(0, 1, 50) * 10.0 ** rng.integers(-30, 30, 50),
                             [0.0, -0.0, 1.0, -2.5, 2.0**53, 2.0**53 + 2, 1e70, -1e-75, 123456789.123456789]])
    # (ReadStat writes values beyond about 1e75 as the largest IBM double and reads that back as
    # infinity; by the definition it is the finite 7.2e75, which the test above checks)
    df = pd.DataFrame({"x": values, "label": [f"row {i}" for i in range(values.size)]})
    df.loc[4, "x"] = np.nan
    path = tmp_path / "x.xpt"
    pyreadstat.write_xport(df, str(path), file_format_version=5, table_name="X")
    reference, _ = pyreadstat.read_xport(str(path))
    ours = read_xpt(path.read_bytes(), "x.xpt")
    got = np.array([np.nan if v is None else v for v in ours.columns["x"]], dtype=float)
    np.testing.assert_array_equal(got, reference["x"].to_numpy())
    assert ours.columns["label"] == reference["label"].tolist()
    assert ours.columns["x"][4] is None
    # every double in the IBM range is held exactly: the round trip changes no bit
    exact = np.abs(values) > 1e-70
    np.testing.assert_array_equal(got[exact & ~np.isnan(got)], values[exact & ~np.isnan(got)])


def test_values_keep_every_bit_through_their_text(tmp_path: Path):
    # shifted and scaled values, and the float64/int64 edges, come out of a typed file unchanged
    base = np.array([0.1, 1.0 / 3.0, -2.5, 7.0])
    numbers = np.concatenate([base, base + 1e9, base * 1e-9, base * 1e300, [np.finfo(float).max,
                              np.finfo(float).tiny, 5e-324, 2.0**53 + 2, -(2.0**62)]])
    whole = np.array([0, -1, 2**53 + 1, 2**63 - 1, -(2**63)], dtype=np.int64)
    frame_ = pd.DataFrame({"x": numbers})
    frame_.to_parquet(tmp_path / "x.parquet")
    pd.DataFrame({"k": whole}).to_parquet(tmp_path / "k.parquet")
    x = read_table("x", Dataset.model_validate({"file": "x.parquet", "columns": {"x": {"type": "number"}}}), tmp_path)
    np.testing.assert_array_equal(x.columns["x"], numbers)
    k = read_table("k", Dataset.model_validate({"file": "k.parquet", "columns": {"k": {"type": "integer"}}}), tmp_path)
    assert k.columns["k"].dtype == np.int64 and k.columns["k"].tolist() == whole.tolist()


def test_dataset_json_version_1_0_is_read_too(tmp_path: Path):
    document = {"creationDateTime": "2026-01-01T00:00:00", "datasetJSONVersion": "1.0.0",
                "clinicalData": {"studyOID": "S", "metaDataVersionOID": "M", "itemGroupData": {"IG.D": {
                    "records": 3, "name": "D", "label": "d",
                    "items": [{"OID": "ITEMGROUPDATASEQ", "name": "ITEMGROUPDATASEQ", "label": "seq",
                               "type": "integer"},
                              {"OID": "IT.Y", "name": "y", "label": "Outcome", "type": "decimal"}],
                    "itemData": [[1, 1.25], [2, "2.50"], [3, None]]}}}}
    (tmp_path / "d.json").write_text(json.dumps(document))
    spec = Dataset.model_validate({"file": "d.json", "columns": {"y": {"type": "number"}}, "missing": "drop"})
    table = read_table("d", spec, tmp_path)
    assert table.columns["y"].tolist() == [1.25, 2.5]
    assert table.lines.tolist() == [1, 2]  # observation numbers
    assert table.excluded[0].lines == (3,)
    assert table.dictionary[0].label == "Outcome" and table.dictionary[0].stored_as == "decimal"


def test_typed_errors_name_rows_not_lines(tmp_path: Path):
    pd.DataFrame({"y": [1.0, 2.0, None, 4.0, -3.0]}).to_parquet(tmp_path / "d.parquet")
    spec = Dataset.model_validate({"file": "d.parquet", "columns": {"y": {"type": "number", "min": 0}},
                                   "missing": "drop"})
    with pytest.raises(DataError) as info:
        read_table("d", spec, tmp_path)
    assert "on row(s) 5" in str(info.value) and "line" not in str(info.value)
    refuse = spec.model_copy(update={"missing": "refuse"})
    with pytest.raises(DataError, match=r"1 missing value\(s\) on row\(s\) 3"):
        read_table("d", refuse, tmp_path)


def test_a_missing_optional_package_is_named_with_the_install_line(tmp_path: Path, monkeypatch):
    pd.DataFrame({"y": [1.0, 2.0]}).to_parquet(tmp_path / "d.parquet")
    monkeypatch.setitem(__import__("sys").modules, "pyarrow", None)
    spec = Dataset.model_validate({"file": "d.parquet", "columns": {"y": {"type": "number"}}})
    with pytest.raises(DataError, match="needs the optional package pyarrow") as info:
        read_table("d", spec, tmp_path)
    assert "pip install 'planrunner[formats]'" in str(info.value)
