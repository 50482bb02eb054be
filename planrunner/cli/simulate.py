"""`planrunner simulate PLAN --scenarios FILE`: the command line of the simulate stage."""

from __future__ import annotations

import argparse
import shutil
import sys
from typing import Any

from planrunner.cli.options import add_execution_options, execution_of


def add_simulate_verb(verbs: Any) -> None:
    simulate = verbs.add_parser("simulate", help="run every analysis of a plan on simulated data sets and write "
                                                 "their operating characteristics (power, coverage, bias)")
    simulate.add_argument("plan", help="path to the plan (YAML)")
    simulate.add_argument("--scenarios", required=True, metavar="FILE",
                          help="the scenarios file (YAML): data-generating models, scenarios and an optional "
                               "sample-size search")
    simulate.add_argument("--out", help="folder under which the simulation folder is created "
                                        "(default: simulations/ beside the plan)")
    simulate.add_argument("--quiet", action="store_true", help="print only the simulation folder (and no progress bar)")
    simulate.add_argument("--lock", metavar="FILE", help="the plan's lock (default: PLAN.lock.json beside the plan, "
                                                         "used when it exists)")
    simulate.add_argument("--refuse-deviations", action="store_true",
                          help="stop before simulating if the plan deviates from its lock, or has none")
    simulate.add_argument("--param", action="append", metavar="NAME=VALUE", help="a value for a plan parameter")
    simulate.add_argument("--replicates", type=int, metavar="N",
                          help="data sets of every scenario and search size instead of the file's (a quick look; "
                               "written into simulation.json)")
    add_execution_options(simulate)


class DatasetsBar:
    """Data sets done / total of each scenario on stderr; only for a terminal, never with --quiet."""

    def __init__(self, quiet: bool):
        self._quiet = quiet
        self._bar: Any = None
        self._label: str | None = None

    def for_scenario(self, label: str) -> Any:
        def progress(done: int, total: int) -> None:
            if self._bar is None or self._label != label:
                self.close()
                self._label = label
                from tqdm import tqdm
                size = shutil.get_terminal_size((80, 24))
                self._bar = tqdm(total=total, desc=label, unit=" data sets", file=sys.stderr, delay=1.0,
                                 disable=True if self._quiet else None, leave=False,
                                 ncols=min(size.columns or 80, 100), nrows=size.lines or 24)
            self._bar.update(done - self._bar.n)
        return progress

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None


def simulate(args: argparse.Namespace, argv: list[str]) -> int:
    from planrunner.plan.params import parse_assignments
    from planrunner.simulate.simulation import simulate_plan

    execution = execution_of(args)
    bar = DatasetsBar(args.quiet)
    try:
        outcome = simulate_plan(args.plan, args.scenarios, out=args.out, execution=execution,
                                progress=bar.for_scenario, command=["planrunner", *argv], lock=args.lock,
                                refuse_deviations=args.refuse_deviations, params=parse_assignments(args.param),
                                replicates=args.replicates)
    finally:
        bar.close()
    if args.quiet:
        print(outcome.folder)
        return 0
    print(summary(outcome.document))
    print(f"simulation written to {outcome.folder}")
    return 0


def summary(document: dict[str, Any]) -> str:
    """One line per scenario and analysis: rejection rate, coverage of the pre-specified interval, verdicts."""
    from planrunner.simulate.report import percent, share_text

    lines = [document["title"]]
    for s in document["scenarios"]:
        lines.append(f"scenario {s['name']} ({s['replicates']} data sets):")
        for a in s["analyses"]:
            parts = [f"rejects {share_text(a['rejection'])}" if a["rejection"] else "no test"]
            first = a["intervals"][0] if a["intervals"] else None
            if first is not None and first.get("coverage"):
                parts.append(f"coverage {percent(first['coverage']['rate'])}")
            if a["verdicts"]:
                parts.append(f"met {percent(a['verdicts']['met']['rate'])}")
            if a["failed"]["count"]:
                parts.append(f"{a['failed']['count']} failed")
            lines.append(f"  {a['id']}: " + "; ".join(parts))
    search = document.get("search")
    if search:
        found = search["smallest_size"]
        lines.append(f"search: {search['analysis']} under {search['scenario']} reaches power "
                     f"{percent(search['target'])} at " + (f"{found} rows per group" if found is not None
                                                              else "none of the sizes tried"))
    lines.append("Simulated operating characteristics hold under the assumed models only "
                 "(see the caution in the report).")
    return "\n".join(lines)
