"""`planrunner simulate`'s per-data-set path, one data set at a time and in batches, serially and on workers.

Run from the repository root (not part of the test suite; about two minutes on two idle cores):

    python benchmarks/simulate.py                        # 1,000 data sets, serial and 2 processes
    python benchmarks/simulate.py --datasets 200 --workers 2 --threads --n 10

The workload of issue 21: data sets of n = 100 per group (normal outcome), each with a two-sample
permutation test of the mean difference (999 resamples) and a bootstrap percentile interval of the
same difference (999 resamples), run by the simulation runner exactly as `planrunner simulate`
runs them (tables from columns, check, compile, engines, the record's adapters). Each executor
runs the data sets one at a time (batch 0, the path before engines/batched.py) and in batches (the
default), one right after the other in this process, so that the two see the same load; every run's
outcomes are compared with the first (they must be equal). The load average before and after is
printed beside the times.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from planrunner.execute.pool import Execution
from planrunner.pipeline.check import load_plan
from planrunner.simulate.run import SimulationTask, WorkerPool, run_scenario, used_datasets

PLAN = """\
plan: simulate-benchmark
title: Per-data-set cost of a simulation
seed: 20261203
datasets:
  trial:
    file: trial.csv
    columns:
      arm: {type: category, levels: [treated, control]}
      y: {type: number}
analyses:
  - {id: permutation, data: trial, outcome: y, groups: {by: arm, compare: [treated, control]}, role: primary,
     statistic: mean_difference, method: permutation, resamples: 999}
  - {id: bootstrap, data: trial, outcome: y, groups: {by: arm, compare: [treated, control]}, role: secondary,
     statistic: mean_difference, method: bootstrap, resamples: 999, intervals: [percentile]}
"""


class NormalArms:
    """n rows per arm, normal outcome with a shift of 0.3 between the arms."""

    def __init__(self, n: int):
        self.n = n

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        arm = np.array(["treated"] * self.n + ["control"] * self.n, dtype=object)
        y = np.concatenate([rng.normal(0.3, 1.0, self.n), rng.normal(0.0, 1.0, self.n)])
        return {"trial": {"arm": arm, "y": y}}


def timed(task: SimulationTask, datasets: int, execution: Execution | None) -> tuple[float, list]:
    start = time.perf_counter()
    if execution is None:
        outcomes = run_scenario(task, datasets)
    else:
        with WorkerPool(execution) as pool:  # the pool's start-up is part of the time, as on the command line
            outcomes = run_scenario(task, datasets, execution=execution, pool=pool)
    return time.perf_counter() - start, outcomes


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--datasets", type=int, default=1000)
    parser.add_argument("--n", type=int, default=100, help="rows per group")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--threads", action="store_true", help="threads instead of worker processes")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "plan.yaml"
        path.write_text(PLAN, encoding="utf-8")
        plan = load_plan(path)[0].plan
    task = SimulationTask(plan, 515, "benchmark", NormalArms(args.n), used_datasets(plan))
    run_scenario(task, 2)  # imports and first calls outside the timing
    print(f"{args.datasets} data sets, n = {args.n} per group, permutation test (999) + bootstrap "
          f"percentile interval (999); load average before: {os.getloadavg()[0]:.2f}")
    parallel = Execution("threads" if args.threads else "processes", args.workers)
    first = None
    for execution in (None, parallel):
        where = "serial" if execution is None else f"{execution.executor}, {args.workers} workers"
        times = []
        for batch in (0, None):
            elapsed, outcomes = timed(replace(task, batch=batch), args.datasets, execution)
            times.append(elapsed)
            first = outcomes if first is None else first
            if outcomes != first:
                print(f"{where}, batch {batch}: the outcomes differ from the first run's", file=sys.stderr)
                return 1
        print(f"{where}: one at a time {times[0]:.1f} s ({1000 * times[0] / args.datasets:.1f} ms per data set), "
              f"batched {times[1]:.1f} s ({1000 * times[1] / args.datasets:.1f} ms per data set); "
              f"one at a time / batched = {times[0] / times[1]:.2f}; load average now: {os.getloadavg()[0]:.2f}")
    print("the outcomes are identical")
    return 0


if __name__ == "__main__":
    sys.exit(main())
