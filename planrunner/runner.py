"""The one place that orchestrates a run: plan → tables → jobs → results → record → files.

Data flow goes one way. Files are touched only here and in `io` (reading data). A run writes into
a staging folder and renames it into place when every file is complete, so a folder with the run's
name always holds a complete record and both reports; an existing folder is never reused.
"""

from __future__ import annotations

import datetime as dt
import getpass
import hashlib
import json
import os
import shutil
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable

from . import report
from .canonical import RECORD_HASH_FIELD, canonical_json, record_sha256
from .compile import Job, compile_jobs
from .errors import DataError, PlanError
from .execute import execute_all
from .history import HISTORY_FILE, HistoryProblem, check_chain, new_entry, parse_lines
from .io import Table, file_sha256, read_table, resolve_data_path
from .lock import build_lock, check_lock, compare_with_lock, deviation_lines, lock_path_for
from .methods import methods_text
from .params import PLACEHOLDER, resolve_values, substitute
from .params import apply as apply_parameters
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


# --- locks -----------------------------------------------------------------------------------------

def _read_json(path: Path, what: str) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise PlanError(f"{what} not found", where=str(path)) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise PlanError(f"cannot read the {what}: {exc}", where=str(path)) from None


def lock_plan(path: str | Path, *, operator: str | None = None, note: str | None = None,
              params: dict[str, str] | None = None, clock: Clock = utc_now) -> tuple[Path, dict]:
    """Write PLAN.lock.json beside the plan; an existing lock is never replaced."""
    loaded = read_plan(path)
    # a parameter without a value leaves its data files unknown: they are recorded as not present
    values = resolve_values(loaded.plan, params or {}, require=False)
    data = []
    for name, ds in loaded.plan.datasets.items():
        file = substitute(ds.file, values)
        entry: dict[str, Any] = {"name": name, "file": file, "present": False, "sha256": None, "bytes": None}
        if PLACEHOLDER.search(file) is None:
            target = resolve_data_path(loaded.folder, file)
            if target.is_file():
                entry["sha256"], entry["bytes"] = file_sha256(target)
                entry["present"] = True
        data.append(entry)
    lock = build_lock(plan_file=loaded.file.name, plan_sha256=loaded.sha256, content=loaded.yaml.data,
                      locked_utc=_stamp(clock()), operator=operator or default_operator(), note=note,
                      parameters=values, data=data)
    target = lock_path_for(loaded.file)
    try:
        with open(target, "x", encoding="utf-8", newline="\n") as handle:
            handle.write(json.dumps(lock, sort_keys=True, indent=2, ensure_ascii=False) + "\n")
            handle.flush()
            os.fsync(handle.fileno())
    except FileExistsError:
        raise PlanError("the plan is already locked; a lock is never replaced", where=str(target),
                        hint="to fix a new version of the plan, save it under a new file name and lock that") from None
    return target, lock


def lock_for_run(loaded: LoadedPlan, tables: dict[str, Table], lock: str | Path | None, *,
                 refuse_deviations: bool) -> dict | None:
    """The record's plan.lock entry, or None without a lock; refuse deviations when asked."""
    lock_file = Path(lock) if lock is not None else lock_path_for(loaded.file)
    if not lock_file.exists():
        if lock is not None or refuse_deviations:
            raise PlanError("no lock file for this plan", where=str(lock_file),
                            hint="lock the plan first with 'planrunner lock PLAN'")
        return None
    document = check_lock(_read_json(lock_file, "lock file"), str(lock_file))
    entry = compare_with_lock(document, lock_file=lock_file.name, plan_sha256=loaded.sha256,
                              content=loaded.yaml.data,
                              data_now={t.name: {"file": t.file, "sha256": t.sha256} for t in tables.values()})
    if refuse_deviations and entry["deviations"]:
        raise PlanError("the plan deviates from its lock", problems=[
            f"{loaded.file.name}: {line}" for line in deviation_lines(entry)]
            + [f"(lock {lock_file}; remove --refuse-deviations to run and record the deviations)"])
    return entry


# --- run history -----------------------------------------------------------------------------------

def _exclusive(handle: Any) -> None:
    """Hold the log for this process while it appends (POSIX; elsewhere appends are not serialised)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        return
    fcntl.flock(handle.fileno(), fcntl.LOCK_EX)


def append_history(out_root: Path, record: dict, folder: str, reason: str | None) -> dict:
    """Append one chained entry to out_root/history.jsonl (the file is only ever appended to)."""
    log = out_root / HISTORY_FILE
    with open(log, "a+", encoding="utf-8", newline="\n") as handle:
        _exclusive(handle)
        handle.seek(0)
        text = handle.read()
        entries, _ = parse_lines(text)
        previous = {k: v for k, v in entries[-1].items() if k != "_line"} if entries else None
        entry = new_entry(previous, record, folder, reason)
        handle.seek(0, os.SEEK_END)
        if text and not text.endswith("\n"):
            handle.write("\n")
        handle.write(canonical_json(entry) + "\n")
        handle.flush()
        os.fsync(handle.fileno())
    return entry


@dataclass(frozen=True)
class HistoryReport:
    log: Path
    entries: list[dict]
    problems: list[HistoryProblem]


def history_report(target: str | Path) -> HistoryReport:
    """Read a history log (given the log, its folder, or a plan whose runs/ holds it) and check it."""
    target = Path(target)
    if target.is_file() and target.name != HISTORY_FILE:
        log = target.resolve().parent / "runs" / HISTORY_FILE
    elif target.is_dir():
        log = target / HISTORY_FILE
    else:
        log = target
    try:
        text = log.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise PlanError("no run history here", where=str(log),
                        hint="name a plan, its runs folder, or a history.jsonl file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"cannot read the history: {exc}", where=str(log)) from None
    entries, problems = parse_lines(text)
    problems += check_chain(entries)
    listed = set()
    for e in entries:
        listed.add(e.get("folder"))
        record_file = log.parent / str(e.get("folder")) / "record.json"
        if not record_file.is_file():
            problems.append(HistoryProblem(e["_line"], f"run folder {e.get('folder')} is missing"))
            continue
        try:
            record = json.loads(record_file.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            problems.append(HistoryProblem(e["_line"], f"{record_file} cannot be read"))
            continue
        if record.get(RECORD_HASH_FIELD) != e.get("record_sha256") or record_sha256(record) != e.get("record_sha256"):
            problems.append(HistoryProblem(e["_line"], f"the record in {e.get('folder')} is not the one logged "
                                                        "(its hash differs)"))
    for folder in sorted(log.parent.iterdir()):
        if (folder / "record.json").is_file() and folder.name not in listed:
            problems.append(HistoryProblem(0, f"run folder {folder.name} is not in the history "
                                              "(entries may have been removed from the end of the log)"))
    return HistoryReport(log, [{k: v for k, v in e.items() if k != "_line"} for e in entries],
                         sorted(problems, key=lambda p: p.line))
