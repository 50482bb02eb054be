"""Command-line options shared by several verbs (run, verify, check)."""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from planrunner.execute.pool import Execution

DATA_ROOT_HELP = ("look up the plan's data files under DIR instead of the plan's folder; "
                  "they must resolve inside DIR")


def add_execution_options(verb: argparse.ArgumentParser) -> None:
    """--workers, --executor and --scheduler (run and verify): where the work runs, never what it gives."""
    verb.add_argument("--workers", type=int, metavar="N",
                      help="workers (default 1: serial; more than 1 runs local processes)")
    verb.add_argument("--executor", choices=("serial", "threads", "processes", "dask"),
                      help="where the jobs run (default: serial, or processes with --workers N > 1; threads "
                           "share one process, the lightest on a few cores); the numbers are the same")
    verb.add_argument("--scheduler", metavar="ADDRESS",
                      help="dask: address of a running scheduler (default: a local cluster on loopback)")


def execution_of(args: argparse.Namespace) -> Execution:
    """The executor the options ask for: serial unless --workers N > 1 or --executor says otherwise."""
    from planrunner.execute.pool import Execution
    executor = args.executor or ("dask" if args.scheduler else
                                 "processes" if args.workers is not None and args.workers > 1 else "serial")
    workers = args.workers if args.workers is not None else 1 if executor == "serial" else 2
    return Execution(executor, workers, args.scheduler)
