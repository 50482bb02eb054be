"""Command line: the only layer that prints and chooses exit codes.

Exit codes: 0 success; 2 the plan, data, arguments or a file read back are wrong, or an output
cannot be written (EXIT_FOR_ERROR); 3 verify, history or selfcheck found a difference; 1 an
unexpected failure (with versions, and a request to report it); 130 interrupted.
A reader that closes stdout early (`planrunner check PLAN | head -1`) is no failure: the rest of the
output is dropped, the verb finishes its work and exits with its usual code.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, NoReturn, TextIO, cast

from planrunner import __version__
from planrunner.cli.audit import (
    AUDIT_VERBS,
    add_audit_run_options,
    add_audit_verbs,
    audit_summary,
    check_lock_summary,
)
from planrunner.cli.options import DATA_ROOT_HELP, add_execution_options, execution_of
from planrunner.cli.rehearse import add_rehearse_verb, rehearse_command
from planrunner.cli.signing import SIGNING_VERBS, add_run_signing_options, add_signing_verbs, run_signing
from planrunner.cli.simulate import add_simulate_verb
from planrunner.errors import (
    DataError,
    EngineError,
    ExpressionError,
    OutputError,
    PlanError,
    PlanrunnerError,
    RecordError,
    SigningError,
    Terminated,
)

if TYPE_CHECKING:
    from planrunner.api.progress import ProgressBar

EXIT_OK, EXIT_FAILURE, EXIT_INPUT, EXIT_DIFFERS = 0, 1, 2, 3

# The exit code of each kind of error (README, "Exit codes"). Every one of them is for the user to
# fix, so each gives 2; a difference that verify, history or selfcheck finds is not an error (3).
EXIT_FOR_ERROR: dict[type[PlanrunnerError], int] = {
    PlanError: EXIT_INPUT,  # the plan: syntax, schema, cross references, a deviation refused
    DataError: EXIT_INPUT,  # a data file: missing, changed, or not what the plan declares
    EngineError: EXIT_INPUT,  # the data cannot carry the method (too few rows, ...)
    ExpressionError: EXIT_INPUT,  # a row filter
    RecordError: EXIT_INPUT,  # a record, lock, history or self-check report read back: missing or damaged
    OutputError: EXIT_INPUT,  # a new file or folder cannot be written (space, permission, name taken)
    SigningError: EXIT_INPUT,  # a key, passphrase, signers file or file to sign that cannot be used
    PlanrunnerError: EXIT_INPUT,  # any other refusal (e.g. an executor that cannot be used)
}


def exit_code_for(error: PlanrunnerError) -> int:
    """The exit code of the most specific error class listed in EXIT_FOR_ERROR."""
    return next(EXIT_FOR_ERROR[kind] for kind in type(error).__mro__ if kind in EXIT_FOR_ERROR)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # argparse would exit 2 with usage; keep that, say what to do
        self.print_usage(sys.stderr)
        print(f"planrunner: error: {message} (see 'planrunner {self.prog.split()[-1]} --help')"
              if " " in self.prog else f"planrunner: error: {message} (see 'planrunner --help')",
              file=sys.stderr)
        raise SystemExit(EXIT_INPUT)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="planrunner", description="Run pre-specified resampling analyses from a YAML plan.")
    parser.add_argument("--version", action="version", version=f"planrunner {__version__}")
    verbs = parser.add_subparsers(dest="verb", required=True, metavar="COMMAND", parser_class=_Parser)

    check = verbs.add_parser("check", help="validate a plan (and its data, when present) without computing")
    check.add_argument("plan", help="path to the plan (YAML)")
    check.add_argument("--plan-only", action="store_true", help="do not read the data files")
    check.add_argument("--param", action="append", metavar="NAME=VALUE", help="a value for a plan parameter")
    check.add_argument("--data-root", metavar="DIR", help=DATA_ROOT_HELP)

    init = verbs.add_parser("init", help="write a plan skeleton from a data file's columns (types only, no values)")
    init.add_argument("datafile", help="the data file (CSV, TSV, XPT, Dataset-JSON, Parquet or .xlsx)")
    init.add_argument("--out", metavar="PLAN", help="the plan to write (default: plan.yaml beside the data file); "
                                                     "an existing file is never replaced")
    init.add_argument("--sheet", help="the sheet of an .xlsx workbook")
    init.add_argument("--format", choices=["csv", "tsv", "xpt", "dataset-json", "parquet", "xlsx"],
                      help="the file's format (default: from its ending)")

    run = verbs.add_parser("run", help="run every analysis of a plan and write the record and reports")
    run.add_argument("plan", help="path to the plan (YAML)")
    run.add_argument("--out", help="folder under which the run folder is created (default: runs/ beside the plan)")
    run.add_argument("--operator", help="who runs the analysis (default: the login name)")
    run.add_argument("--quiet", action="store_true", help="print only the run folder (and no progress bar)")
    add_execution_options(run)
    run.add_argument("--data-root", metavar="DIR", help=DATA_ROOT_HELP)
    add_audit_run_options(run)
    add_run_signing_options(run)
    add_rehearse_verb(verbs)
    add_audit_verbs(verbs)
    add_signing_verbs(verbs)
    add_simulate_verb(verbs)
    return parser


class _StdoutForAnyReader:
    """sys.stdout for a verb: once the reader has closed the pipe, the rest of the output is dropped.

    A verb may print before it writes a file (verify's list of differences, selfcheck's report, the
    index of the runs), so a closed stdout must not stop it: the error would lose that file.
    """

    def __init__(self, stream: TextIO):
        self._stream = stream
        self.reader_gone = False

    def write(self, text: str) -> int:
        if not self.reader_gone:
            try:
                self._stream.write(text)
            except BrokenPipeError:
                self._drop_the_rest()
        return len(text)

    def flush(self) -> None:
        if not self.reader_gone:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self._drop_the_rest()

    def _drop_the_rest(self) -> None:
        self.reader_gone = True
        # what is still buffered goes to the null device, so that the flush at exit does not fail again
        try:
            null = os.open(os.devnull, os.O_WRONLY)
        except OSError:
            return
        try:
            os.dup2(null, self._stream.fileno())
        except (OSError, ValueError, AttributeError):  # a stream with no file descriptor (tests capture it)
            pass
        finally:
            os.close(null)

    def __getattr__(self, name: str) -> Any:  # isatty, fileno, encoding, ...: the real stream's
        return getattr(self._stream, name)


def main(argv: Sequence[str] | None = None) -> int:
    """Run one verb and return its exit code; a closed stdout does not change it (see the module note)."""
    stdout = sys.stdout
    forgiving = _StdoutForAnyReader(stdout)
    sys.stdout = cast(TextIO, forgiving)
    try:
        code = _main(argv)
        forgiving.flush()  # output still buffered meets a closed reader here, not at interpreter exit
    finally:
        sys.stdout = stdout
    return code


def _main(argv: Sequence[str] | None) -> int:
    args_list = list(sys.argv[1:] if argv is None else argv)
    if args_list == ["--version"]:  # argparse's own answer, without building every verb's parser first
        print(f"planrunner {__version__}")
        return EXIT_OK
    try:
        args = build_parser().parse_args(args_list)
    except SystemExit as exc:
        return int(exc.code or 0)
    from planrunner.execute.signals import stopping_on_termination
    try:
        # SIGTERM and SIGHUP stop a verb as Ctrl-C does: workers stopped, staging folders removed
        with stopping_on_termination():
            return _dispatch(args, args_list)
    except PlanrunnerError as exc:
        print(f"planrunner: {exc}", file=sys.stderr)
        return exit_code_for(exc)
    except KeyboardInterrupt as exc:
        print(f"planrunner: {_stopped(exc)}{STOPPED_BEFORE.get(args.verb, '')}", file=sys.stderr)
        return _stop_code(exc)
    except Exception:  # an unexpected failure: show enough to report it
        from planrunner.record.build import environment
        env = environment()
        print("planrunner: unexpected failure; please report it with the lines below.", file=sys.stderr)
        print(f"planrunner {env['planrunner']}, Python {env['python']}, {env['platform']}, "
              + ", ".join(f"{k} {v}" for k, v in env["packages"].items()), file=sys.stderr)
        traceback.print_exc(file=sys.stderr)
        return EXIT_FAILURE


# what an interrupt of a verb left undone (only `run` writes what must exist whole or not at all)
STOPPED_BEFORE = {"run": "; no record was written (any workers were stopped)",
                  "simulate": "; nothing was written (any workers were stopped)",
                  "rehearse": "; no rehearsal was written (any workers were stopped)",
                  "verify": " (any workers were stopped)", "selfcheck": "; no report was written"}


def _stopped(exc: KeyboardInterrupt) -> str:
    return f"stopped by {exc.name}" if isinstance(exc, Terminated) else "interrupted"


def _stop_code(exc: KeyboardInterrupt) -> int:
    """128 + the signal's number, as a shell reports a process its signal ended (Ctrl-C: 130)."""
    return 128 + (exc.signal_number if isinstance(exc, Terminated) else 2)


