"""Command line of the audit verbs: lock, verify, history, compare, schema, selfcheck.

Part of the command-line layer (with `cli`): it parses, prints and chooses exit codes, and leaves
every computation to `runner` and `audit`.
"""

from __future__ import annotations

import argparse
import json
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from planrunner.cli.options import DATA_ROOT_HELP, add_execution_options, execution_of
from planrunner.record.rehearsal import STAMP

# the exit codes of planrunner.cli.main (README: Commands), repeated so that this module imports on its own
EXIT_OK, EXIT_INPUT, EXIT_DIFFERS = 0, 2, 3
MAX_ROWS = 10  # differing fields shown in the terminal; the full list goes to a file
MAX_KINDS = 8  # kinds of differing fields counted in the terminal
# what verify says first and last about a rehearsal's record (planrunner rehearse)
REHEARSAL_WORDS = (f"{STAMP}: this record is a rehearsal; its dummy data were made again from the recorded seed "
                   "and sizes and the plan re-run on them")


def add_audit_run_options(run: argparse.ArgumentParser) -> None:
    run.add_argument("--param", action="append", metavar="NAME=VALUE",
                     help="a value for a plan parameter (repeat for several)")
    run.add_argument("--lock", metavar="FILE",
                     help="the lock to compare with (default: PLAN.lock.json beside the plan)")
    run.add_argument("--refuse-deviations", action="store_true",
                     help="stop (exit 2) if the plan or its locked data deviate from the lock, or if there is no lock")
    run.add_argument("--reason", metavar="TEXT", help="why this run is made; written to the run history")
    run.add_argument("--pdf", action="store_true",
                     help="also print the report to report-PAPER.pdf in the run folder (needs Chromium or Chrome)")
    add_pdf_options(run)


def add_audit_verbs(verbs: Any) -> None:
    lock = verbs.add_parser("lock", help="freeze a plan: write PLAN.lock.json beside it")
    lock.add_argument("plan", help="path to the plan (YAML)")
    lock.add_argument("--note", help="a note kept in the lock (e.g. the protocol version)")
    lock.add_argument("--operator", help="who locks the plan (default: the login name)")
    lock.add_argument("--param", action="append", metavar="NAME=VALUE",
                      help="parameter values naming the data files whose presence is recorded")

    verify = verbs.add_parser("verify", help="re-run a record and compare every number")
    verify.add_argument("record", help="record.json or its run folder")
    verify.add_argument("--plan",
                        help="the plan file whose folder holds the data (default: found above the run folder)")
    add_execution_options(verify)
    verify.add_argument("--data-root", metavar="DIR", help=DATA_ROOT_HELP)
    verify.add_argument("--signers", metavar="FILE", help="the trusted signers (default: signers.yaml beside the plan)")
    verify.add_argument("--operator", help="who verifies (default: the login name); kept in the verify log")
    verify.add_argument("--differences", metavar="FILE",
                        help="write every differing field to FILE (default: planrunner-verify-RUN-TIME.tsv "
                             "in the temporary folder, when more differ than the terminal shows)")

    history = verbs.add_parser("history", help="list the run history and check its hash chain")
    history.add_argument("target", help="a plan, its runs folder, or a history.jsonl file")
    history.add_argument("--repair", action="store_true",
                         help="first append the entries of runs stopped after writing their folder and before "
                              "appending their entry (they wait in the run folder)")
    history.add_argument("--signers", metavar="FILE",
                         help="the trusted signers (default: signers.yaml beside the runs folder or the plan)")
    history.add_argument("--html", metavar="FILE",
                         help="also write the index of the runs (every run, each analysis across runs) as a page")
    history.add_argument("--markdown", metavar="FILE", help="also write the index of the runs as Markdown")

    compare = verbs.add_parser("compare", help="put two records side by side")
    compare.add_argument("record_a", help="the earlier record (record.json or run folder)")
    compare.add_argument("record_b", help="the later record")
    compare.add_argument("--markdown", metavar="FILE", help="also write the comparison as Markdown")
    compare.add_argument("--html", metavar="FILE", help="also write the comparison as a self-contained HTML page")

    pdf = verbs.add_parser("pdf", help="print a run's report to PDF with headless Chromium")
    pdf.add_argument("run", help="the run folder (or its record.json)")
    add_pdf_options(pdf)
    pdf.add_argument("--out", metavar="FILE",
                     help="where to write the PDF (default: report-PAPER.pdf in the run folder)")

    schema = verbs.add_parser("schema", help="print the JSON Schema of the plan or of the record")
    schema.add_argument("which", choices=["plan", "record"])

    selfcheck = verbs.add_parser("selfcheck", help="run the built-in check cases and write a hashed report")
    selfcheck.add_argument("--out", metavar="FILE",
                           help="where to write the report (default: planrunner-selfcheck-TIME.json here)")
    selfcheck.add_argument("--check", metavar="REPORT", help="check an existing report's hash instead of running")


