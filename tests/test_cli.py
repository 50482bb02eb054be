"""End to end through the command line: the demo plan, reruns, `check`, exit codes."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

from planrunner.cli import main as cli

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"

NUMBER_FIELDS = ("estimate", "standard_error", "bias", "intervals", "p_value", "exact", "resamples",
                 "monte_carlo", "details", "distribution", "n", "warnings", "adjusted_p_values")


def numbers(record: dict) -> dict:
    return {a["id"]: {k: a.get(k) for k in NUMBER_FIELDS} for a in record["analyses"]}


def run_demo(tmp_path: Path, capsys) -> tuple[Path, dict, str]:
    code = cli.main(["run", str(DEMO), "--out", str(tmp_path), "--operator", "tester"])
    out = capsys.readouterr().out
    assert code == 0, out
    folder = Path(out.strip().splitlines()[-1].removeprefix("record written to "))
    return folder, json.loads((folder / "record.json").read_text(encoding="utf-8")), out


def test_demo_plan_runs_and_writes_three_files(tmp_path, capsys):
    folder, record, out = run_demo(tmp_path, capsys)
    assert sorted(p.name for p in folder.iterdir()) == ["figures", "record.json", "report.html", "report.md",
                                                       "results.csv", "results.parquet"]
    assert sorted(p.name for p in (folder / "figures").iterdir()) == [
        "excursion-rate-test-null.svg", "mean-jackknife-pseudo-values.svg", "mean-shift-test-null.svg",
        "primary-resampling.svg"]
    assert record["format"] == "planrunner.record/1"
    assert [a["id"] for a in record["analyses"]] == ["primary", "mean-shift-test", "excursion-rate-test",
                                                   "mean-jackknife"]
    for a in record["analyses"]:
        assert a["estimate"] is not None
    assert "primary" in out and "mean-shift-test" in out  # the summary table
    data = record["datasets"][0]
    assert data["rows_read"] == 240
    assert data["rows_used"] == 240 - sum(e["rows"] for e in data["excluded"])
    assert {e["reason"].split(" ")[0] for e in data["excluded"]} == {"missing", "rows_where:"}
    html = (folder / "report.html").read_text(encoding="utf-8")
    assert "<svg" in html and "http://" not in html.replace("http://www.w3.org/2000/svg", "")
    assert record["caution"] in html.replace("\n", " ") or "Caution" in html
    assert record["multiplicity"][0]["method"] == "holm"


def test_rerun_gives_identical_numbers_in_a_new_folder(tmp_path, capsys):
    first, record1, _ = run_demo(tmp_path, capsys)
    second, record2, _ = run_demo(tmp_path, capsys)
    assert first != second and first.exists()
    assert numbers(record1) == numbers(record2)


def test_check_valid_plan_exit_0(capsys):
    assert cli.main(["check", str(DEMO)]) == 0
    assert "is valid" in capsys.readouterr().out
    assert cli.main(["check", "--plan-only", str(DEMO)]) == 0


def test_check_invalid_plan_exit_2_without_traceback(tmp_path, capsys):
    bad = tmp_path / "plan.yaml"
    bad.write_text(DEMO.read_text(encoding="utf-8").replace("seed: 20261201", "seeed: 20261201"), encoding="utf-8")
    assert cli.main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "unknown key 'seeed'" in err and "did you mean 'seed'" in err and "Traceback" not in err


def test_missing_plan_and_bad_arguments_exit_2(tmp_path, capsys):
    assert cli.main(["check", str(tmp_path / "nope.yaml")]) == 2
    assert "plan file not found" in capsys.readouterr().err
    assert cli.main(["frobnicate"]) == 2
    assert cli.main([]) == 2


def test_changed_data_file_under_pin_exit_2(tmp_path, capsys):
    folder = tmp_path / "trial"
    shutil.copytree(DEMO.parent, folder, ignore=shutil.ignore_patterns("runs"))
    plan = folder / "plan.yaml"
    plan.write_text(plan.read_text(encoding="utf-8").replace(
        "    file: data/shipments.csv\n", "    file: data/shipments.csv\n    sha256: " + "a" * 64 + "\n"),
        encoding="utf-8")
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "out")]) == 2
    assert "the file has changed" in capsys.readouterr().err
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_unexpected_failure_exit_1_with_versions(monkeypatch, capsys):
    import planrunner.pipeline.check as checker

    def boom(*args, **kwargs):
        raise RuntimeError("simulated bug")
    monkeypatch.setattr(checker, "check_plan", boom)
    assert cli.main(["check", str(DEMO)]) == 1
    err = capsys.readouterr().err
    assert "please report" in err and "numpy" in err


def test_python_dash_m_entry_point(tmp_path):
    done = subprocess.run([sys.executable, "-m", "planrunner", "check", "--plan-only", str(DEMO)],
                          capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 0, done.stderr


def _piped_into_a_reader_that_closes(args: list[str], lines_read: int) -> subprocess.CompletedProcess:
    """The CLI in a subprocess whose stdout reader reads `lines_read` lines and closes the pipe (`| true`)."""
    child = subprocess.Popen([sys.executable, "-m", "planrunner", *args], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, cwd=ROOT)
    assert child.stdout is not None and child.stderr is not None
    for _ in range(lines_read):
        child.stdout.readline()
    child.stdout.close()  # before the child prints (lines_read 0) or while it still prints
    err = child.stderr.read().decode()
    return subprocess.CompletedProcess(child.args, child.wait(timeout=120), "", err)


def test_a_closed_stdout_is_no_failure_and_the_run_folder_is_complete(tmp_path):
    # `planrunner check PLAN | true`: the reader is gone before the first line
    done = _piped_into_a_reader_that_closes(["check", "--plan-only", str(DEMO)], 0)
    assert (done.returncode, done.stderr) == (0, "")
    # a run whose table nobody reads: the folder, its results and the history entry are all written
    plan = tmp_path / "liner-trial"
    shutil.copytree(DEMO.parent, plan)
    done = _piped_into_a_reader_that_closes(["run", str(plan / "plan.yaml"), "--out", str(tmp_path / "runs"),
                                             "--operator", "tester"], 0)
    assert (done.returncode, done.stderr) == (0, "")
    [folder] = [f for f in (tmp_path / "runs").iterdir() if f.is_dir()]
    for name in ("record.json", "report.html", "report.md", "results.csv", "results.parquet"):
        assert (folder / name).is_file(), name
    record = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    history = (tmp_path / "runs" / "history.jsonl").read_text(encoding="utf-8").splitlines()
    assert [json.loads(line)["run_id"] for line in history] == [record["run_id"]]


def test_a_stdout_that_refuses_every_write_changes_no_exit_code(monkeypatch, capsys):
    # the verb's print meets BrokenPipeError; main's stdout drops the rest and keeps the verb's code
    class Closed:
        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def flush(self):
            raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(sys, "stdout", Closed())
    assert cli.main(["check", "--plan-only", str(DEMO)]) == 0
    assert isinstance(sys.stdout, Closed)  # put back as it was
    assert capsys.readouterr().err == ""