def _dispatch(args: argparse.Namespace, args_list: list[str]) -> int:
    if args.verb == "check":
        return _check(args)
    if args.verb == "run":
        return _run(args, args_list)
    if args.verb == "rehearse":
        return rehearse_command(args, args_list, progress_bar, summary_table)
    if args.verb == "init":
        from planrunner.pipeline.init import write_skeleton
        written = write_skeleton(args.datafile, args.out, sheet=args.sheet, fmt=args.format)
        print(f"plan skeleton written to {written}; fill in the analyses, then 'planrunner check {written}'")
        return EXIT_OK
    if args.verb == "simulate":
        from planrunner.cli.simulate import simulate
        return simulate(args, args_list)
    if args.verb in AUDIT_VERBS:
        return AUDIT_VERBS[args.verb](args)
    if args.verb in SIGNING_VERBS:
        return SIGNING_VERBS[args.verb](args)
    return EXIT_INPUT


def _check(args: argparse.Namespace) -> int:
    from planrunner.pipeline.check import check_plan
    from planrunner.plan.params import parse_assignments
    outcome = check_plan(args.plan, with_data=not args.plan_only, params=parse_assignments(args.param),
                         data_root=args.data_root)
    plan = outcome.loaded.plan
    print(f"{args.plan}: plan '{plan.plan}' is valid: {len(plan.datasets)} dataset(s), "
          f"{len(plan.analyses)} analysis(es)")
    if outcome.tables is not None:
        for t in outcome.tables.values():
            excluded = sum(e.rows for e in t.excluded)
            print(f"  {t.name}: {t.file}: {t.rows_read} rows read, {t.rows_used} used, {excluded} excluded; "
                  f"sha256 {t.sha256}")
            if t.ignored_columns:
                print(f"    ignored columns: {', '.join(t.ignored_columns)}")
        if outcome.jobs is not None:
            from planrunner.compile.limits import estimate_run_bytes, size_text
            print(f"  memory for the analyses: about {size_text(estimate_run_bytes(outcome.jobs))}")
    else:
        print("  data files not read (--plan-only)")
    print(check_lock_summary(outcome))
    return EXIT_OK


