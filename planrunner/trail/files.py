"""The audit trail's files: plan locks (PLAN.lock.json), the run history (history.jsonl) and the
verify log beside it (verifications.jsonl).

The logic is pure and lives in `lock` and `history`. Nothing is ever replaced: a lock is created
new by `store.write_new_file` and read back by `store.read_json`; the two logs are only appended to.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from planrunner.data.dummy import refuse_dummy_data
from planrunner.data.tables import Table, file_sha256, resolve_data_path
from planrunner.errors import OutputError, PlanError, RecordError
from planrunner.plan.load import LoadedPlan, read_plan
from planrunner.plan.params import PLACEHOLDER, resolve_values, substitute
from planrunner.record.canonical import RECORD_HASH_FIELD, record_sha256, self_hash
from planrunner.trail.history import (
    ENTRY_HASH_FIELD,
    GENESIS,
    HISTORY_FILE,
    VERIFY_FILE,
    HistoryProblem,
    check_chain,
    entry_line,
    new_entry,
    parse_lines,
)
from planrunner.trail.lock import build_lock, check_lock, compare_with_lock, deviation_lines, lock_path_for
from planrunner.trail.names import require_person_name
from planrunner.trail.store import read_json, sync_folder, write_new_file, write_synced

# --- locks -----------------------------------------------------------------------------------------

def lock_plan(path: str | Path, *, operator: str, locked_utc: str, note: str | None = None,
              params: dict[str, str] | None = None) -> tuple[Path, dict]:
    """Write PLAN.lock.json beside the plan; an existing lock is never replaced."""
    require_person_name(operator, "--operator")
    loaded = read_plan(path)
    # a parameter without a value leaves its data files unknown: they are recorded as not present
    values = resolve_values(loaded.plan, params or {}, require=False)
    data = []
    for name, ds in loaded.plan.datasets.items():
        file = substitute(ds.file, values)
        entry: dict[str, Any] = {"name": name, "file": file, "present": False, "sha256": None, "bytes": None}
        if PLACEHOLDER.search(file) is None:
            target = resolve_data_path(loaded.folder, file)
            refuse_dummy_data([target])  # a rehearsal's dummy file is never the data a lock records
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

def _lock_folder(folder: Path) -> int | None:
    """Hold ``folder`` for this process until the descriptor returned is closed (POSIX; elsewhere
    runs into one folder are not serialised). The folder itself is the lock, so that no file appears
    in it before a run is logged."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - Windows
        return None
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX)
    except BaseException:
        os.close(descriptor)
        raise
    return descriptor


# In a run folder: the history entry its run is about to append. Written before the folder is put
# in place and removed once the entry is in the log, so a run killed between the two leaves its entry
# waiting here, and the next run into the same output folder (or 'history --repair') appends it.
ENTRY_WAITING = ".history-entry.json"


