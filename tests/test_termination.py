"""SIGTERM (and SIGHUP) stop a run as Ctrl-C does, on every executor: the workers are stopped, no
folder is left, the message says so, and the exit code is 128 + the signal's number.

These tests start real `planrunner run` processes with work that takes minutes, send the signal
while the workers compute, and give every process a bounded time to be gone.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
# 10,000 rows and 3,000,000 resamples: the first ranges a worker takes compute for a minute and more
# (about 110 µs a resample measured on the development machine), far longer than the bounds below,
# so a worker that outlived the run would still be found computing
PLAN = """
plan: long-run
title: Long run
seed: 5
datasets:
  d:
    file: d.csv
    columns:
      g: {type: category, levels: [a, b]}
      y: {type: number}
analyses:
  - id: long
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: bootstrap
    intervals: [percentile]
    resamples: RESAMPLES
"""
STOP_SECONDS = 60  # from the signal to the run's exit (a busy shared machine is slow)
GONE_SECONDS = 10  # from the run's exit to the last of its processes gone


@pytest.fixture
def long_plan(write_plan) -> Path:
    return _plan(write_plan, 3_000_000)


def _plan(write_plan, resamples: int) -> Path:
    values = np.random.default_rng(3).normal(size=10_000).round(4)  # invented demo data
    rows = ["g,y"] + [f"{'a' if i % 2 else 'b'},{v}" for i, v in enumerate(values)]
    return write_plan(PLAN.replace("RESAMPLES", str(resamples)), {"d.csv": "\n".join(rows) + "\n"})


def _children() -> dict[int, list[int]]:
    """Parent pid -> its children's pids, from /proc."""
    tree: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        tree.setdefault(ppid, []).append(int(entry.name))
    return tree


def _descendants(pid: int) -> set[int]:
    tree, found, todo = _children(), set(), [pid]
    while todo:
        for child in tree.get(todo.pop(), []):
            if child not in found:
                found.add(child)
                todo.append(child)
    return found


def _alive(pid: int) -> bool:
    """Running (a zombie waiting for its parent to collect it has stopped computing)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def _cpu_seconds(pid: int) -> float:
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")  # utime + stime


def _start(plan: Path, out: Path, options: list[str]) -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.Popen([sys.executable, "-m", "planrunner", "run", str(plan), "--out", str(out), "--quiet",
                             *options], cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, preexec_fn=_default_stop_signals)


def _default_stop_signals() -> None:
    """The run starts as from a terminal: SIGTERM and SIGHUP at their default action, even when the
    tests run under nohup (whose ignored SIGHUP planrunner rightly leaves ignored)."""
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGHUP, signal.SIG_DFL)


def _wait_until(condition, seconds: float, child: subprocess.Popen, what: str) -> None:
    deadline = time.monotonic() + seconds
    while not condition():
        if child.poll() is not None:
            raise AssertionError(f"the run ended before {what}: {child.communicate()}")
        if time.monotonic() > deadline:
            child.kill()
            raise AssertionError(f"{what} did not happen within {seconds} s")
        time.sleep(0.1)


def _computing_workers(child: subprocess.Popen, workers: int) -> set[int]:
    """Wait until `workers` descendants of the run have computed for a while; return every descendant."""
    seen: set[int] = set()

    def busy() -> bool:
        seen.update(_descendants(child.pid))
        # a worker that has imported numpy and planrunner (about 1 s) and drawn for a while
        return sum(_cpu_seconds(p) > 1.5 for p in seen if _alive(p)) >= workers

    _wait_until(busy, 180, child, f"{workers} workers computing")
    return seen | _descendants(child.pid)


def _assert_stopped(child: subprocess.Popen, processes: set[int], number: int, out: Path) -> None:
    try:
        child.wait(timeout=STOP_SECONDS)
    except subprocess.TimeoutExpired:
        child.kill()
    deadline = time.monotonic() + GONE_SECONDS
    while any(_alive(p) for p in processes) and time.monotonic() < deadline:
        time.sleep(0.1)
    left = sorted(p for p in processes if _alive(p))
    for pid in left:  # never leave them computing on a shared machine, even when the test fails
        os.kill(pid, signal.SIGKILL)
    _, err = child.communicate(timeout=30)  # orphans hold the output pipes open until they end
    assert child.returncode != -signal.SIGKILL, f"the run did not stop within {STOP_SECONDS} s of the signal"
    assert left == [], f"worker processes outlived the run: {left}"
    name = signal.Signals(number).name
    assert child.returncode == 128 + number, err
    assert f"stopped by {name}; no record was written (any workers were stopped)" in err
    assert "Traceback" not in err
    assert not out.exists() or list(out.iterdir()) == []  # neither a run folder nor a staging folder


# --workers 2 on processes: the run's own process and one worker process compute; a dask cluster of 2
@pytest.mark.parametrize("options, worker_processes", [(["--workers", "2"], 1),
                                                       (["--executor", "dask", "--workers", "2"], 2)],
                         ids=["processes", "dask"])
def test_sigterm_stops_every_worker_process(long_plan, tmp_path, options, worker_processes):
    out = tmp_path / "out"
    child = _start(long_plan, out, options)
    processes = _computing_workers(child, worker_processes)
    child.send_signal(signal.SIGTERM)
    _assert_stopped(child, processes, signal.SIGTERM, out)


# serial: the signal is handled between two batches of the computing thread. threads: a range
# already running on a thread cannot be interrupted and ends first, so the ranges here are shorter
# (100,000 resamples: the helper thread's largest range, 18,750 of them, computes for about 3 s)
@pytest.mark.parametrize("options, resamples", [([], 3_000_000),
                                                (["--executor", "threads", "--workers", "2"], 100_000)],
                         ids=["serial", "threads"])
def test_sigterm_stops_a_run_in_one_process(write_plan, tmp_path, options, resamples):
    out = tmp_path / "out"
    child = _start(_plan(write_plan, resamples), out, options)
    _wait_until(lambda: _cpu_seconds(child.pid) > 2.0, 180, child, "the run computing")
    child.send_signal(signal.SIGTERM)
    _assert_stopped(child, _descendants(child.pid), signal.SIGTERM, out)


def test_sighup_stops_a_run_as_sigterm_does(long_plan, tmp_path):
    """A closed terminal sends SIGHUP: the same handler as SIGTERM (its workers: tests above)."""
    out = tmp_path / "out"
    child = _start(long_plan, out, [])
    _wait_until(lambda: _cpu_seconds(child.pid) > 2.0, 180, child, "the run computing")
    child.send_signal(signal.SIGHUP)
    _assert_stopped(child, _descendants(child.pid), signal.SIGHUP, out)