def _run(args: argparse.Namespace, argv: list[str]) -> int:
    from planrunner.execute.pool import early_workers
    execution = execution_of(args)
    if args.pdf:  # no browser: say so before computing anything
        from planrunner.report.pdf import find_browser
        find_browser()
    signing = run_signing(args)
    written: list[Any] = []  # the outcome, once the run folder and its history entry are in place
    try:
        # worker processes start before the rest of the run is imported (the progress bar's module
        # loads the whole pipeline: about a quarter of a second) and before the plan and the data are
        # read, so that they are up when the computing begins
        with early_workers(execution):
            bar = progress_bar(args.quiet)
            try:
                from planrunner.pipeline.run import run_plan
                from planrunner.plan.params import parse_assignments
                outcome = run_plan(args.plan, out=args.out, operator=args.operator,
                                   command=["planrunner", *argv], params=parse_assignments(args.param),
                                   lock=args.lock, refuse_deviations=args.refuse_deviations, reason=args.reason,
                                   data_root=args.data_root, execution=execution, progress=bar,
                                   signing=signing, signers=args.signers, written=written.append)
            finally:
                bar.close()  # before any message, so that it does not land on the bar's line
        pdf = None
        if args.pdf:
            from planrunner.pipeline.printing import write_pdf
            pdf = write_pdf(outcome.folder, args.paper)
        if args.quiet:
            print(outcome.folder)  # only the folder, so that a script can use it as it is
            return EXIT_OK
        print(summary_table(outcome.record))
        print(audit_summary(outcome))
        print(f"record written to {outcome.folder}")
        if pdf is not None:
            print(f"PDF written to {pdf}")
    except KeyboardInterrupt as exc:
        if not written:
            raise  # nothing was written: main says so
        done = written[0]
        logged = (f", history entry {done.history_entry['seq']}" if done.history_entry is not None else "")
        print(f"planrunner: {_stopped(exc)} after the run was complete: record written to {done.folder}{logged}",
              file=sys.stderr)
        return _stop_code(exc)
    return EXIT_OK