class HistoryLog:
    """The history log of one output folder, held by this process (an exclusive lock) from the
    moment a run is about to be put in place until its entry is appended.

    On entering, it first appends the entries that runs killed between those two steps left waiting
    in their folders (`recovered`), so that the log and the run folders agree again.
    """

    def __init__(self, out_root: Path):
        self.out_root = out_root
        self.recovered: list[dict] = []
        self._pending: dict | None = None

    def __enter__(self) -> HistoryLog:
        self._log = self.out_root / HISTORY_FILE
        try:
            self._lock = _lock_folder(self.out_root)
        except OSError as exc:
            raise OutputError(f"cannot use the output folder: {exc.strerror or exc}", where=str(self.out_root),
                              hint="nothing was kept; check that the folder can be written, then run again") from None
        try:
            self.recovered = self._recover()
        except OSError as exc:
            self._unlock()
            raise OutputError(f"cannot append to the run history: {exc.strerror or exc}", where=str(self._log),
                              hint="free space or check the folder's permissions, then run again") from None
        except BaseException:
            self._unlock()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        self._unlock()

    def _unlock(self) -> None:
        if self._lock is not None:
            os.close(self._lock)
            self._lock = None

    def prepare(self, staging: Path, folder: str, record: dict, reason: str | None,
                sign: Callable[[dict], dict] | None) -> None:
        """Write into the staging folder the entry this run appends once it is in place as ``folder``."""
        self._pending = new_entry(self.last(), record, folder, reason, sign)
        write_synced(staging / ENTRY_WAITING, entry_line(self._pending) + "\n")

    def append(self, folder: Path) -> dict:
        """Append the prepared entry of the run now in place in ``folder``."""
        assert self._pending is not None, "prepare() comes first"
        self.append_entry(self._pending)
        try:
            (folder / ENTRY_WAITING).unlink()
            sync_folder(folder)
        except OSError:
            pass  # the entry is in the log; the next HistoryLog of this folder removes the copy
        return self._pending

    def _text(self) -> str:
        return _log_text(self._log)

    def _entries(self) -> list[dict]:
        return parse_lines(self._text())[0]

    def last(self) -> dict | None:
        entries = self._entries()
        return {k: v for k, v in entries[-1].items() if k != "_line"} if entries else None

    def append_entry(self, entry: dict) -> None:
        """Append one entry as one line (the log is only ever appended to), flushed to disk."""
        _append_line(self._log, self._text(), entry)

    def _recover(self) -> list[dict]:
        recovered = []
        for folder in sorted(self.out_root.iterdir()):
            waiting = folder / ENTRY_WAITING
            if folder.name.startswith(".") or not waiting.is_file():
                continue
            entry = _waiting_entry(waiting)
            entries = self._entries()
            if entry is not None and any(e.get(ENTRY_HASH_FIELD) == entry.get(ENTRY_HASH_FIELD) for e in entries):
                waiting.unlink()  # appended already: only removing this file was cut short
            elif entry is not None and _fits(entry, entries, folder):
                self.append_entry(entry)
                waiting.unlink()
                recovered.append(entry)
            # otherwise the folder stays as it is, and `history` says why
        return recovered


def _append_line(log: Path, text: str, entry: dict) -> None:
    """Append ``entry`` as one line to ``log``, whose text is ``text`` now; flushed to disk."""
    with open(log, "a", encoding="utf-8", newline="\n") as handle:
        if text and not text.endswith("\n"):
            handle.write("\n")
        handle.write(entry_line(entry) + "\n")
        handle.flush()
        os.fsync(handle.fileno())


def _log_text(log: Path) -> str:
    """A log's text, read with lines ending at \n only; empty when there is no log yet."""
    try:
        with open(log, encoding="utf-8", newline="") as handle:
            return handle.read()
    except FileNotFoundError:
        return ""


