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
