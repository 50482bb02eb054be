"""Faults while a run computes or writes: a failing write, an interrupt, a killed process.

Whatever happens, no folder with a run's name is left holding a partial record or report, a
staging folder is removed (or, after SIGKILL, left hidden as `.staging-*` and ignored), and the
next run works. Paths: data stay inside their root, outputs stay under the output folder, and a
run folder is never reused.
"""

from __future__ import annotations

import dis
import errno
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import fixed_clock

from planrunner.cli import main as cli
from planrunner.errors import DataError
from planrunner.execute import signals
from planrunner.pipeline import run as runner
from planrunner.trail import files, history, index, store

ROOT = Path(__file__).resolve().parent.parent
PLAN = """
plan: fault-check
title: Fault checks
seed: 11
datasets:
  d:
    file: data/d.csv
    columns:
      g: {type: category, levels: [a, b]}
      y: {type: number}
analyses:
  - id: one
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: bootstrap
    resamples: 199
"""
DATA = "g,y\na,1.5\na,2.5\na,3.0\na,2.0\nb,0.5\nb,4.0\nb,2.0\nb,1.0\n"
# figures/ holds the Markdown report's pictures; results.csv and results.parquet the results dataset
FILES = ["figures", "record.json", "report.html", "report.md", "results.csv", "results.parquet"]


@pytest.fixture
def plan(write_plan) -> Path:
    return write_plan(PLAN, {"data/d.csv": DATA})


def visible(folder: Path) -> list[Path]:
    """What a reader of the output folder sees, less the run history log that successful runs append to
    and the index page they rewrite (a view of that log and the records)."""
    return sorted(p for p in folder.iterdir() if not p.name.startswith(".")
                  and p.name not in ("history.jsonl", "index.html")) if folder.exists() else []


