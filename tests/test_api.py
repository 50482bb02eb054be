"""The Python API (planrunner/api): the README example runs as written, the numbers are the command
line's, and problems are raised (never printed, never an exit) with the same located message."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from planrunner import api
from planrunner.cli import main as cli
from planrunner.errors import DataError, PlanError

ROOT = Path(__file__).resolve().parents[1]


def readme_example() -> str:
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    section = readme.split("\n## Python API\n", 1)[1].split("\n## ", 1)[0]
    (code,) = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    return code


def test_the_readme_example_runs(tmp_path: Path, monkeypatch, capsys):
    shutil.copytree(ROOT / "plans" / "liner-trial", tmp_path / "plans" / "liner-trial")
    monkeypatch.chdir(tmp_path)
    names: dict = {}
    exec(compile(readme_example(), "README.md (Python API)", "exec"), names)
    result = names["result"]
    assert isinstance(result, api.RunResult) and result.folder.resolve().parent == (tmp_path / "api-runs").resolve()
    assert (result.folder / "record.json").is_file() and (result.folder / "results.csv").is_file()
    assert names["plan"].rows == {"shipments": result.record["datasets"][0]["rows_used"]}
    frame = names["frame"]
    assert list(frame.columns[:4]) == ["run_id", "plan_id", "plan_sha256", "analysis"]
    primary = [a for a in result.record["analyses"] if a["id"] == "primary"][0]
    assert names["primary"].estimate == primary["estimate"]
    assert frame[(frame.analysis == "primary") & (frame.quantity == "estimate")].value.item() == primary["estimate"]
    assert "mean-shift-test" in capsys.readouterr().out  # the example's own print calls


def test_api_numbers_equal_the_command_lines_on_any_executor(tmp_path: Path, capsys):
    shutil.copytree(ROOT / "plans" / "liner-trial", tmp_path / "liner")
    plan = tmp_path / "liner" / "plan.yaml"
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "cli"), "--quiet"]) == 0
    capsys.readouterr()
    import json
    (folder,) = [p for p in (tmp_path / "cli").iterdir() if p.is_dir()]
    by_cli = json.loads((folder / "record.json").read_text())
    serial = api.run(plan, out=tmp_path / "serial", history=False)
    threads = api.run(plan, out=tmp_path / "threads", executor="threads", workers=2, history=False)
    assert capsys.readouterr() == ("", "")  # the API prints nothing
    fields = ("estimate", "standard_error", "bias", "intervals", "p_value", "adjusted_p_values", "n")
    for run in (serial, threads):
        assert [{k: a[k] for k in fields} for a in run.record["analyses"]] == [
            {k: a[k] for k in fields} for a in by_cli["analyses"]]
        assert run.record["command"][0] == "planrunner.api.run"
    assert threads.record["execution"]["executor"] == "threads"
    frame = serial.to_frame()
    assert len(frame) == len(frame.drop_duplicates(["analysis", "quantity", "interval_method", "adjustment"]))
    with pytest.raises(KeyError, match="no analysis 'nope'"):
        serial["nope"]


def test_errors_are_raised_with_the_command_lines_message_and_nothing_printed(tmp_path: Path, capsys):
    bad = ROOT / "tests" / "invalid_plans" / "multiplicity-old-two-letter-code.yaml"
    with pytest.raises(PlanError) as info:
        api.load(bad)
    assert cli.main(["check", "--plan-only", str(bad)]) == 2
    assert str(info.value) in capsys.readouterr().err  # the very same located message
    case = ROOT / "tests" / "bad_inputs" / "parquet-wrong-type"
    shutil.copytree(case, tmp_path / "case")
    with pytest.raises(DataError, match=r"d.parquet: column 'y' \(number\): 12 value\(s\) are stored as text"):
        api.check(tmp_path / "case" / "plan.yaml")
    with pytest.raises(DataError):
        api.run(tmp_path / "case" / "plan.yaml", out=tmp_path / "runs")
    assert not (tmp_path / "runs").exists()
    assert capsys.readouterr() == ("", "")
