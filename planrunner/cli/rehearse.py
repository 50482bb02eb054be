"""Command line of `planrunner rehearse`: the whole plan on dummy data, stamped as a rehearsal."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

from planrunner.cli.options import add_execution_options, execution_of

EXIT_OK = 0


def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: '{text}'") from None
    if not 0 <= value < 2 ** 63:
        raise argparse.ArgumentTypeError(f"{value} is outside 0 to 2**63 - 1")
    return value


def _units(text: str) -> int:
    from planrunner.data.units import MAX_UNITS, MIN_UNITS
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a whole number: '{text}'") from None
    if not MIN_UNITS <= value <= MAX_UNITS:
        raise argparse.ArgumentTypeError(f"{value} is outside {MIN_UNITS} to {MAX_UNITS}")
    return value


def add_rehearse_verb(verbs: Any) -> None:
    from planrunner.data.units import DEFAULT_UNITS
    rehearse = verbs.add_parser("rehearse", help="run the whole plan on dummy data made from its declared columns "
                                                 "(a rehearsal: never a result)")
    rehearse.add_argument("plan", help="path to the plan (YAML); its data files are never read")
    rehearse.add_argument("--out", metavar="DIR",
                          help="folder under which the rehearsal folder is created (default: rehearsals/ beside "
                               "the plan; never the runs/ folder)")
    rehearse.add_argument("--seed", type=_seed, metavar="N",
                          help="seed of the dummy data (default: the plan's seed); the analyses keep the plan's seed")
    rehearse.add_argument("--units", type=_units, default=DEFAULT_UNITS, metavar="N",
                          help=f"units per dataset: rows, or pairs or clusters where the plan declares them "
                               f"(default {DEFAULT_UNITS})")
    rehearse.add_argument("--param", action="append", metavar="NAME=VALUE", help="a value for a plan parameter")
    rehearse.add_argument("--operator", help="who rehearses the plan (default: the login name)")
    rehearse.add_argument("--quiet", action="store_true", help="print only the rehearsal folder")
    rehearse.add_argument("--pdf", action="store_true",
                          help="also print the report to report-PAPER.pdf (needs Chromium or Chrome)")
    rehearse.add_argument("--paper", choices=["A4", "Letter"], default="A4", help="paper size of the PDF (default A4)")
    add_execution_options(rehearse)


def rehearse_command(args: argparse.Namespace, argv: list[str], progress_bar: Callable[[bool], Any],
                     summary_table: Callable[[dict], str]) -> int:
    """Rehearse the plan and print the summary between two stamps (``progress_bar`` and
    ``summary_table`` are those of `run`, handed over by `cli.main`)."""
    from planrunner.execute.pool import early_workers
    execution = execution_of(args)
    if args.pdf:  # no browser: say so before computing anything
        from planrunner.report.pdf import find_browser
        find_browser()
    with early_workers(execution):  # as `run`: the workers start before the pipeline is imported
        bar = progress_bar(args.quiet)
        try:
            from planrunner.pipeline.rehearse import rehearse_plan
            from planrunner.plan.params import parse_assignments
            outcome = rehearse_plan(args.plan, out=args.out, seed=args.seed, units=args.units,
                                    params=parse_assignments(args.param), operator=args.operator,
                                    command=["planrunner", *argv], execution=execution, progress=bar)
        finally:
            bar.close()
    from planrunner.record.rehearsal import STAMP
    pdf = None
    if args.pdf:
        from planrunner.pipeline.printing import write_pdf
        pdf = write_pdf(outcome.folder, args.paper)
    if args.quiet:
        print(outcome.folder)
        return EXIT_OK
    entry = outcome.record["rehearsal"]
    print(f"*** {STAMP} ***")
    print(summary_table(outcome.record))
    sizes = ", ".join(f"{d['name']}: {d['rows']} rows" for d in entry["datasets"])
    print(f"dummy data (seed {entry['seed']}, {entry['units']} units per dataset; {sizes}) in "
          f"{outcome.folder / entry['folder']}")
    print(f"rehearsal written to {outcome.folder} (not appended to any run history)")
    if pdf is not None:
        print(f"PDF written to {pdf}")
    print(f"*** {STAMP}: the pipeline ran end to end; none of these numbers is a result ***")
    return EXIT_OK