def assert_next_run_works(plan: Path, out: Path, capsys) -> Path:
    before = set(visible(out))
    assert cli.main(["run", str(plan), "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    new = [p for p in visible(out) if p not in before]
    assert len(new) == 1 and sorted(f.name for f in new[0].iterdir()) == FILES
    json.loads((new[0] / "record.json").read_text(encoding="utf-8"))  # complete JSON
    return new[0]


# --- a write that fails half-way ------------------------------------------------------------------

class FailingOpen:
    """`open` for trail/store.py (the one writer) whose handle fails on the n-th file written."""

    def __init__(self, fail_on: int, error: BaseException):
        self.calls, self.fail_on, self.error = 0, fail_on, error

    def __call__(self, file, mode="r", *args, **kwargs):
        handle = open(file, mode, *args, **kwargs)
        if "w" not in mode:
            return handle
        self.calls += 1
        if self.calls == self.fail_on:
            error = self.error

            class Broken:
                def __enter__(self):
                    return self

                def __exit__(self, *exc):
                    handle.close()
                    return False

                def write(self, text):
                    handle.write(text[: len(text) // 2])  # half of the file reaches the disk
                    raise error

            return Broken()
        return handle


@pytest.mark.parametrize("fail_on", [1, 2, 3])
def test_oserror_half_way_through_writing_leaves_nothing(plan, tmp_path, monkeypatch, capsys, fail_on):
    out = tmp_path / "out"
    monkeypatch.setattr(store, "open", FailingOpen(fail_on, OSError(errno.ENOSPC, "No space left on device")),
                        raising=False)
    assert cli.main(["run", str(plan), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "the run could not be written: No space left on device" in err and "nothing was kept" in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert list(out.iterdir()) == []  # neither a run folder nor a staging folder
    monkeypatch.undo()
    assert_next_run_works(plan, out, capsys)


def test_failing_fsync_and_rename_leave_nothing(plan, tmp_path, monkeypatch, capsys):
    out = tmp_path / "out"
    real_rename = os.rename

    def no_rename(src, dst):
        raise OSError(errno.EACCES, "Permission denied")
    monkeypatch.setattr(os, "rename", no_rename)
    assert cli.main(["run", str(plan), "--out", str(out)]) == 2
    assert "Permission denied" in capsys.readouterr().err and list(out.iterdir()) == []
    monkeypatch.setattr(os, "rename", real_rename)

    def no_fsync(fd):
        raise OSError(errno.EIO, "Input/output error")
    monkeypatch.setattr(os, "fsync", no_fsync)
    assert cli.main(["run", str(plan), "--out", str(out)]) == 2
    assert "Input/output error" in capsys.readouterr().err and list(out.iterdir()) == []
    monkeypatch.undo()
    assert_next_run_works(plan, out, capsys)


# --- interrupts -----------------------------------------------------------------------------------

def test_interrupt_during_the_engines(plan, tmp_path, monkeypatch, capsys):
    out = tmp_path / "out"

    def interrupted(jobs, **options):
        raise KeyboardInterrupt
    monkeypatch.setattr(runner, "execute_all", interrupted)
    assert cli.main(["run", str(plan), "--out", str(out)]) == 130
    assert "interrupted; no record was written" in capsys.readouterr().err
    assert visible(out) == [] and (not out.exists() or list(out.iterdir()) == [])
    monkeypatch.undo()
    assert_next_run_works(plan, out, capsys)


@pytest.mark.parametrize("fail_on", [1, 3])
def test_interrupt_during_writing(plan, tmp_path, monkeypatch, capsys, fail_on):
    out = tmp_path / "out"
    monkeypatch.setattr(store, "open", FailingOpen(fail_on, KeyboardInterrupt()), raising=False)
    assert cli.main(["run", str(plan), "--out", str(out)]) == 130
    assert "interrupted" in capsys.readouterr().err
    assert list(out.iterdir()) == []
    monkeypatch.undo()
    assert_next_run_works(plan, out, capsys)


# --- a process killed half-way (SIGKILL cannot be caught: only the staging design protects) -------

CHILD = r"""
import sys, time
from pathlib import Path
from planrunner.cli import main as cli
from planrunner.pipeline import run as runner
from planrunner.trail import store

marker, where = Path(sys.argv[1]), sys.argv[2]

def pause(*args, **kwargs):
    marker.write_text("reached", encoding="utf-8")
    time.sleep(120)  # the parent kills us here

if where == "engines":
    runner.execute_all = pause
else:  # every file is written into the staging folder, the rename has not happened yet
    store._place = pause
sys.exit(cli.main(["run", sys.argv[3], "--out", sys.argv[4], "--quiet"]))
"""


def run_child_until(where: str, plan: Path, out: Path, tmp_path: Path) -> subprocess.Popen:
    marker = tmp_path / f"reached-{where}"
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    child = subprocess.Popen([sys.executable, "-c", CHILD, str(marker), where, str(plan), str(out)],
                             cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not marker.exists():
        if child.poll() is not None:
            raise AssertionError(f"the child ended early: {child.communicate()}")
        if time.monotonic() > deadline:
            child.kill()
            raise AssertionError("the child never reached the pause")
        time.sleep(0.05)
    return child


@pytest.mark.parametrize("where", ["engines", "writing"])
def test_killed_process_leaves_no_run_folder(plan, tmp_path, capsys, where):
    out = tmp_path / "out"
    child = run_child_until(where, plan, out, tmp_path)
    child.send_signal(signal.SIGKILL)
    child.communicate(timeout=60)
    assert child.returncode == -signal.SIGKILL
    assert visible(out) == []  # nothing with a run's name
    leftovers = list(out.iterdir()) if out.exists() else []
    assert all(p.name.startswith(runner.STAGING_PREFIX) for p in leftovers)
    assert len(leftovers) == (1 if where == "writing" else 0)
    folder = assert_next_run_works(plan, out, capsys)
    assert not folder.name.startswith(".") and leftovers == [p for p in out.iterdir() if p.name.startswith(".")]


def test_sigint_to_a_running_process_exits_130(plan, tmp_path):
    out = tmp_path / "out"
    child = run_child_until("engines", plan, out, tmp_path)
    child.send_signal(signal.SIGINT)
    _, err = child.communicate(timeout=60)
    assert child.returncode == 130 and "interrupted; no record was written" in err and "Traceback" not in err
    assert not out.exists() or list(out.iterdir()) == []


# --- paths ----------------------------------------------------------------------------------------

def test_outputs_only_under_the_output_folder(plan, tmp_path, capsys):
    before = {p for p in tmp_path.rglob("*")}
    out = tmp_path / "elsewhere" / "out"
    folder = assert_next_run_works(plan, out, capsys)
    created = {p for p in tmp_path.rglob("*")} - before
    assert created and all(p == out.parent or p.is_relative_to(out) for p in created)
    assert folder.parent == out


def test_run_folder_is_never_reused(plan, tmp_path, monkeypatch):
    out = tmp_path / "out"
    first = runner.run_plan(plan, out=out, clock=fixed_clock, operator="t")
    taken = first.folder
    (taken / "note.txt").write_text("someone's file", encoding="utf-8")
    second = runner.run_plan(plan, out=out, clock=fixed_clock, operator="t")  # the same name again
    assert second.folder == out / f"{first.folder.name}-2"
    assert (taken / "note.txt").read_text(encoding="utf-8") == "someone's file"
    assert sorted(f.name for f in taken.iterdir()) == sorted(FILES + ["note.txt"])
    # an empty folder that appears under the chosen name between the check and the rename is skipped
    real_rename, calls = os.rename, []

    def racing_rename(src, dst):
        calls.append(dst)
        if len(calls) == 1:
            raise OSError(errno.ENOTEMPTY, "Directory not empty")
        return real_rename(src, dst)
    monkeypatch.setattr(os, "rename", racing_rename)
    third = runner.run_plan(plan, out=out, clock=fixed_clock, operator="t")
    assert third.folder == out / f"{first.folder.name}-4" and len(calls) == 2


def test_run_folder_name_must_be_one_plain_name(tmp_path):
    for name in ("../x", "a/b", ".hidden", "", "a\\b", ".."):
        with pytest.raises(ValueError):
            runner.write_run(tmp_path, name, {})
    assert list(tmp_path.iterdir()) == []


def test_data_root_option(write_plan, tmp_path, capsys):
    plan = write_plan(PLAN)  # no data beside the plan
    locked = tmp_path / "locked"
    (locked / "data").mkdir(parents=True)
    (locked / "data" / "d.csv").write_text(DATA, encoding="utf-8")
    assert cli.main(["check", str(plan)]) == 2
    assert "data file not found" in capsys.readouterr().err
    assert cli.main(["check", str(plan), "--data-root", str(locked)]) == 0
    capsys.readouterr()
    out = tmp_path / "out"
    assert cli.main(["run", str(plan), "--data-root", str(locked), "--out", str(out), "--quiet"]) == 0
    record = json.loads((visible(out)[0] / "record.json").read_text(encoding="utf-8"))
    assert "--data-root" in record["command"] and record["datasets"][0]["rows_read"] == 8
    capsys.readouterr()
    folder = str(visible(out)[0])
    assert cli.main(["verify", folder, "--plan", str(plan)]) == 3  # the data are not beside the plan
    assert "cannot be read" in capsys.readouterr().out
    assert cli.main(["verify", folder, "--plan", str(plan), "--data-root", str(locked)]) == 0
    assert "verify: PASSED" in capsys.readouterr().out


def test_data_root_still_confines_symlinks(write_plan, tmp_path):
    plan = write_plan(PLAN.replace("data/d.csv", "d.csv"))
    locked, secret = tmp_path / "locked", tmp_path / "secret"
    locked.mkdir()
    secret.mkdir()
    (secret / "d.csv").write_text(DATA, encoding="utf-8")
    os.symlink(secret / "d.csv", locked / "d.csv")
    with pytest.raises(DataError, match="outside the data root"):
        runner.check_plan(plan, data_root=locked)


# --- an interrupt at every step of writing a run --------------------------------------------------

WRITING_CODE = {Path(m.__file__).resolve() for m in (runner, store, files, history, signals)}
NOP = dis.opmap["NOP"]


class SignalAtLine:
    """A trace function that sends this process ``number`` when the ``at``-th line of the code
    that writes a run (pipeline, store, history files, signals) is about to run."""

    def __init__(self, at: int, number: int):
        self.at, self.number, self.lines, self.sent, self.where = at, number, 0, False, ""
        self._ours: dict[str, bool] = {}

    def __call__(self, frame, event, arg):
        name = frame.f_code.co_filename
        if name not in self._ours:
            self._ours[name] = Path(name).resolve() in WRITING_CODE
        return self._line if self._ours[name] else None

    def _line(self, frame, event, arg):
        # not at a line that starts with a NOP (`try:`): no signal is ever handled there, and an
        # exception a trace function raises there escapes the enclosing try (CPython 3.11)
        if event == "line" and frame.f_code.co_code[frame.f_lasti] != NOP:
            self.lines += 1
            if self.lines == self.at:
                self.sent = True
                self.where = f"{Path(frame.f_code.co_filename).name}:{frame.f_lineno} ({frame.f_code.co_name})"
                os.kill(os.getpid(), self.number)
        return self._line


def _seeded_output(plan: Path, tmp_path: Path) -> Path:
    """An output folder holding one finished run and its history entry (copied for each step)."""
    seed = tmp_path / "seed"
    if not seed.exists():
        runner.run_plan(plan, out=seed, clock=fixed_clock, operator="t", reason="seed")
    return seed


def _state(out: Path) -> tuple[list[Path], list[dict], list]:
    entries = [json.loads(line) for line in (out / "history.jsonl").read_text(encoding="utf-8").split("\n") if line]
    return visible(out), entries, files.history_report(out).problems


# SIGTERM takes the same path as SIGINT once its handler has raised: every fifth line keeps the time down
@pytest.mark.parametrize("number, stride", [(signal.SIGINT, 1), (signal.SIGTERM, 5)], ids=["SIGINT", "SIGTERM"])
def test_an_interrupt_at_every_step_of_writing_leaves_folder_message_and_history_agreeing(
        plan, tmp_path, monkeypatch, capsys, number, stride):
    """SIGINT or SIGTERM before each line that writes a run (about 280 lines): either nothing was
    written and the message says so, or the run folder and its history entry both exist and the
    message names them; the history is intact either way, and no staging folder is left."""
    seed = _seeded_output(plan, tmp_path)
    # the reports are a stand-in: what is tested is how the files reach the disk, not their content
    monkeypatch.setattr(runner.report, "render_all", lambda record: {"report.md": "# run\n"})
    monkeypatch.setattr(index, "render_index_of", lambda out_root, kind: "<p>index</p>\n")  # replace_file still runs
    real_write_run = runner.write_run
    outcomes: dict[str, int] = {}
    at = 1 - stride
    while True:
        at += stride
        out = tmp_path / f"out-{at}"
        shutil.copytree(seed, out)
        tracer = SignalAtLine(at, number)

        def traced_write_run(*args, tracer=tracer, **kwargs):
            sys.settrace(tracer)
            try:
                return real_write_run(*args, **kwargs)
            finally:
                sys.settrace(None)
        monkeypatch.setattr(runner, "write_run", traced_write_run)
        code = cli.main(["run", str(plan), "--out", str(out), "--quiet", "--reason", "monthly"])
        err = capsys.readouterr().err
        folders, entries, problems = _state(out)
        at_line = f"signal before {tracer.where}: {err}"
        assert problems == [] and [e["seq"] for e in entries] == list(range(1, len(entries) + 1)), at_line
        assert not [p for p in out.iterdir() if p.name.startswith(".")], at_line  # no staging folder left
        if not tracer.sent:
            assert code == 0 and len(folders) == 2 and len(entries) == 2
            break
        assert code == 128 + number, at_line
        if "no record was written" in err:
            outcomes["nothing written"] = outcomes.get("nothing written", 0) + 1
            assert len(folders) == 1 and len(entries) == 1, at_line
        else:
            outcomes["written and logged"] = outcomes.get("written and logged", 0) + 1
            new = [f for f in folders if f.name != entries[0]["folder"]]
            assert len(new) == 1 and len(entries) == 2, at_line
            assert f"after the run was complete: record written to {new[0]}, history entry 2" in err, at_line
            assert entries[1]["folder"] == new[0].name and entries[1]["reason"] == "monthly"
            assert not (new[0] / files.ENTRY_WAITING).exists()
            record = json.loads((new[0] / "record.json").read_text(encoding="utf-8"))
            assert record["record_sha256"] == entries[1]["record_sha256"]
        shutil.rmtree(out)
    # both outcomes happen: before the rename nothing is kept, from it on the run completes first
    assert outcomes["nothing written"] > 100 // stride and outcomes["written and logged"] > 100 // stride, outcomes


# --- a process killed between the run folder and its history entry --------------------------------

KILLED_CHILD = r"""
import os, sys, time
from pathlib import Path
from planrunner.cli import main as cli
from planrunner.trail import files

marker, where = Path(sys.argv[1]), sys.argv[2]

def pause():
    marker.write_text("reached", encoding="utf-8")
    time.sleep(120)  # the parent kills us here

if where == "before-rename":  # the entry is written into the staging folder, the rename not yet done
    real_rename = os.rename
    os.rename = lambda *args: pause()
elif where == "before-entry":  # the folder is in place, its entry not yet appended
    files.HistoryLog.append = lambda self, folder: pause()
else:  # the entry is appended, the waiting copy in the folder not yet removed
    real_append = files.HistoryLog.append_entry
    files.HistoryLog.append_entry = lambda self, entry: (real_append(self, entry), pause())
sys.exit(cli.main(["run", sys.argv[3], "--out", sys.argv[4], "--quiet", "--reason", "killed"]))
"""


def _kill_child_at(where: str, plan: Path, out: Path, tmp_path: Path) -> None:
    marker = tmp_path / f"reached-{where}"
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    child = subprocess.Popen([sys.executable, "-c", KILLED_CHILD, str(marker), where, str(plan), str(out)],
                             cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not marker.exists():
        if child.poll() is not None:
            raise AssertionError(f"the child ended early: {child.communicate()}")
        if time.monotonic() > deadline:
            child.kill()
            raise AssertionError("the child never reached the pause")
        time.sleep(0.05)
    child.send_signal(signal.SIGKILL)
    child.communicate(timeout=60)


def test_killed_before_the_rename_leaves_no_run_and_an_intact_history(plan, tmp_path, capsys):
    out = tmp_path / "out"
    runner.run_plan(plan, out=out, clock=fixed_clock, operator="t")
    _kill_child_at("before-rename", plan, out, tmp_path)
    folders, entries, problems = _state(out)
    assert len(folders) == 1 and len(entries) == 1 and problems == []
    assert cli.main(["history", str(out)]) == 0


def test_killed_between_the_folder_and_its_entry_history_repair_appends_it(plan, tmp_path, capsys):
    out = tmp_path / "out"
    runner.run_plan(plan, out=out, clock=fixed_clock, operator="t")
    _kill_child_at("before-entry", plan, out, tmp_path)
    folders, entries, problems = _state(out)
    assert len(folders) == 2 and len(entries) == 1
    waiting = next(f for f in folders if f.name != entries[0]["folder"])
    assert (waiting / files.ENTRY_WAITING).is_file()
    capsys.readouterr()
    assert cli.main(["history", str(out)]) == 3
    shown = capsys.readouterr().out
    assert f"run folder {waiting.name} was written, but its run was stopped before its entry was appended" in shown
    assert "--repair" in shown and "(entries may have been removed" not in shown
    assert cli.main(["history", str(out), "--repair"]) == 0
    shown = capsys.readouterr().out
    assert f"appended entry 2 for {waiting.name}" in shown and "history chain: intact" in shown
    folders, entries, problems = _state(out)
    assert problems == [] and entries[1]["folder"] == waiting.name and entries[1]["reason"] == "killed"
    assert not (waiting / files.ENTRY_WAITING).exists()
    assert cli.main(["history", str(out), "--repair"]) == 0  # nothing more to do
    assert len(_state(out)[1]) == 2


def test_killed_between_the_folder_and_its_entry_the_next_run_appends_it_first(plan, tmp_path, capsys):
    out = tmp_path / "out"
    _kill_child_at("before-entry", plan, out, tmp_path)
    capsys.readouterr()
    assert cli.main(["run", str(plan), "--out", str(out), "--reason", "next"]) == 0
    shown = capsys.readouterr().out
    assert "run history: entry 1 appended first for" in shown and "entry 2 appended to" in shown
    folders, entries, problems = _state(out)
    assert problems == [] and [e["reason"] for e in entries] == ["killed", "next"]
    assert not any((f / files.ENTRY_WAITING).exists() for f in folders)


def test_killed_after_the_entry_the_history_is_intact_and_the_leftover_goes(plan, tmp_path, capsys):
    out = tmp_path / "out"
    _kill_child_at("after-entry", plan, out, tmp_path)
    folders, entries, problems = _state(out)
    assert len(folders) == 1 and len(entries) == 1 and problems == []
    assert (folders[0] / files.ENTRY_WAITING).is_file()  # the copy was not removed yet
    assert cli.main(["history", str(out), "--repair"]) == 0
    assert not (folders[0] / files.ENTRY_WAITING).exists() and len(_state(out)[1]) == 1
