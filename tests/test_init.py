"""`planrunner init DATAFILE`: a plan skeleton typed from the file (pipeline/init.py, data/infer.py)."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import pandas as pd
import pytest

from planrunner.cli import main as cli
from planrunner.pipeline.check import check_plan
from planrunner.plan.load import read_plan

ROOT = Path(__file__).resolve().parents[1]
DEMO_DATA = sorted((ROOT / "plans").glob("*/data/*.csv"))


def test_init_on_each_demo_data_file_passes_check(tmp_path: Path, capsys):
    assert len(DEMO_DATA) >= 5
    for i, source in enumerate(DEMO_DATA):
        folder = tmp_path / str(i)
        (folder / "data").mkdir(parents=True)
        shutil.copyfile(source, folder / "data" / source.name)
        plan = folder / "plan.yaml"
        assert cli.main(["init", str(folder / "data" / source.name), "--out", str(plan)]) == 0
        assert check_plan(plan, with_data=False).loaded.plan.datasets["data"].file == f"data/{source.name}"
        checked = check_plan(plan)  # with the data: every declared type and level holds
        assert checked.tables is not None and checked.tables["data"].rows_used > 0
    assert "plan skeleton written to" in capsys.readouterr().out


def kinds() -> pd.DataFrame:
    return pd.DataFrame({
        "arm": ["drug", "placebo", "drug", "placebo", "drug", "placebo"],
        "improved": [True, False, True, True, False, False],
        "visits": [3, 0, 2, 5, 1, 4],
        "weight": [71.25, 80.5, 65.0, 90.75, 77.125, 68.5],
        "seen": [dt.date(2025, 3, d) for d in range(1, 7)],
        "note": ["a", "b", "c", "d", "e", "f"],
    })


EXPECTED = {"arm": ("category", ("drug", "placebo")), "improved": ("boolean", None), "visits": ("integer", None),
            "weight": ("number", None), "seen": ("date", None), "note": ("text", None)}


@pytest.mark.parametrize("ending", ["csv", "parquet", "xlsx", "xpt"])
def test_init_types_every_kind_of_column_in_every_format(tmp_path: Path, ending: str):
    frame = kinds()
    path = tmp_path / f"d.{ending}"
    args = []
    if ending == "csv":
        frame.to_csv(path, index=False)
    elif ending == "parquet":
        pytest.importorskip("pyarrow")
        frame.to_parquet(path)
    elif ending == "xlsx":
        pytest.importorskip("openpyxl")
        frame.to_excel(path, sheet_name="s", index=False)
        args = ["--sheet", "s"]
    else:
        pyreadstat = pytest.importorskip("pyreadstat")
        # XPT has no booleans: 1/0 numbers, read back as integers
        pyreadstat.write_xport(frame.assign(improved=frame.improved.astype(int)), str(path),
                               file_format_version=5, table_name="D")
    assert cli.main(["init", str(path), *args]) == 0
    columns = read_plan(tmp_path / "plan.yaml").plan.datasets["data"].columns
    expected = dict(EXPECTED, improved=("integer", None)) if ending == "xpt" else EXPECTED
    assert {n: (c.type, tuple(c.levels) if c.levels else None) for n, c in columns.items()} == expected
    run = check_plan(tmp_path / "plan.yaml")
    assert run.tables is not None and run.tables["data"].rows_used == 6


def test_init_shows_nothing_of_the_values(tmp_path: Path):
    frame = kinds()
    frame.to_csv(tmp_path / "d.csv", index=False)
    assert cli.main(["init", str(tmp_path / "d.csv")]) == 0
    text = (tmp_path / "plan.yaml").read_text()
    for value in [*frame.weight, *frame.visits]:  # no outcome value, no summary of them
        assert f" {value}" not in text.replace("seed: ", "seed:") and f"[{value}" not in text
    for word in ("mean =", "min:", "max:", "sd", "median ="):
        assert word not in text


def test_init_never_replaces_a_file(tmp_path: Path, capsys):
    kinds().to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "plan.yaml").write_text("mine\n")
    assert cli.main(["init", str(tmp_path / "d.csv")]) == 2
    assert "never overwrites" in capsys.readouterr().err
    assert (tmp_path / "plan.yaml").read_text() == "mine\n"
