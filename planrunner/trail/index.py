"""The index page of an output folder: every run of the plan in order, and its numbers across runs.

Gathered from the history log (`history.jsonl`), the records it names and the verify log beside it
(`verifications.jsonl`), and nothing else:
per run its time, operator, reason, parameters, data hashes, lock status and deviations, whether
the record is still the one the log holds (the integrity check of `planrunner history`), the last
`verify` of it from the verify log beside the history (`verifications.jsonl`), and its analyses; a
run whose plan or lock differs from the run before it is flagged. Rendered by `planrunner.report.trends`.

`index.html` is the one file planrunner replaces: after each run (and each verify the verify log
keeps) it is rewritten to stay current,
through `store.replace_file` (the new page is written in full beside it, flushed, then renamed over
it, so a reader sees the old page or the new one, never a part). It is a view: deleting it loses
nothing, and the next run (or `planrunner history --html`) writes it again.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from planrunner.errors import RecordError
from planrunner.record.canonical import RECORD_HASH_FIELD, record_sha256
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.rehearsal import is_rehearsal
from planrunner.trail.files import read_verifications
from planrunner.trail.history import HISTORY_FILE, check_chain, latest_verifications, parse_lines
from planrunner.trail.store import read_json, replace_file

INDEX_FILE = "index.html"
ANALYSIS_FIELDS = ("id", "statistic", "statistic_label", "unit", "estimate", "intervals", "p_value")


def _lock_facts(lock: Any) -> dict[str, Any]:
    if not isinstance(lock, dict):
        return {"status": "no lock", "deviations": [], "sha256": None}
    deviations = [str(d.get("path")) for d in lock.get("deviations") or [] if isinstance(d, dict)]
    status = (f"locked {str(lock.get('locked_utc') or '')[:10]}; "
              + (f"{len(deviations)} deviation(s)" if deviations else "no deviation"))
    return {"status": status, "deviations": deviations, "sha256": lock.get("lock_sha256") or lock.get("sha256")}


def _verify_facts(entry: dict[str, Any] | None) -> dict[str, Any]:
    """The last verify of a run as the index shows it: its verdict and time, or why it is not shown."""
    if entry is None:
        return {"status": "not verified", "passed": None, "utc": None, "summary": ""}
    if not entry["intact"]:
        return {"status": "verify log changed: its result is not shown", "passed": None, "utc": None, "summary": ""}
    passed = entry.get("passed") is True
    return {"status": "verified: PASSED" if passed else "verified: FAILED", "passed": passed,
            "utc": entry.get("verified_utc"), "summary": str(entry.get("summary") or "")}


def gather_runs(out_root: Path) -> tuple[list[dict[str, Any]], str]:
    """The runs of an output folder in the log's order, and the plan's title (from the last record)."""
    log = out_root / HISTORY_FILE
    with open(log, encoding="utf-8", newline="") as handle:  # lines end at \n only
        entries, _ = parse_lines(handle.read())
    broken = {p.line for p in check_chain(entries)}
    verified = latest_verifications(read_verifications(out_root)[0])
    runs: list[dict[str, Any]] = []
    title = ""
    previous: dict[str, Any] | None = None
    for e in entries:
        run: dict[str, Any] = {k: e.get(k) for k in ("seq", "run_id", "folder", "finished_utc", "operator",
                                                      "reason", "plan_id", "plan_sha256")}
        run.update(parameters={}, datasets=[], lock=_lock_facts(None), analyses=[], changed=False, changes=[])
        record_file = out_root / str(e.get("folder")) / "record.json"
        integrity = "entry changed or out of order in the log" if e.get("_line") in broken else "intact"
        try:
            record = read_json(record_file, "record")
        except RecordError:
            record = None
            integrity = "record missing or unreadable"
        if isinstance(record, dict):
            logged = e.get("record_sha256")
            if record.get(RECORD_HASH_FIELD) != logged or record_sha256(record) != logged:
                integrity = "the record is not the one logged"
            if is_rehearsal(record):  # never logged by planrunner: a log edited by hand names one
                integrity = f"{REHEARSAL_STAMP} (a rehearsal's record, never a run)"
            run["parameters"] = dict(record.get("parameters") or {})
            run["datasets"] = [{"name": d.get("name"), "file": d.get("file"), "sha256": d.get("sha256")}
                               for d in record.get("datasets") or [] if isinstance(d, dict)]
            run["lock"] = _lock_facts((record.get("plan") or {}).get("lock"))
            run["analyses"] = [{k: a.get(k) for k in ANALYSIS_FIELDS}
                               for a in record.get("analyses") or [] if isinstance(a, dict) and "id" in a]
            title = str((record.get("plan") or {}).get("title") or title)
        run["integrity"] = integrity
        run["verified"] = _verify_facts(verified.get(f"{e.get('run_id')} {e.get('record_sha256')}"))
        if previous is not None:
            if run["plan_sha256"] != previous["plan_sha256"]:
                run["changes"].append("plan")
            if run["lock"]["sha256"] != previous["lock"]["sha256"]:
                run["changes"].append("lock")
            run["changed"] = bool(run["changes"])
        runs.append(run)
        previous = run
    return runs, title


def render_index_of(out_root: Path, kind: str) -> str:
    """The index of an output folder as HTML ('html') or Markdown ('md')."""
    from planrunner.report.trends import render_index

    runs, title = gather_runs(out_root)
    return render_index(runs, title, kind)


def refresh_index(out_root: Path) -> Path:
    """Write the output folder's index.html anew (the one file planrunner replaces)."""
    return replace_file(out_root / INDEX_FILE, render_index_of(out_root, "html"), what="index page")
