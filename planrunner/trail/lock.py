"""Plan locks: what a plan was when it was fixed, and how the plan that runs differs from it.

A lock file (`PLAN.lock.json` beside `PLAN.yaml`) holds the plan's SHA-256 (of its bytes), the
SHA-256 of its parsed content in canonical JSON (so a changed comment or layout is told apart from
a changed analysis), the parsed content itself (so every deviation can be named by its path), the
UTC time, the operator, a note, and for each data file whether it existed at lock time and, if so,
its hash. The lock carries a hash of its own content, so an edited lock is refused.

This module is pure: the caller reads and writes the files (planrunner.pipeline.run).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from planrunner.errors import RecordError
from planrunner.record.canonical import content_sha256, differences, self_hash

LOCK_FORMAT = "planrunner.lock/1"
LOCK_HASH_FIELD = "lock_sha256"


def lock_path_for(plan_file: Path) -> Path:
    """plans/x/plan.yaml -> plans/x/plan.lock.json"""
    return plan_file.with_name(f"{plan_file.stem}.lock.json")


def build_lock(*, plan_file: str, plan_sha256: str, content: Any, locked_utc: str, operator: str,
               note: str | None, parameters: dict[str, str], data: list[dict[str, Any]]) -> dict[str, Any]:
    """The lock document. ``data``: per dataset {name, file, present, sha256, bytes}."""
    lock: dict[str, Any] = {
        "format": LOCK_FORMAT,
        "plan_file": plan_file,
        "sha256": plan_sha256,
        "canonical_sha256": content_sha256(content),
        "content": content,
        "locked_utc": locked_utc,
        "operator": operator,
        "note": note,
        "parameters": dict(parameters),
        "data": data,
    }
    lock[LOCK_HASH_FIELD] = self_hash(lock, LOCK_HASH_FIELD)
    return lock


def check_lock(lock: Any, shown: str) -> dict[str, Any]:
    """Refuse a document that is not a lock, or a lock whose content was edited after it was written."""
    if not isinstance(lock, dict) or lock.get("format") != LOCK_FORMAT:
        raise RecordError(f"not a planrunner lock file (format {LOCK_FORMAT} expected)", where=shown,
                          hint="create one with 'planrunner lock PLAN'")
    if lock.get(LOCK_HASH_FIELD) != self_hash(lock, LOCK_HASH_FIELD):
        raise RecordError("the lock file was changed after it was written (its own hash does not match)",
                          where=shown, hint="restore the lock from your records; a lock is never edited")
    return lock


def _show(value: Any, missing: bool) -> Any:
    return "(absent)" if missing else value


def compare_with_lock(lock: dict[str, Any], *, lock_file: str, plan_sha256: str, content: Any,
                      data_now: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The record's `plan.lock` entry: the lock's identity and every deviation {path, locked, now}.

    ``data_now`` maps dataset name to {file, sha256} of the file read now. A data file absent at
    lock time is no deviation (the plan is meant to be fixed before the data exist); the same file,
    present at lock time, with other bytes now is one, at the path `data.NAME.sha256`. (With a
    parameter in the path, another month's file is another file, not a deviation.)
    """
    deviations = [{"path": d.path, "locked": _show(d.before, d.missing_before), "now": _show(d.after, d.missing_after)}
                  for d in differences(lock["content"], content)]
    locked_data = {d["name"]: d for d in lock.get("data", [])}
    for name, now in data_now.items():
        entry = locked_data.get(name)
        if (entry is not None and entry.get("present") and entry.get("file") == now["file"]
                and entry.get("sha256") != now["sha256"]):
            deviations.append({"path": f"data.{name}.sha256", "locked": entry.get("sha256"), "now": now["sha256"]})
    return {
        "file": lock_file,
        "sha256": lock["sha256"],
        "canonical_sha256": lock["canonical_sha256"],
        "locked_utc": lock["locked_utc"],
        "operator": lock["operator"],
        "note": lock["note"],
        "lock_sha256": lock[LOCK_HASH_FIELD],
        "plan_bytes_identical": plan_sha256 == lock["sha256"],
        "content_identical": content_sha256(content) == lock["canonical_sha256"],
        "data_at_lock": [{"name": d["name"], "file": d["file"], "present": d["present"], "sha256": d.get("sha256")}
                         for d in lock.get("data", [])],
        "deviations": deviations,
    }


def deviation_lines(entry: dict[str, Any]) -> list[str]:
    """One line per deviation, for messages and summaries."""
    return [f"{d['path']}: locked {d['locked']!r}, now {d['now']!r}" for d in entry["deviations"]]
