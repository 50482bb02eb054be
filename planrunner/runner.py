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
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable

from . import report
from .canonical import RECORD_HASH_FIELD, record_sha256
from .compile import Job, compile_jobs
from .execute import execute_all
from .io import Table, read_table
from .methods import methods_text
from .params import apply as apply_parameters
from .params import resolve_values
from .plancheck import LoadedPlan, read_plan
from .record import build_record, to_json
from .trail import append_history, lock_for_run

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
    parameters: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class RunOutcome:
    folder: Path
    record: dict
    history_entry: dict | None = None


def load_tables(loaded: LoadedPlan) -> dict[str, Table]:
    return {name: read_table(name, spec, loaded.folder) for name, spec in loaded.plan.datasets.items()}


def load_plan(path: str | Path, params: dict[str, str] | None = None, *,
              require_values: bool = True) -> tuple[LoadedPlan, dict[str, str]]:
    """Read and check the plan, and fill its parameters (file paths and titles only)."""
    loaded = read_plan(path)
    values = resolve_values(loaded.plan, params or {}, require=require_values)
    return replace(loaded, plan=apply_parameters(loaded.plan, values)), values


def check_plan(path: str | Path, *, with_data: bool = True, params: dict[str, str] | None = None) -> CheckOutcome:
    """Validate the plan; with data, also read the files and build the jobs (no resampling)."""
    # the plan alone can be checked before the month's value is known
    loaded, values = load_plan(path, params, require_values=with_data or bool(params))
    if not with_data:
        return CheckOutcome(loaded, None, None, values)
    tables = load_tables(loaded)
    return CheckOutcome(loaded, tables, compile_jobs(loaded.plan, tables), values)


def default_operator() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def run_plan(path: str | Path, *, out: str | Path | None = None, operator: str | None = None,
             command: list[str] | None = None, clock: Clock = utc_now, params: dict[str, str] | None = None,
             lock: str | Path | None = None, refuse_deviations: bool = False, reason: str | None = None,
             history: bool = True) -> RunOutcome:
    """Run every analysis of the plan and write record.json, report.html and report.md.

    The plan is compared with its lock (``lock``, or PLAN.lock.json beside it when that exists);
    with ``refuse_deviations`` any deviation, or a missing lock, stops the run before computing.
    The run is appended to the history log beside the run folders (unless ``history`` is False).
    """
    started = clock()
    checked = check_plan(path, params=params)
    loaded, tables, jobs = checked.loaded, checked.tables, checked.jobs
    assert tables is not None and jobs is not None
    lock_entry = lock_for_run(loaded, tables, lock, refuse_deviations=refuse_deviations)
    results = execute_all(jobs)
    finished = clock()
    run_id = _run_id(loaded, tables, started)
    record = build_record(loaded, tables, jobs, results, run_id=run_id, started_utc=_stamp(started),
                          finished_utc=_stamp(finished), operator=operator or default_operator(),
                          command=command or ["planrunner", "run", str(path)])
    finish_record(record, lock_entry, checked.parameters)
    out_root = Path(out) if out is not None else loaded.folder / "runs"
    folder = write_run(out_root, f"{loaded.plan.plan}-{started.strftime('%Y%m%dT%H%M%SZ')}-{run_id[:8]}", record)
    entry = append_history(out_root, record, folder.name, reason) if history else None
    return RunOutcome(folder, record, entry)


def finish_record(record: dict, lock_entry: dict | None, parameters: dict[str, str]) -> dict:
    """The audit fields: the lock and its deviations, parameters, methods text, and the record's own hash."""
    record["plan"]["lock"] = lock_entry
    record["parameters"] = dict(parameters)
    record["methods_text"] = methods_text(record)
    record.pop(RECORD_HASH_FIELD, None)
    record[RECORD_HASH_FIELD] = record_sha256(record)
    return record


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

