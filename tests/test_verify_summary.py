"""verify after a data change: the cause first, then the differences counted by kind, all of them in a file."""

from __future__ import annotations

import json
import shutil
import tempfile
from pathlib import Path

import pytest

from planrunner.cli import main as cli

ROOT = Path(__file__).resolve().parent.parent
MONTHLY = ROOT / "plans" / "monthly-fill"


@pytest.fixture
def project(tmp_path: Path) -> Path:
    """A copy of the monthly demo plan and its data, with fewer resamples; returns the plan file."""
    target = tmp_path / "monthly-fill"
    shutil.copytree(MONTHLY, target, ignore=shutil.ignore_patterns("runs", "*.lock.json"))
    plan = target / "plan.yaml"
    plan.write_text(plan.read_text(encoding="utf-8").replace("resamples: 4999", "resamples: 999"), encoding="utf-8")
    return plan


def test_verify_after_a_data_change_leads_with_the_cause_and_lists_every_field_in_a_file(
        project, tmp_path, capsys, monkeypatch) -> None:
    assert cli.main(["run", str(project), "--quiet"]) == 0
    folder = Path(capsys.readouterr().out.strip())
    record = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    data = project.parent / record["datasets"][0]["file"]
    lines = data.read_text(encoding="utf-8").splitlines(keepends=True)
    data.write_text("".join(lines[:-1]), encoding="utf-8")  # the last row is gone
    rows_then = record["datasets"][0]["rows_read"]

    monkeypatch.chdir(tmp_path)
    temporary = tmp_path / "temporary"
    temporary.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(temporary))  # where the default list goes
    code = cli.main(["verify", str(folder)])
    out = capsys.readouterr().out.splitlines()
    assert code == 3
    # the cause comes first, before any field: the file, and the rows read then and now
    assert out[1].startswith("  CAUSE data file data/") and f"{rows_then} rows read then, {rows_then - 1} now" in out[1]
    summary = next(i for i, line in enumerate(out) if "field(s) differ" in line)
    total = int(out[summary].split()[0])
    kinds = []
    for line in out[summary + 1:]:
        if not line.startswith("  ") or not line.split()[0].isdigit() or "other kinds" in line:
            break
        kinds.append(int(line.split()[0]))
    assert kinds and sum(kinds) <= total and kinds == sorted(kinds, reverse=True)
    assert total > 10  # more than the terminal shows: the rest is in the file
    listed = next(line for line in out if "every differing field is listed in" in line)
    written = Path(listed.rsplit(" ", 1)[1])
    assert written.parent == temporary and not list(tmp_path.glob("planrunner-verify-*"))
    table = written.read_text(encoding="utf-8").splitlines()
    assert len(table) == 1 + total and table[0].startswith("field\trecorded")
    assert out[-1] == "verify: FAILED" and "see CAUSE above" in out[-2]
    assert not any("largest difference" in line for line in out)  # a count's size says nothing here
