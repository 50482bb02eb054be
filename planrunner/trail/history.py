"""The run history: an append-only log of the runs in one output folder, chained by hash.

Each line of `history.jsonl` (beside the run folders) is one JSON entry: sequence number, run id,
run folder, time, operator, the reason given on the command line, the plan's id and SHA-256, the
record's own hash, the hash of the previous entry, and the hash of this entry (over its canonical
content without that field). Changing, removing or reordering any entry breaks the chain at that
point; removing the last entries is detected when their run folders are still there.

This module is pure: planrunner.pipeline.run appends the lines and reads them back.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from planrunner.record.canonical import canonical_json, self_hash

HISTORY_FILE = "history.jsonl"
HISTORY_FORMAT = "planrunner.history/1"
ENTRY_HASH_FIELD = "entry_sha256"
GENESIS = "0" * 64


def new_entry(previous: dict[str, Any] | None, record: dict[str, Any], folder: str,
              reason: str | None, sign: Callable[[dict[str, Any]], dict[str, Any]] | None = None) -> dict[str, Any]:
    """The next entry; ``sign`` (the run's signing, when it signs) gives the signature the entry carries,
    over every other field, so that the entry's own hash covers the signature too."""
    entry: dict[str, Any] = {
        "format": HISTORY_FORMAT,
        "seq": 1 if previous is None else int(previous.get("seq", 0)) + 1,
        "run_id": record["run_id"],
        "folder": folder,
        "finished_utc": record["finished_utc"],
        "operator": record["operator"],
        "reason": reason,
        "plan_id": record["plan"]["id"],
        "plan_sha256": record["plan"]["sha256"],
        "record_sha256": record.get("record_sha256"),
        "previous_sha256": GENESIS if previous is None else previous.get(ENTRY_HASH_FIELD),
    }
    if sign is not None:
        entry["signature"] = sign(entry)
    entry[ENTRY_HASH_FIELD] = self_hash(entry, ENTRY_HASH_FIELD)
    return entry


# Characters that some reader takes for the end of a line: every separator of Python's
# str.splitlines (\n \r \v \f, U+001C–U+001E, NEL U+0085, U+2028, U+2029), which covers Unicode's
# mandatory breaks (line-break classes BK, CR, LF and NL). JSON escapes those below U+0020 itself.
LINE_BREAKS = "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029"


def entry_line(entry: dict[str, Any]) -> str:
    """An entry as one line of history.jsonl: its canonical JSON with every line-break character
    written as a \\u escape, so that free text (a reason, an operator) can never split the line. The
    parsed value, and so the entry's hash, is the same."""
    text = canonical_json(entry)
    for char in LINE_BREAKS:
        text = text.replace(char, f"\\u{ord(char):04x}")
    return text


@dataclass(frozen=True)
class HistoryProblem:
    line: int  # 1-based line of history.jsonl, 0 for the log as a whole
    message: str


def parse_lines(text: str) -> tuple[list[dict[str, Any]], list[HistoryProblem]]:
    """The entries of a log and its unreadable lines. Lines end at \\n only: a log written before
    line breaks were escaped may hold a raw U+2028 or U+0085 inside an entry's text."""
    entries, problems = [], []
    lines = text.split("\n")
    if lines[-1] == "":
        lines.pop()  # the newline that ends the last line
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            problems.append(HistoryProblem(number, "empty line"))
            continue
        try:
            value = json.loads(line)
        except json.JSONDecodeError as exc:
            problems.append(HistoryProblem(number, f"not JSON ({exc.msg})"))
            continue
        if not isinstance(value, dict):
            problems.append(HistoryProblem(number, "not a history entry"))
            continue
        entries.append({**value, "_line": number})
    return entries, problems


def check_chain(entries: list[dict[str, Any]]) -> list[HistoryProblem]:
    """Every way the chain can be broken: a changed entry, a wrong link, a gap in the numbering."""
    problems: list[HistoryProblem] = []
    previous_hash, expected_seq = GENESIS, 1
    for e in entries:
        line = e.get("_line", 0)
        body = {k: v for k, v in e.items() if k != "_line"}
        if body.get(ENTRY_HASH_FIELD) != self_hash(body, ENTRY_HASH_FIELD):
            problems.append(HistoryProblem(
                line, "the entry was changed after it was written (its hash does not match)"))
        if body.get("previous_sha256") != previous_hash:
            problems.append(HistoryProblem(line, "the link to the previous entry is broken "
                                                 "(an entry before it was removed, changed or reordered)"))
        if body.get("seq") != expected_seq:
            problems.append(HistoryProblem(
                line, f"sequence number {body.get('seq')} where {expected_seq} was expected"))
        previous_hash = body.get(ENTRY_HASH_FIELD) or ""
        seq = body.get("seq")
        expected_seq = (seq if isinstance(seq, int) else expected_seq) + 1
    return problems


# --- the verify log: what `planrunner verify` found, kept beside the history --------------------------
# `verifications.jsonl` beside `history.jsonl`: one entry per verify of a logged run, appended only,
# chained by hash exactly as the history is (seq, previous_sha256, entry_sha256; `check_chain`).

VERIFY_FILE = "verifications.jsonl"
VERIFY_FORMAT = "planrunner.verification/1"


@dataclass(frozen=True)
class VerifyOutcome:
    """What one verify found, as its log entry keeps it."""

    passed: bool  # verify's own verdict: exit 0
    summary: str  # "identical", "within tolerance", "3 field(s) outside tolerance", ...
    fields_differing: int
    fields_outside: int
    problems: tuple[str, ...]  # the fields of every problem (record_sha256, datasets[0].sha256, ...)
    signatures_passed: bool
    comparison: str  # which tolerance rule applied: "same environment", "reference draws", "other draws", ""


def new_verification(previous: dict[str, Any] | None, record: dict[str, Any], folder: str, *, verified_utc: str,
                     operator: str, planrunner: str, outcome: VerifyOutcome) -> dict[str, Any]:
    """The next entry of the verify log, for the record verified (its run id, folder and recorded hash)."""
    entry: dict[str, Any] = {
        "format": VERIFY_FORMAT,
        "seq": 1 if previous is None else int(previous.get("seq", 0)) + 1,
        "run_id": record.get("run_id"),
        "folder": folder,
        "record_sha256": record.get("record_sha256"),
        "verified_utc": verified_utc,
        "operator": operator,
        "planrunner": planrunner,
        "passed": outcome.passed,
        "summary": outcome.summary,
        "fields_differing": outcome.fields_differing,
        "fields_outside": outcome.fields_outside,
        "problems": list(outcome.problems),
        "signatures_passed": outcome.signatures_passed,
        "comparison": outcome.comparison,
        "previous_sha256": GENESIS if previous is None else previous.get(ENTRY_HASH_FIELD),
    }
    entry[ENTRY_HASH_FIELD] = self_hash(entry, ENTRY_HASH_FIELD)
    return entry


def latest_verifications(entries: list[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The last verify of each run (by run id, then record hash), with `intact`: whether its entry and
    every entry before it still hold their hashes and links (an edited log is never shown as a pass)."""
    broken = {p.line for p in check_chain(entries)}
    first_broken = min(broken) if broken else None
    latest: dict[str, dict[str, Any]] = {}
    for e in entries:
        intact = first_broken is None or e.get("_line", 0) < first_broken
        latest[f"{e.get('run_id')} {e.get('record_sha256')}"] = {
            **{k: v for k, v in e.items() if k != "_line"}, "intact": intact}
    return latest
