"""The audit trail's files: plan locks (PLAN.lock.json) and the run history (history.jsonl).

The logic is pure and lives in `lock` and `history`. Nothing is ever replaced: a lock is created
new by `store.write_new_file` and read back by `store.read_json`; the history is only appended to.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from planrunner.data.tables import Table, file_sha256, resolve_data_path
from planrunner.errors import PlanError, RecordError
from planrunner.plan.load import LoadedPlan, read_plan
from planrunner.plan.params import PLACEHOLDER, resolve_values, substitute
from planrunner.record.canonical import RECORD_HASH_FIELD, canonical_json, record_sha256
from planrunner.trail.history import HISTORY_FILE, HistoryProblem, check_chain, new_entry, parse_lines
from planrunner.trail.lock import build_lock, check_lock, compare_with_lock, deviation_lines, lock_path_for
from planrunner.trail.store import read_json, write_new_file

# --- locks -----------------------------------------------------------------------------------------

def lock_plan(path: str | Path, *, operator: str, locked_utc: str, note: str | None = None,
              params: dict[str, str] | None = None) -> tuple[Path, dict]:
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
                      locked_utc=locked_utc, operator=operator, note=note,
                      parameters=values, data=data)
    target = lock_path_for(loaded.file)
    # the lock appears complete or not at all, and is never replaced, even by a concurrent `lock`
    write_new_file(target, json.dumps(lock, sort_keys=True, indent=2, ensure_ascii=False) + "\n", what="lock",
                   taken="the plan is already locked; a lock is never replaced",
                   hint="to fix a new version of the plan, save it under a new file name and lock that")
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
    document = check_lock(read_json(lock_file, "lock file", hint="create one with 'planrunner lock PLAN'"),
                          str(lock_file))
    entry = compare_with_lock(document, lock_file=lock_file.name, plan_sha256=loaded.sha256,
                              content=loaded.yaml.data,
                              data_now={t.name: {"file": t.file, "sha256": t.sha256} for t in tables.values()})
    if refuse_deviations and entry["deviations"]:
        raise PlanError("the plan deviates from its lock", problems=[
            f"{loaded.file.name}: {line}" for line in deviation_lines(entry)]
            + [f"(lock {lock_file}) A lock is never replaced: to approve these changes, save the changed plan "
               "under a new name, lock it with 'planrunner lock NEW_PLAN' and run that plan; to keep the locked "
               "analysis, undo the changes (or restore the locked data files)"])
    return entry


# --- run history -----------------------------------------------------------------------------------

def _exclusive(handle: Any) -> None:
    """Hold the log for this process while it appends (POSIX; elsewhere appends are not serialised)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        return
    fcntl.flock(handle.fileno(), fcntl.LOCK_EX)


def append_history(out_root: Path, record: dict, folder: str, reason: str | None,
                   sign: Callable[[dict], dict] | None = None) -> dict:
    """Append one chained entry to out_root/history.jsonl (the file is only ever appended to);
    ``sign`` gives the signature the entry carries (see `history.new_entry`)."""
    log = out_root / HISTORY_FILE
    with open(log, "a+", encoding="utf-8", newline="\n") as handle:
        _exclusive(handle)
        handle.seek(0)
        text = handle.read()
        entries, _ = parse_lines(text)
        previous = {k: v for k, v in entries[-1].items() if k != "_line"} if entries else None
        entry = new_entry(previous, record, folder, reason, sign)
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
        raise RecordError("no run history here", where=str(log),
                          hint="name a plan, its runs folder, or a history.jsonl file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RecordError(f"cannot read the history: {exc}", where=str(log)) from None
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
            record = read_json(record_file, "record")
        except RecordError as exc:
            problems.append(HistoryProblem(e["_line"], f"the record cannot be read: {exc}"))
            continue
        if not isinstance(record, dict):
            problems.append(HistoryProblem(e["_line"], f"{record_file} is not a record"))
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
