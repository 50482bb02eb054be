"""Serial, 2 threads, 2 processes and a 2-worker dask cluster side by side, in one process.

Run from the repository root (not part of the test suite; about 2 minutes per repeat on an idle
2-core machine):

    python benchmarks/executors.py --repeats 3
    python benchmarks/compare_scipy.py --executors --repeats 3     # the same, started from there
    python benchmarks/executors.py --repeats 5 --only E2 --command-line   # also from the command line

Each workload is a plan run the way `planrunner run` runs it: its worker processes started
(`early_workers`) before the plan and data are read and checked (`check_plan`), then its jobs sent
through `execute_all`; the time covers both steps for every executor, so every executor pays its
own start-up and tear-down (the pool's interpreters, the dask cluster) in every call, as a run
does. In this process the pipeline is already loaded, so a worker has only the check's few
hundredths of a second to start in; from the command line it also has the loading of the pipeline
(about a quarter of a second) and is up when the computing begins. Three more rows show the
range: "processes, up" starts its worker processes and waits until they have imported the engines
before the clock starts (the command line's case); "processes, cold" starts them only once the jobs
are built (`execute_all` alone, as code that calls it directly does); "dask, running" uses a dask
cluster started once before the workloads, as `--scheduler ADDRESS` uses a running one (its
workers' CPU is not counted). `--command-line` also runs each plan with `planrunner run` per
executor and prints the command's wall time and the record's started-to-finished time. The
executors are run in turn within each repeat, so that a busy machine slows them alike; the table
shows the median wall time, the median CPU time of this process and of every worker process it
started (user + system, from getrusage: workers are counted once they are collected, which every
executor does before it returns), the speed-up over the serial run (serial wall / wall), the CPU
used beside the serial run's, and whether the results are the serial run's bit for bit (a SHA-256
of the pickled engine results).

Wall-time speed-ups need an idle machine (`uptime` is printed before and after); the CPU columns
show the overheads (start-up, copying, contention) on a busy one too.

This module's own imports are light on purpose: worker processes are started with `spawn`, which
runs the main module's imports again in every worker (a `planrunner run` worker imports only the
command line's entry module), so the heavy imports are made inside `main`.
"""

from __future__ import annotations

import argparse
import contextlib
import hashlib
import os
import pickle
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

EXECUTORS = ("serial", "threads", "processes", "dask")
COLD = "processes, cold"  # worker processes started by execute_all, after the jobs are built
UP = "processes, up"  # worker processes started and up before the clock starts (as from the command line)
# the dask executor on a cluster already running (started once, before the workloads), as
# `--scheduler ADDRESS` uses one: the run pays no cluster start; its workers' CPU is not counted
RUNNING = "dask, running"

# name, words, rows, plan text, resamples; the data are invented (a skewed outcome), written to a temporary folder
_DATA = """seed: 7
datasets:
  d:
    file: d.csv
    columns:
      g: {type: category, levels: [a, b]}
      y: {type: number}
analyses:
"""
BOOTSTRAP_PLAN = """plan: executors-bootstrap
title: Bootstrap of the mean on each executor
""" + _DATA + """  - id: mean
    data: d
    outcome: y
    statistic: mean
    method: bootstrap
    resamples: RESAMPLES
    intervals: [percentile]
"""
PERMUTATION_PLAN = """plan: executors-permutation
title: Permutation test of a mean difference on each executor
""" + _DATA + """  - id: difference
    data: d
    outcome: y
    groups: {by: g, compare: [b, a]}
    statistic: mean_difference
    method: permutation
    resamples: RESAMPLES
"""
WORKLOADS = (
    ("E0", "start-up and tear-down alone: bootstrap of the mean, n = 100, B = 1000", 100, BOOTSTRAP_PLAN, 1000),
    ("E1", "bootstrap of the mean, n = 1e5, B = 2e4, percentile", 100_000, BOOTSTRAP_PLAN, 20_000),
    ("E2", "permutation test, mean difference, 5000 + 5000 rows, 1e4 resamples", 10_000, PERMUTATION_PLAN, 10_000),
)