def lock_summary(record: dict) -> str:
    lock = record["plan"].get("lock")
    if lock is None:
        return "plan lock: none (the plan was not locked)"
    head = f"plan lock: {lock['file']} (locked {lock['locked_utc']} by {lock['operator']})"
    if not lock["deviations"]:
        extra = "" if lock.get("plan_bytes_identical", True) else "; only comments or layout changed"
        return f"{head}: no deviations{extra}"
    lines = [f"{head}: {len(lock['deviations'])} DEVIATION(S) from the locked plan"]
    lines += [f"  {d['path']}: locked {d['locked']!r}, now {d['now']!r}" for d in lock["deviations"]]
    return "\n".join(lines)


def audit_summary(outcome: Any) -> str:
    """The lock status and the history entry of a finished run, for the run summary."""
    lines = [lock_summary(outcome.record)]
    params = outcome.record.get("parameters") or {}
    if params:
        lines.append("parameters: " + ", ".join(f"{k}={v}" for k, v in params.items()))
    entry = outcome.history_entry
    for late in getattr(outcome, "recovered", ()):
        lines.append(f"run history: entry {late['seq']} appended first for {late['folder']}, whose run was stopped "
                     "after writing its folder and before appending its entry")
    if entry is not None:
        lines.append(f"run history: entry {entry['seq']} appended to {outcome.folder.parent / 'history.jsonl'}")
    if getattr(outcome, "index", None) is not None:
        lines.append(f"index of the runs: {outcome.index}")
    if getattr(outcome, "index_problem", None):
        lines.append(f"index of the runs NOT updated: {outcome.index_problem}")
    if getattr(outcome, "signed", False):
        lines.append("signed as executed: the record (signature file in the run folder)"
                     + (" and its history entry" if entry is not None else ""))
    return "\n".join(lines)


def check_lock_summary(outcome: Any) -> str:
    """For `check`: how the plan (and, when read, its data) stands against its lock, before any run."""
    from planrunner.trail.files import lock_for_run
    entry = lock_for_run(outcome.loaded, outcome.tables or {}, None, refuse_deviations=False)
    return lock_summary({"plan": {"lock": entry}})


def _lock(args: argparse.Namespace) -> int:
    from planrunner.pipeline.run import default_operator, utc_now, utc_stamp
    from planrunner.plan.params import parse_assignments
    from planrunner.trail.files import lock_plan
    path, lock = lock_plan(args.plan, operator=args.operator or default_operator(), locked_utc=utc_stamp(utc_now()),
                           note=args.note, params=parse_assignments(args.param))
    print(f"locked {args.plan}: sha256 {lock['sha256']}, content sha256 {lock['canonical_sha256']}")
    for d in lock["data"]:
        state = f"present, sha256 {d['sha256']}" if d["present"] else "not present"
        print(f"  data {d['name']}: {d['file']}: {state}")
    print(f"lock written to {path}")
    return EXIT_OK


