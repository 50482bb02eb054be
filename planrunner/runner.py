"""The one place that orchestrates a run: plan → tables → jobs → results → record → files.

Data flow goes one way. Files are touched only here and in `io` (reading data). A run writes into
a staging folder and renames it into place when every file is complete, so a folder with the run's
name always holds a complete record and both reports; an existing folder is never reused.
"""

from __future__ import annotations

import datetime as dt
import getpass
import hashlib
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from . import report
from .compile import Job, compile_jobs
from .execute import Execution, Progress, execute_all
from .io import Table, read_table
from .plancheck import LoadedPlan, read_plan
from .record import build_record, to_json

Clock = Callable[[], dt.datetime]


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.timezone.utc)


def _stamp(moment: dt.datetime) -> str:
    return moment.astimezone(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


@dataclass(frozen=True)
class CheckOutcome:
    loaded: LoadedPlan
    tables: dict[str, Table] | None  # None when data were not checked
    jobs: list[Job] | None


@dataclass(frozen=True)
class RunOutcome:
    folder: Path
    record: dict


def load_tables(loaded: LoadedPlan) -> dict[str, Table]:
    return {name: read_table(name, spec, loaded.folder) for name, spec in loaded.plan.datasets.items()}


def check_plan(path: str | Path, *, with_data: bool = True) -> CheckOutcome:
    """Validate the plan; with data, also read the files and build the jobs (no resampling)."""
    loaded = read_plan(path)
    if not with_data:
        return CheckOutcome(loaded, None, None)
    tables = load_tables(loaded)
    return CheckOutcome(loaded, tables, compile_jobs(loaded.plan, tables))


def default_operator() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def run_plan(path: str | Path, *, out: str | Path | None = None, operator: str | None = None,
             command: list[str] | None = None, clock: Clock = utc_now, execution: Execution | None = None,
             progress: Progress | None = None) -> RunOutcome:
    """Run every analysis of the plan and write record.json, report.html and report.md.

    ``execution`` chooses where the jobs run (serial by default; the numbers are the same);
    ``progress(done, total)`` hears of finished resamples. An interrupt while computing leaves
    nothing behind: files are written only after every result is in.
    """
    started = clock()
    checked = check_plan(path)
    loaded, tables, jobs = checked.loaded, checked.tables, checked.jobs
    assert tables is not None and jobs is not None
    execution = execution or Execution()
    results = execute_all(jobs, execution=execution, progress=progress)
    finished = clock()
    run_id = _run_id(loaded, tables, started)
    record = build_record(loaded, tables, jobs, results, run_id=run_id, started_utc=_stamp(started),
                          finished_utc=_stamp(finished), operator=operator or default_operator(),
                          command=command or ["planrunner", "run", str(path)],
                          execution=execution.describe())
    out_root = Path(out) if out is not None else loaded.folder / "runs"
    folder = write_run(out_root, f"{loaded.plan.plan}-{started.strftime('%Y%m%dT%H%M%SZ')}-{run_id[:8]}", record)
    return RunOutcome(folder, record)


def _run_id(loaded: LoadedPlan, tables: dict[str, Table], started: dt.datetime) -> str:
    """An id from what the run is (plan, data, start time), so an injected clock makes it stable."""
    digest = hashlib.sha256()
    for part in [loaded.sha256, _stamp(started), *(t.sha256 for t in tables.values())]:
        digest.update(part.encode())
    return digest.hexdigest()[:16]


def write_run(out_root: Path, name: str, record: dict) -> Path:
    """Write the three files into a staging folder, then move it into place under a fresh name."""
    out_root.mkdir(parents=True, exist_ok=True)
    staging = out_root / f".staging-{name}-{os.getpid()}"
    staging.mkdir()
    try:
        files = {"record.json": to_json(record), "report.html": report.render(record, "html"),
                 "report.md": report.render(record, "md")}
        for filename, text in files.items():
            with open(staging / filename, "w", encoding="utf-8", newline="\n") as handle:
                handle.write(text)
                handle.flush()
                os.fsync(handle.fileno())
        final = _fresh_folder(out_root, name)
        os.rename(staging, final)
        return final
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise


def _fresh_folder(out_root: Path, name: str) -> Path:
    """A folder name not yet taken; a run never reuses an existing folder."""
    candidate, k = out_root / name, 1
    while candidate.exists():
        k += 1
        candidate = out_root / f"{name}-{k}"
    return candidate