def _cpu_seconds() -> float:
    """User + system CPU of this process and of its collected children (worker processes)."""
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def _write_plan(folder: Path, rows: int, text: str, resamples: int) -> Path:
    import numpy as np

    folder.mkdir()
    rng = np.random.default_rng(20261203)
    values = rng.gamma(2.0, 10.0, rows)  # a skewed outcome
    groups = np.where(np.arange(rows) % 2 == 0, "a", "b")
    with (folder / "d.csv").open("w") as out:
        out.write("g,y\n")
        out.writelines(f"{g},{y!r}\n" for g, y in zip(groups, values.tolist()))
    plan = folder / "plan.yaml"
    plan.write_text(text.replace("RESAMPLES", str(resamples)))
    return plan


def _as_run(plan: Path, execution: Any, mode: str) -> tuple[list[Any], float]:
    """The engine results of ``plan`` as `planrunner run` computes them (`pipeline.run.run_plan`), and
    the wall seconds taken. Worker processes start before the plan and the data are checked, or
    with COLD once the jobs are built (`execute_all` alone), or with UP before the clock starts,
    and are waited for until they have imported the engines (as from the command line, where
    loading the pipeline and reading the plan and data take longer than a worker's start)."""
    from planrunner.execute.executors import execute_all
    from planrunner.execute.pool import early_pools, early_workers

    with contextlib.ExitStack() as stack:
        if mode != COLD:
            stack.enter_context(early_workers(execution))
        if mode == UP:
            for _, pool in early_pools():
                for _ in range(execution.worker_processes):
                    pool.apply(int)  # runs once the worker's initializer has imported the engines
        start = time.perf_counter()
        jobs = check_plan_jobs(plan)
        return execute_all(jobs, execution=execution), time.perf_counter() - start


def check_plan_jobs(plan: Path) -> list[Any]:
    from planrunner.pipeline.check import check_plan

    jobs = check_plan(plan).jobs
    assert jobs is not None
    return jobs


def _command_line(plan: Path, executor: str, workers: int) -> tuple[float, float]:
    """Wall seconds of `planrunner run PLAN` in a fresh interpreter, and the seconds its record puts
    between started_utc and finished_utc (from reading the plan to the last result: the run's
    computing, without the interpreter's start, the imports and the writing of the files). Run with
    Python's bytecode cache, as an installed planrunner is (see `compare_scipy._command`)."""
    import datetime as dt
    import json
    import subprocess

    options = [] if executor == "serial" else ["--executor", executor, "--workers", str(workers)]
    env = {name: value for name, value in os.environ.items() if name != "PYTHONDONTWRITEBYTECODE"}
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "planrunner", "run", str(plan), "--quiet", *options],
                          capture_output=True, text=True, env=env)
    wall = time.perf_counter() - start
    if done.returncode not in (0, 1):  # 1: a run whose warnings ask for attention
        raise RuntimeError(f"planrunner run exited with {done.returncode}: {done.stderr[-500:]}")
    record = json.loads((Path(done.stdout.strip().splitlines()[-1]) / "record.json").read_text())
    moments = [dt.datetime.fromisoformat(record[key].replace("Z", "+00:00")) for key in ("started_utc", "finished_utc")]
    return wall, (moments[1] - moments[0]).total_seconds()


def command_line_section(plan: Path, names: list[str], workers: int, repeats: int, label: str) -> None:
    """Each executor from the command line, in turn within each repeat: the command's wall time and
    the record's started-to-finished time, and their speed-ups over serial."""
    walls: dict[str, list[float]] = {n: [] for n in names}
    spans: dict[str, list[float]] = {n: [] for n in names}
    for _ in range(repeats):
        for executor in names:
            wall, span = _command_line(plan, executor, workers)
            walls[executor].append(wall)
            spans[executor].append(span)
    wall0, span0 = statistics.median(walls["serial"]), statistics.median(spans["serial"])
    for executor in names:
        wall, span = statistics.median(walls[executor]), statistics.median(spans[executor])
        print(f"{label:<4}  {executor:<16} command {wall:5.2f} s ({wall0 / wall:4.2f}x)   "
              f"started-to-finished {span:5.2f} s ({span0 / span:4.2f}x)")
    sys.stdout.flush()