def _table(header: tuple[str, ...], body: Sequence[tuple[str, ...]]) -> str:
    rows = [header, *body]
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip() for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _verify(args: argparse.Namespace) -> int:
    from planrunner.execute.pool import early_workers
    execution = execution_of(args)
    with early_workers(execution):  # as `run`: the workers start before the re-run's stages are imported
        from planrunner.audit.signing import record_signatures
        from planrunner.audit.verbs import find_plan, read_record, verify_record
        from planrunner.trail.names import require_person_name
        if args.operator is not None:  # before the re-run: the name is written on one line of the verify log
            require_person_name(args.operator, "--operator")
        record_file, recorded = read_record(args.record)
        signatures = record_signatures(record_file, find_plan(record_file, recorded, args.plan), args.signers)
        report = verify_record(args.record, plan=args.plan, execution=execution, data_root=args.data_root)
    from planrunner.cli.signing import signature_lines
    print(f"verifying {report.record_file} against the plan folder {report.plan_file.parent}")
    if report.rehearsal:
        print(f"*** {REHEARSAL_WORDS} ***")
    for cause in report.causes:  # the cause first: every number below follows from it
        print(f"  CAUSE {cause}")
    for line in signature_lines(signatures):
        print(line)
    for note in report.notes:
        print(f"  note (stated, not a failure): {note}")
    if report.basis is not None:
        print(f"comparison: {report.basis.statement()}")
    # said before the fields: the output leads with the causes and ends with the result, the verdict last
    _log_verification(report, signatures.passed, args.operator)
    for where, what in report.problems:
        print(f"  DIFFERENCE {where}: {what}")
    for change in report.plan_changes:
        print(f"    plan change: {change}")
    if report.differences:
        _print_differences(report, args.differences)
    if not report.rerun:
        print("the analyses could not be re-run")
    elif not report.differences:
        print(f"re-run of the recorded plan: identical ({report.compared} numbers compared, "
              "every one equal bit for bit)")
    else:
        largest = report.largest
        if largest is not None and not report.causes:  # after a data change the cause says more than a size
            verdict = "within" if largest.within else "OUTSIDE"
            print(f"re-run: largest difference {largest.difference:.3g} at {largest.path}, {verdict} its "
                  f"tolerance ({largest.rule}: {largest.tolerance:.3g})")
        outside = sum(not d.within for d in report.differences)
        because = " (the data changed: see CAUSE above)" if report.causes else ""
        print(f"re-run: {len(report.differences)} field(s) differ, {outside} outside tolerance{because}")
        if report.basis is not None and report.basis.same_environment and _rounding_only(report):
            print("  these differences are of rounding size only: the same versions on a processor with other "
                  "vector instructions can round the last bits differently; verify on the machine that made "
                  "the run to tell this from a change")
    passed = report.passed and signatures.passed
    print(("verify: PASSED" if passed else "verify: FAILED" + ("" if signatures.passed else " (signatures)"))
          + (" (a rehearsal: never a valid result)" if report.rehearsal else ""))
    if report.rehearsal:
        outcome = ("it re-ran to the same numbers, which proves the pipeline" if passed
                   else "it did not re-run to the same numbers")
        print(f"*** {REHEARSAL_WORDS}; {outcome}, and it is never a valid result ***")
    return EXIT_OK if passed else EXIT_DIFFERS