def progress_bar(quiet: bool) -> ProgressBar:
    """The progress hook of a run, the bar `api.run(progress=True)` shows too (tests replace it to
    inject an interrupt); imported here, since the API's package loads the whole pipeline."""
    from planrunner.api.progress import ProgressBar
    return ProgressBar(quiet)


def summary_table(record: dict) -> str:
    """A compact terminal table: one row per analysis."""
    # imported here: the report's number formats load numpy, which `--version` and `--help` never need
    from planrunner.report import digits, labels
    from planrunner.report.render import number

    any_decision = any(isinstance(a.get("decision"), dict) for a in record["analyses"])
    header = ("analysis", "method", "estimate", "interval", "p-value", *(("decision",) if any_decision else ()),
              "n", "warnings")
    rows: list[tuple[str, ...]] = [header]
    for a in record["analyses"]:
        shown_intervals = [f"{labels.interval_label(i, format(i['level'] * 100, 'g'))}: "
                           f"{labels.interval_ends(i, number(i['lower']), number(i['upper']))}" for i in a["intervals"]]
        # the first is the pre-specified interval; the others are labelled, never mistaken for it
        interval = "; ".join(shown_intervals[:1] + [f"supplementary {text}" for text in shown_intervals[1:]])
        value, what, statistic = labels.effect(a)
        estimate = number(value) + (f" ({what})" if what else "") + (f"; {statistic}" if statistic else "")
        side = labels.direction(a)
        shown = digits.p_value(a["p_value"], (a.get("monte_carlo") or {}).get("p_value_sd"), labels.alpha(a))
        p = "" if a["p_value"] is None else shown + (f" ({side})" if side else "")
        p += ", unresolved at alpha" if labels.unresolved(a) else ""
        decision = a.get("decision")
        verdict = f"{decision.get('verdict')} ({decision.get('rule')})" if isinstance(decision, dict) else ""
        rows.append((a["id"], a["method"], estimate, interval, p, *((verdict,) if any_decision else ()),
                     ", ".join(labels.group_sizes(a)), str(len(a["warnings"]))))
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip() for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    caution = ("\nA verdict is the plan's rule applied to these numbers: a computation, not a decision "
               "(see the caution in the report)." if any_decision else "")
    return f"{record['plan']['title']}\n" + "\n".join(lines) + caution


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