def _load() -> str:
    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=3, help="runs of each executor (median reported)")
    parser.add_argument("--workers", type=int, default=2, help="workers of the parallel executors")
    parser.add_argument("--only", help="comma-separated workload names, e.g. E1")
    parser.add_argument("--executors", default=",".join(EXECUTORS),
                        help="comma-separated executors to compare (serial first: the reference)")
    parser.add_argument("--command-line", action="store_true",
                        help="also run each plan with `planrunner run` in a fresh interpreter per executor (wall "
                             "time of the command, and the record's started-to-finished time)")
    args = parser.parse_args(argv)

    from planrunner import __version__
    from planrunner.execute.pool import Execution

    names = args.executors.split(",")
    if names[0] != "serial":
        names.insert(0, "serial")
    if "processes" in names:
        names[names.index("processes") + 1:names.index("processes") + 1] = [UP, COLD]
    running = None  # (client, cluster) of the running dask cluster
    if "dask" in names:
        from planrunner.execute.executors import dask_client

        running = dask_client(Execution("dask", args.workers))
        running[0].close()  # the runs connect their own clients to it
        names.insert(names.index("dask") + 1, RUNNING)
    executions = {name: Execution() if name == "serial" else
                  Execution("dask", args.workers, running[1].scheduler_address) if name == RUNNING and running else
                  Execution("processes" if name in (UP, COLD) else name, args.workers) for name in names}
    chosen = None if args.only is None else set(args.only.upper().split(","))
    print(f"planrunner {__version__}, Python {sys.version.split()[0]}, {os.cpu_count()} CPUs, "
          f"repeats {args.repeats}, {args.workers} workers; {_load()}")
    print(f"{'work':<4}  {'executor':<16} {'wall s':>7} {'CPU s':>7} {'speed-up':>9} {'CPU/serial':>10}  same numbers")
    with tempfile.TemporaryDirectory() as tmp:
        for name, words, rows, text, resamples in WORKLOADS:
            if chosen is not None and name not in chosen:
                continue
            plan = _write_plan(Path(tmp) / name, rows, text, resamples)
            walls: dict[str, list[float]] = {n: [] for n in names}
            cpus: dict[str, list[float]] = {n: [] for n in names}
            digests: dict[str, set[str]] = {n: set() for n in names}
            for _ in range(args.repeats):  # in turn: a busy machine slows every executor alike
                for executor, execution in executions.items():
                    cpu = _cpu_seconds()
                    results, wall = _as_run(plan, execution, executor)
                    walls[executor].append(wall)
                    cpus[executor].append(_cpu_seconds() - cpu)
                    digests[executor].add(hashlib.sha256(pickle.dumps(results)).hexdigest())
            serial_wall, serial_cpu = statistics.median(walls["serial"]), statistics.median(cpus["serial"])
            for executor in names:
                wall, cpu = statistics.median(walls[executor]), statistics.median(cpus[executor])
                same = "yes" if digests[executor] == digests["serial"] and len(digests["serial"]) == 1 else "NO"
                cpu_cells = (f"{'-':>7} {serial_wall / wall:8.2f}x {'-':>10}" if executor == RUNNING else
                             f"{cpu:7.2f} {serial_wall / wall:8.2f}x {cpu / serial_cpu:9.2f}x")
                print(f"{name:<4}  {executor:<16} {wall:7.2f} {cpu_cells}  {same}")
            if "dask" in walls and "processes" in walls:
                processes_wall = statistics.median(walls["processes"])
                print(f"{name:<4}  dask / processes wall: {statistics.median(walls['dask']) / processes_wall:.2f}x, "
                      f"on a running cluster {statistics.median(walls[RUNNING]) / processes_wall:.2f}x   ({words})")
            else:
                print(f"{name:<4}  ({words})")
            sys.stdout.flush()
            if args.command_line:
                command_line_section(plan, [n for n in names if n not in (UP, COLD, RUNNING)], args.workers,
                                     args.repeats, name)
    if running is not None:
        from planrunner.execute.executors import stop_dask

        stop_dask(*running)
    print(_load())
    return 0


if __name__ == "__main__":
    sys.exit(main())