def _log_verification(report: Any, signatures_passed: bool, operator: str | None) -> None:
    """Keep the verdict in the verify log beside the run's history; a log that cannot be written is
    said, and changes neither the verdict nor the exit code."""
    from planrunner.audit.verbs import log_verification
    from planrunner.errors import OutputError
    from planrunner.pipeline.run import default_operator, utc_now, utc_stamp
    try:
        logged = log_verification(report, signatures_passed, operator=operator or default_operator(),
                                  verified_utc=utc_stamp(utc_now()))
    except OutputError as exc:
        print(f"verify result NOT logged: {exc}")
        return
    if logged is None:
        print("verify result not logged: no run history beside the run folder logs this run")
    else:
        print(f"verify result logged: entry {logged.entry['seq']} of {logged.log}")
        print(f"index of the runs: {logged.index}" if logged.index is not None
              else f"index of the runs NOT updated: {logged.index_problem}")


def _print_differences(report: Any, target: str | None) -> None:
    """How many fields differ, by kind, the first few in a table, and every one in a file."""
    from planrunner.audit.verbs import describe, differences_text
    from planrunner.pipeline.run import utc_now
    from planrunner.trail.store import write_new_file
    outside = sum(not d.within for d in report.differences)
    print(f"{len(report.differences)} field(s) differ, {outside} outside tolerance; by kind:")
    kinds = report.kinds()
    for kind, count in kinds[:MAX_KINDS]:
        print(f"  {count:>6}  {kind}")
    if len(kinds) > MAX_KINDS:
        print(f"  {sum(c for _, c in kinds[MAX_KINDS:]):>6}  in {len(kinds) - MAX_KINDS} other kinds")
    rows = [(d.path, describe(d.recorded), describe(d.rerun),
             "" if d.difference is None else f"{d.difference:.3g}",
             "" if d.tolerance is None else f"{d.tolerance:.3g}",
             "within" if d.within else "OUTSIDE", d.rule) for d in report.differences[:MAX_ROWS]]
    print(_table(("field", "recorded", "re-run", "|difference|", "tolerance", "verdict", "rule"), rows))
    if len(report.differences) > MAX_ROWS or target:
        stamp = utc_now().strftime("%Y%m%dT%H%M%SZ")
        # by default in the temporary folder: never among the run's files, nor wherever verify was started
        run = report.record_file.parent.name or "record"
        name = target or Path(tempfile.gettempdir()) / f"planrunner-verify-{run}-{stamp}.tsv"
        written = write_new_file(name, differences_text(report), what="list of differences")
        print(f"... {len(report.differences) - min(MAX_ROWS, len(report.differences))} more; "
              f"every differing field is listed in {written}")


def _rounding_only(report: Any) -> bool:
    from planrunner.audit.verbs import FLOAT_RELATIVE_TOLERANCE
    return all(d.difference is not None and not isinstance(d.recorded, int)
               and d.difference <= FLOAT_RELATIVE_TOLERANCE * max(abs(d.recorded), abs(d.rerun))
               for d in report.differences)


def _shown(text: str) -> str:
    """Free text as one printable line: a line break, a control or an invisible formatting character
    is shown as its \\u escape, so that a reason can neither split the table nor fake a line of it."""
    return "".join(c if c.isprintable() else f"\\u{ord(c):04x}" for c in text)


def _history(args: argparse.Namespace) -> int:
    from planrunner.audit.signing import history_signatures
    from planrunner.cli.signing import signature_lines
    from planrunner.trail.files import history_report, repair_history
    if args.repair:
        for entry in repair_history(args.target):
            print(f"repair: appended entry {entry['seq']} for {entry['folder']}, whose run was stopped after "
                  "writing its folder and before appending its entry")
    report = history_report(args.target)
    signatures = history_signatures(report.log, args.signers)
    rows = [tuple(_shown(str(cell)) for cell in (
                e.get("seq"), e.get("finished_utc"), e.get("run_id"), e.get("operator"), e.get("reason") or "",
                str(e.get("plan_sha256"))[:12], str(e.get("record_sha256"))[:12]))
            for e in report.entries]
    print(f"run history {report.log}: {len(rows)} run(s)")
    if rows:
        print(_table(("#", "finished (UTC)", "run id", "operator", "reason", "plan", "record"), rows))
    for p in report.problems:
        print(f"  BROKEN {'line ' + str(p.line) if p.line else 'log'}: {p.message}")
    print("history chain: intact" if not report.problems
          else f"history chain: BROKEN ({len(report.problems)} problem(s))")
    if report.verifications:
        print(f"verify log: {report.verifications} verify result(s) in {report.log.parent / 'verifications.jsonl'}")
    for line in signature_lines(signatures):
        print(line)
    if args.html or args.markdown:
        from planrunner.audit.verbs import write_report
        from planrunner.trail.index import render_index_of
        for target, kind, what in ((args.html, "html", "HTML"), (args.markdown, "md", "Markdown")):
            if target:
                print(f"index of the runs ({what}) written to "
                      f"{write_report(target, render_index_of(report.log.parent, kind))}")
    return EXIT_OK if not report.problems and signatures.passed else EXIT_DIFFERS


