"""The Python API (planrunner/api): the README example runs as written, the numbers are the command
line's, and problems are raised (never printed, never an exit) with the same located message."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
from conftest import two_group_plan

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


# --- what `run` can do besides computing: progress, signing, the PDF (the command line's own code) --------



def test_progress_is_heard_by_a_function_and_the_bar_prints_nothing_off_a_terminal(write_plan, tmp_path, capsys):
    plan = write_plan(*two_group_plan("bootstrap", 2000))
    heard: list[tuple[int, int]] = []
    heard_run = api.run(plan, out=tmp_path / "runs", history=False,
                        progress=lambda done, total: heard.append((done, total)))
    assert heard and heard[-1] == (2000, 2000)  # every resample of the one analysis, as the bar counts them
    assert [done for done, _ in heard] == sorted(done for done, _ in heard)
    shown = api.run(plan, out=tmp_path / "runs", history=False, progress=True)
    assert capsys.readouterr() == ("", "")  # the command line's bar: silent when stderr is not a terminal
    assert shown.record["analyses"][0]["estimate"] == heard_run.record["analyses"][0]["estimate"]


def test_a_signed_api_run_writes_the_files_a_signed_cli_run_writes(write_plan, tmp_path, monkeypatch, capsys):
    from planrunner.errors import SigningError
    from planrunner.trail.signfiles import generate_key

    plan = write_plan(*two_group_plan("bootstrap", 2000))
    generate_key(tmp_path / "ana.key", passphrase=b"correct horse", name="ana")  # invented for the test
    monkeypatch.setenv("PR_PASS", "correct horse")
    signed = api.run(plan, out=tmp_path / "api", sign_key=tmp_path / "ana.key", signer="Ana Lima",
                     passphrase_env="PR_PASS")
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "cli"), "--quiet", "--sign-key",
                     str(tmp_path / "ana.key"), "--signer", "Ana Lima", "--passphrase-env", "PR_PASS"]) == 0
    (by_cli,) = [p for p in (tmp_path / "cli").iterdir() if p.is_dir()]

    def signature_files(folder: Path) -> list[str]:
        return sorted(p.name for p in folder.iterdir() if p.name.endswith(".sig.json"))

    assert signed.signed and signature_files(signed.folder) == signature_files(by_cli) != []
    assert signed.history_entry is not None and signed.history_entry["signature"]["meaning"] == "executed"
    capsys.readouterr()
    assert cli.main(["history", str(tmp_path / "api")]) == 0  # the chain holds, the entry's signature checks
    assert "executed by Ana Lima" in capsys.readouterr().out

    # the command line's refusals, with its messages, before anything is computed
    with pytest.raises(SigningError) as no_key:
        api.run(plan, out=tmp_path / "refused", signer="Ana Lima")
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "refused"), "--signer", "Ana Lima"]) == 2
    assert str(no_key.value) in capsys.readouterr().err
    with pytest.raises(SigningError, match="protected by a passphrase"):  # nobody is asked for it
        api.run(plan, out=tmp_path / "refused", sign_key=tmp_path / "ana.key", signer="Ana Lima")
    monkeypatch.setenv("PR_PASS", "wrong horse")
    with pytest.raises(SigningError, match="cannot unlock the key: wrong passphrase"):
        api.run(plan, out=tmp_path / "refused", sign_key=tmp_path / "ana.key", signer="Ana Lima",
                passphrase_env="PR_PASS")
    assert not (tmp_path / "refused").exists()


def test_pdf_without_a_browser_or_on_unknown_paper_is_refused_before_computing(write_plan, tmp_path, monkeypatch):
    from planrunner.errors import OutputError
    from planrunner.report import pdf

    plan = write_plan(*two_group_plan("bootstrap", 2000))
    with pytest.raises(PlanError, match="paper must be one of A4, Letter"):
        api.run(plan, out=tmp_path / "runs", pdf=True, paper="A3")
    monkeypatch.delenv(pdf.ENVIRONMENT_VARIABLE, raising=False)
    monkeypatch.setenv("PATH", str(tmp_path / "no-bin"))
    monkeypatch.setattr(pdf, "CANDIDATES", tuple(n for n in pdf.CANDIDATES if "/" not in n))
    with pytest.raises(OutputError) as info:
        api.run(plan, out=tmp_path / "runs", pdf=True)
    assert pdf.ENVIRONMENT_VARIABLE in str(info.value)
    assert not (tmp_path / "runs").exists()


def test_pdf_is_written_in_the_run_folder(write_plan, tmp_path):
    from planrunner.report import pdf

    try:
        pdf.find_browser()
    except Exception:
        pytest.skip("no Chromium or Chrome here (see test_report_browser)")
    plan = write_plan(*two_group_plan("bootstrap", 2000))
    done = api.run(plan, out=tmp_path / "runs", history=False, pdf=True, paper="Letter")
    assert done.pdf == done.folder / "report-Letter.pdf" and done.pdf.read_bytes()[:5] == b"%PDF-"