def _waiting_entry(waiting: Path) -> dict | None:
    try:
        entry = json.loads(waiting.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return None
    return entry if isinstance(entry, dict) else None


def _fits(entry: dict, entries: list[dict], folder: Path) -> bool:
    """Whether a waiting entry is the next one of the log, intact, for the record in its folder."""
    last = entries[-1] if entries else None
    previous = last.get(ENTRY_HASH_FIELD) if last else GENESIS
    last_seq = last.get("seq") if last else 0
    seq = (last_seq if isinstance(last_seq, int) else 0) + 1
    try:
        record = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return False
    return (entry.get(ENTRY_HASH_FIELD) == self_hash(entry, ENTRY_HASH_FIELD) and entry.get("folder") == folder.name
            and entry.get("previous_sha256") == previous and entry.get("seq") == seq and isinstance(record, dict)
            and record.get(RECORD_HASH_FIELD) == entry.get("record_sha256") == record_sha256(record))


def history_log(target: str | Path) -> Path:
    """The history.jsonl named by a log, its folder, or a plan whose runs/ holds it."""
    target = Path(target)
    if target.is_file() and target.name != HISTORY_FILE:
        return target.resolve().parent / "runs" / HISTORY_FILE
    if target.is_dir():
        return target / HISTORY_FILE
    return target


def repair_history(target: str | Path) -> list[dict]:
    """Append the entries that killed runs left waiting in their folders; return them."""
    log = history_log(target)
    if not log.is_file():
        raise RecordError("no run history here", where=str(log),
                          hint="name a plan, its runs folder, or a history.jsonl file")
    with HistoryLog(log.parent) as held:
        return held.recovered


@dataclass(frozen=True)
class HistoryReport:
    log: Path
    entries: list[dict]
    problems: list[HistoryProblem]
    verifications: int = 0  # entries of the verify log beside it


def history_report(target: str | Path) -> HistoryReport:
    """Read a history log (given the log, its folder, or a plan whose runs/ holds it) and check it."""
    log = history_log(target)
    try:
        with open(log, encoding="utf-8", newline="") as handle:  # lines end at \n only
            text = handle.read()
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
        # a hidden .staging-* folder is a run that was never put in place, not a run
        if folder.name.startswith(".") or not (folder / "record.json").is_file() or folder.name in listed:
            continue
        if (folder / ENTRY_WAITING).is_file():
            problems.append(HistoryProblem(0, f"run folder {folder.name} was written, but its run was stopped "
                                              "before its entry was appended; 'planrunner history "
                                              f"{log.parent} --repair' (or the next run there) appends it"))
        else:
            problems.append(HistoryProblem(0, f"run folder {folder.name} is not in the history "
                                              "(entries may have been removed from the end of the log)"))
    verifications, verify_problems = read_verifications(log.parent)
    problems += [HistoryProblem(0, f"{VERIFY_FILE} line {p.line}: {p.message}") for p in verify_problems]
    return HistoryReport(log, [{k: v for k, v in e.items() if k != "_line"} for e in entries],
                         sorted(problems, key=lambda p: p.line), len(verifications))


# --- the verify log --------------------------------------------------------------------------------

def verify_log_for(record_file: Path, record: dict) -> Path | None:
    """The output folder whose verify log takes the verify of this record: the folder holding its run
    folder, when that folder's history logs this run there; None for a record that no history logs
    (a copy elsewhere, a run with history off, a rehearsal)."""
    out_root = record_file.resolve().parent.parent
    entries, _ = parse_lines(_log_text(out_root / HISTORY_FILE))
    logged = any(e.get("run_id") == record.get("run_id") and e.get("folder") == record_file.resolve().parent.name
                 for e in entries)
    return out_root if logged else None


def append_verification(out_root: Path, make: Callable[[dict | None], dict]) -> dict:
    """Append the entry ``make(last entry)`` gives to the output folder's verify log, holding the
    folder as a run holds it while it appends to the history."""
    log = out_root / VERIFY_FILE
    try:
        lock = _lock_folder(out_root)
    except OSError as exc:
        raise OutputError(f"cannot use the output folder: {exc.strerror or exc}", where=str(out_root)) from None
    try:
        text = _log_text(log)
        entries, _ = parse_lines(text)
        last = {k: v for k, v in entries[-1].items() if k != "_line"} if entries else None
        entry = make(last)
        try:
            _append_line(log, text, entry)
        except OSError as exc:
            raise OutputError(f"cannot append to the verify log: {exc.strerror or exc}", where=str(log),
                              hint="free space or check the folder's permissions") from None
        return entry
    finally:
        if lock is not None:
            os.close(lock)


def read_verifications(out_root: Path) -> tuple[list[dict], list[HistoryProblem]]:
    """The verify log's entries (with their `_line`) and every way its chain is broken."""
    try:
        text = _log_text(out_root / VERIFY_FILE)
    except (OSError, UnicodeDecodeError) as exc:
        return [], [HistoryProblem(0, f"cannot read the verify log: {exc}")]
    entries, problems = parse_lines(text)
    return entries, sorted(problems + check_chain(entries), key=lambda p: p.line)