def _compare(args: argparse.Namespace) -> int:
    from planrunner.audit.verbs import compare_files, write_report
    from planrunner.report.compare import render_html, render_markdown, render_text
    comparison = compare_files(args.record_a, args.record_b)
    print(render_text(comparison), end="")
    if args.markdown:
        print(f"Markdown written to {write_report(args.markdown, render_markdown(comparison))}")
    if args.html:
        print(f"HTML written to {write_report(args.html, render_html(comparison))}")
    return EXIT_OK


def add_pdf_options(parser: Any) -> None:
    parser.add_argument("--paper", choices=["A4", "Letter"], default="A4", help="paper size of the PDF (default A4)")


def _pdf(args: argparse.Namespace) -> int:
    from planrunner.pipeline.printing import write_pdf
    print(f"PDF written to {write_pdf(args.run, args.paper, args.out)}")
    return EXIT_OK


def _schema(args: argparse.Namespace) -> int:
    from planrunner.record.schemas import plan_schema, record_schema
    print(json.dumps(plan_schema() if args.which == "plan" else record_schema(), indent=2, ensure_ascii=False))
    return EXIT_OK


def _selfcheck(args: argparse.Namespace) -> int:
    from planrunner.audit.verbs import check_selfcheck_report, run_selfcheck, write_report
    if args.check:
        report, intact = check_selfcheck_report(args.check)
        print(f"{args.check}: {'hash matches' if intact else 'HASH DOES NOT MATCH: the report was changed'}; "
              f"{report.get('passed')} passed, {report.get('failed')} failed")
        return EXIT_OK if intact and report.get("all_passed") else EXIT_DIFFERS
    report = run_selfcheck()
    rows = [(c["id"], "pass" if c["passed"] else "FAIL", f"{c['expected']:.12g}",
             "—" if c["obtained"] is None else f"{c['obtained']:.12g}", f"{c['tolerance']:.3g}", c["source"])
            for c in report["cases"]]
    env = report["environment"]
    print(f"planrunner {env['planrunner']} self-check on Python {env['python']}, {env['platform']}")
    print(_table(("case", "result", "expected", "obtained", "tolerance", "source"), rows))
    for c in report["cases"]:
        if c["error"]:
            print(f"  {c['id']}: {c['error']}")
    out = args.out or f"planrunner-selfcheck-{report['created_utc'].replace(':', '').replace('-', '')[:15]}Z.json"
    written = write_report(out, json.dumps(report, sort_keys=True, indent=2, ensure_ascii=False) + "\n")
    print(f"{report['passed']} passed, {report['failed']} failed; report written to {written} "
          f"(report_sha256 {report['report_sha256']})")
    return EXIT_OK if report["all_passed"] else EXIT_DIFFERS


AUDIT_VERBS: dict[str, Callable[[argparse.Namespace], int]] = {
    "lock": _lock, "verify": _verify, "history": _history, "compare": _compare, "schema": _schema,
    "selfcheck": _selfcheck, "pdf": _pdf,
}
