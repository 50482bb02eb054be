"""The one place that orchestrates a run: plan → tables → jobs → results → record → files.

Data flow goes one way. Data files are read by `data.tables`; every file is written by
`trail.store`, which writes a run into a staging folder and renames it into place when every file
is complete, so a folder with the run's name always holds a complete record and both reports; an
existing folder is never reused.
"""

from __future__ import annotations

import datetime as dt
import getpass
import hashlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from planrunner.compile.jobs import Job
from planrunner.data.tables import Table
from planrunner.engines.maxt import MaxTResult
from planrunner.errors import OutputError, PlanrunnerError
from planrunner.execute.executors import Progress, execute_all
from planrunner.execute.families import max_t_families
from planrunner.execute.pool import Execution, early_workers
from planrunner.execute.signals import holding_interrupts
from planrunner.pipeline.check import check_plan
from planrunner.plan.load import LoadedPlan
from planrunner.plan.schema import Plan
from planrunner.record.build import RunFacts, build_record, to_json
from planrunner.record.rehearsal import is_rehearsal
from planrunner.record.results import results_csv, results_parquet
from planrunner.report import render as report
from planrunner.trail.files import HistoryLog, lock_for_run
from planrunner.trail.history import HISTORY_FILE
from planrunner.trail.lock import lock_path_for
from planrunner.trail.names import require_person_name
from planrunner.trail.signatures import SigningKey
from planrunner.trail.signfiles import check_run_signing, find_signers, signed_run_files
from planrunner.trail.store import (  # noqa: F401 (STAGING_PREFIX for callers)
    STAGING_PREFIX,
    place_folder,
    require_plain_name,
    staged_folder,
)

Clock = Callable[[], dt.datetime]


def utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def utc_stamp(moment: dt.datetime) -> str:
    """A moment as the record, the logs and the signatures write it: UTC to the microsecond, e.g.
    2026-12-03T02:43:58.689963Z."""
    return moment.astimezone(dt.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


@dataclass(frozen=True)
class RunOutcome:
    folder: Path
    record: dict
    history_entry: dict | None = None
    signed: bool = False  # the record and its history entry carry the 'executed' signature
    recovered: tuple[dict, ...] = ()  # entries of earlier runs, killed before logging, appended first
    index: Path | None = None  # the index page beside the run folders, rewritten after the run
    index_problem: str | None = None  # why it could not be rewritten (the run itself is complete)


def default_operator() -> str:
    try:
        return getpass.getuser()
    except (KeyError, OSError):
        return "unknown"


def run_plan(path: str | Path, *, out: str | Path | None = None, operator: str | None = None,
             command: list[str] | None = None, clock: Clock = utc_now, params: dict[str, str] | None = None,
             lock: str | Path | None = None, refuse_deviations: bool = False, reason: str | None = None,
             history: bool = True, data_root: str | Path | None = None, execution: Execution | None = None,
             progress: Progress | None = None, signing: SigningKey | None = None,
             signers: str | Path | None = None, written: Callable[[RunOutcome], None] | None = None) -> RunOutcome:
    """Run every analysis of the plan and write record.json, report.html and report.md.

    The plan is compared with its lock (``lock``, or PLAN.lock.json beside it when that exists);
    with ``refuse_deviations`` any deviation, or a missing lock, stops the run before computing.
    The run is appended to the history log beside the run folders (unless ``history`` is False).
    ``execution`` chooses where the jobs run (serial by default; the numbers are the same);
    ``progress(done, total)`` hears of finished resamples. An interrupt while computing leaves
    nothing behind: files are written only after every result is in. With ``signing`` the record
    and its history entry are signed as executed; a signers file (``signers``, or signers.yaml beside
    the plan) is consulted before anything is computed (see `signfiles.check_run_signing`).

    The run folder is put in place and its history entry appended together: an interrupt that
    arrives meanwhile waits until both are done and is then raised. ``written(outcome)`` hears of the
    run as soon as both are done, so that a caller interrupted after that moment can say so.
    """
    started = clock()
    operator = require_person_name(operator, "--operator") if operator is not None else default_operator()
    execution = execution or Execution()
    with early_workers(execution):  # worker processes start while the plan and data are checked
        checked = check_plan(path, params=params, data_root=data_root)
        loaded, tables, jobs = checked.loaded, checked.tables, checked.jobs
        assert tables is not None and jobs is not None
        lock_entry = lock_for_run(loaded, tables, lock, refuse_deviations=refuse_deviations)
        check_run_signing(find_signers(loaded.folder, signers), signing, today=started.date(),
                          lock_file=Path(lock) if lock is not None else lock_path_for(loaded.file),
                          refuse_deviations=refuse_deviations)
        results, max_t = execute_plan(loaded.plan, jobs, execution=execution, progress=progress)
    finished = clock()
    run_id = new_run_id(loaded, tables, started)
    facts = RunFacts(run_id=run_id, started_utc=utc_stamp(started), finished_utc=utc_stamp(finished),
                     operator=operator,
                     command=tuple(command or ["planrunner", "run", str(path)]),
                     execution=execution.describe(), lock=lock_entry, parameters=checked.parameters)
    record = build_record(loaded, tables, jobs, results, max_t, facts)
    signature_files, sign_entry = (signed_run_files(signing, record, to_json(record), utc_stamp(clock()))
                                   if signing is not None else ({}, None))
    out_root = Path(out) if out is not None else loaded.folder / "runs"

    def done(folder: Path, entry: dict | None, recovered: list[dict]) -> RunOutcome:
        outcome = RunOutcome(folder, record, entry, signing is not None, tuple(recovered))
        if written is not None:
            written(outcome)
        return outcome

    return write_run(out_root, f"{loaded.plan.plan}-{started.strftime('%Y%m%dT%H%M%SZ')}-{run_id[:8]}", record,
                     signature_files, history=history, reason=reason, sign=sign_entry, done=done)


def execute_plan(plan: Plan, jobs: list[Job], *, execution: Execution | None = None,
                 progress: Progress | None = None) -> tuple[list[Any], dict[int, MaxTResult]]:
    """The execute stage of a run (and of verify's re-run): every analysis's result, on
    ``execution``, and the joint max-T run of every max-t family (by family index)."""
    return execute_all(jobs, execution=execution, progress=progress), max_t_families(plan, jobs)


def new_run_id(loaded: LoadedPlan, tables: dict[str, Table], started: dt.datetime) -> str:
    """An id from what the run is (plan, data, start time), so an injected clock makes it stable."""
    digest = hashlib.sha256()
    for part in [loaded.sha256, utc_stamp(started), *(t.sha256 for t in tables.values())]:
        digest.update(part.encode())
    return digest.hexdigest()[:16]


def write_run(out_root: Path, name: str, record: dict, extra: Mapping[str, str | bytes] | None = None, *,
              history: bool = False, reason: str | None = None, sign: Callable[[dict], dict] | None = None,
              done: Callable[[Path, dict | None, list[dict]], RunOutcome] | None = None) -> RunOutcome:
    """Render the reports, then write the record, both reports and their figures as a new run folder
    (with ``extra``: the record's signature, when the run signs it) and, with ``history``, append the
    run's entry to the history log beside it. ``done(folder, entry, recovered)`` makes the outcome.

    The reports are rendered before anything is created; `store.staged_folder` writes every file into
    a staging folder, which is renamed into place, so a folder with a run's name always holds a
    complete record and both reports, and an existing folder is never reused. The rename and the
    history entry happen together: under the log's lock, with interrupts held until both are done.
    The entry is written into the folder before the rename (`files.ENTRY_WAITING`) and removed once
    it is in the log, so a process killed between the two leaves it waiting for the next run (or
    'history --repair') to append.
    """
    require_plain_name(name)  # before rendering, so that a bad name never costs a render
    if history and is_rehearsal(record):
        raise OutputError("a rehearsal's record is never appended to a run history", where=str(out_root),
                          hint="a rehearsal is written without history by 'planrunner rehearse'")
    done = done or (lambda folder, entry, recovered: RunOutcome(folder, record, entry, False, tuple(recovered)))
    # report.html, report.md and the figures/*.svg files the Markdown report links to
    files: dict[str, str | bytes] = {"record.json": to_json(record), **report.render_all(record), **(extra or {})}
    # the results dataset: the record's numbers as one flat table (record/results.py)
    files["results.csv"] = results_csv(record)
    files["results.parquet"] = results_parquet(record)
    with staged_folder(out_root, name, files) as staging:
        if not history:
            with holding_interrupts():  # put in place and known to be, or neither
                return done(place_folder(staging, out_root, name), None, [])
        with HistoryLog(out_root) as log, holding_interrupts():
            folder = place_folder(staging, out_root, name,
                                  prepare=lambda final: log.prepare(staging, final, record, reason, sign))
            try:
                entry = log.append(folder)
            except OSError as exc:
                raise OutputError(f"the run was written to {folder}, but its history entry could not be appended: "
                                  f"{exc.strerror or exc}", where=str(out_root / HISTORY_FILE),
                                  hint=f"the entry waits in the run folder; 'planrunner history {out_root} --repair' "
                                       "or the next run there appends it") from None
            outcome = done(folder, entry, log.recovered)
            # still under the log's lock: two runs finishing together rewrite the index one after the other
            return _with_index(outcome, out_root)


def _with_index(outcome: RunOutcome, out_root: Path) -> RunOutcome:
    """The outcome with the index page rewritten (trail/index.py); a failure to write it is told, not
    raised: the run folder and its history entry are complete, and the next run writes the page."""
    from planrunner.trail.index import refresh_index

    try:
        return replace(outcome, index=refresh_index(out_root))
    except PlanrunnerError as exc:
        return replace(outcome, index_problem=str(exc))
    except OSError as exc:
        return replace(outcome, index_problem=f"{out_root / HISTORY_FILE}: cannot read the run history: {exc}")

