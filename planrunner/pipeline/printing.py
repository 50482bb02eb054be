"""What a run folder's record gives beyond the run: reading a record back (`read_record`) and
printing its report to PDF (`write_pdf`), shared by `run --pdf`, `rehearse --pdf`, `pdf`, `verify`
and the Python API."""

from __future__ import annotations

from pathlib import Path

from planrunner.errors import RecordError
from planrunner.record.build import FORMAT
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.rehearsal import is_rehearsal
from planrunner.trail.store import read_json, write_new_file

REQUIRED: dict[str, type | tuple[type, ...]] = {
    "run_id": str, "started_utc": str, "finished_utc": str, "operator": str, "command": list, "plan": dict,
    "datasets": list, "analyses": list, "seed": dict, "environment": dict}


def read_record(path: str | Path) -> tuple[Path, dict]:
    """A record from record.json or from its run folder; refuse what is not a record."""
    file = Path(path)
    if file.is_dir():
        file = file / "record.json"
    record = read_json(file, "record", hint="name a record.json or its run folder")
    if not isinstance(record, dict) or record.get("format") != FORMAT:
        raise RecordError(f"not a planrunner record (format {FORMAT} expected)", where=str(file))
    missing = [key for key, kind in REQUIRED.items() if not isinstance(record.get(key), kind)]
    plan = record["plan"] if isinstance(record.get("plan"), dict) else {}
    missing += [f"plan.{key}" for key in ("file", "sha256", "text") if not isinstance(plan.get(key), str)]
    for i, ds in enumerate(record["datasets"] if isinstance(record.get("datasets"), list) else []):
        if not (isinstance(ds, dict) and isinstance(ds.get("file"), str) and isinstance(ds.get("sha256"), str)):
            missing.append(f"datasets[{i}]")
    if missing:
        raise RecordError(f"the record is incomplete or damaged: {', '.join(missing)} missing or of the wrong kind",
                          where=str(file), hint="verify the record.json that the run wrote")
    return file, record


def write_pdf(run: str | Path, paper: str = "A4", out: str | Path | None = None) -> Path:
    """Print a run's HTML report to PDF (A4 or Letter) with headless Chromium and write it as a new
    file: ``out``, or report-PAPER.pdf in the run folder. A folder without report.html gets the page
    rendered from its record first. Raises OutputError, saying how to get one, without a browser."""
    import tempfile

    from planrunner.report.pdf import find_browser, print_pdf
    from planrunner.report.render import render

    browser = find_browser()  # before anything else: the one message when there is none
    record_file, record = read_record(run)
    folder = record_file.parent
    target = Path(out) if out is not None else folder / f"report-{paper}.pdf"
    page = folder / "report.html"
    stamp = REHEARSAL_STAMP if is_rehearsal(record) else None  # on every page of a rehearsal's PDF
    if page.is_file():
        data = print_pdf(page, str(record["run_id"]), paper, browser=browser, stamp=stamp)
    else:
        with tempfile.TemporaryDirectory(prefix="planrunner-pdf-page-") as scratch:
            page = Path(scratch) / "report.html"
            page.write_text(render(record, "html"), encoding="utf-8")
            data = print_pdf(page, str(record["run_id"]), paper, browser=browser, stamp=stamp)
    return write_new_file(target, data, what="PDF", hint="choose another name with --out, or remove the old PDF")
