"""Executors give the same numbers; interrupts leave nothing behind; memory stays bounded."""

from __future__ import annotations

import dataclasses
import operator
import shutil
import sys
import tracemalloc
from pathlib import Path

import numpy as np
import pytest
from conftest import fixed_clock

from planrunner.cli import main as cli
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for
from planrunner.execute.executors import execute_all
from planrunner.execute.pool import Execution, ExecutorError
from planrunner.pipeline.check import check_plan
from planrunner.pipeline.run import run_plan

DEMO = Path(__file__).resolve().parents[1] / "plans" / "liner-trial"
# informational fields: when, who, how it ran; everything else must agree bit for bit
NOT_COMPARED = {"started_utc", "finished_utc", "execution", "record_sha256"}  # the hash covers `execution`


@pytest.fixture
def demo(tmp_path: Path) -> Path:
    target = tmp_path / "liner-trial"
    shutil.copytree(DEMO, target, ignore=shutil.ignore_patterns("runs"))
    return target / "plan.yaml"


def _compare(reference: dict, other: dict, path: str = "") -> None:
    assert reference.keys() == other.keys(), path
    for key in reference:
        if path == "" and key in NOT_COMPARED:
            continue
        a, b = reference[key], other[key]
        if isinstance(a, dict):
            _compare(a, b, f"{path}.{key}")
        else:
            assert a == b, f"{path}.{key}: {a!r} != {b!r}"


def test_demo_plan_identical_serial_threads_processes_and_dask(demo: Path, tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    # the dask local cluster runs two worker processes that talk over TCP on loopback
    executions = [Execution(), Execution("threads", 2), Execution("processes", 2), Execution("dask", 2)]
    records = [run_plan(demo, out=tmp_path / f"out-{e.executor}", clock=fixed_clock, execution=e).record
               for e in executions]
    for record, execution in zip(records, executions):
        assert record["execution"] == {"executor": execution.executor, "workers": execution.workers,
                                       "scheduler": None}
    # two Monte Carlo analyses of 9999 resamples; the excursion test is exact (its DP null), the
    # jackknife draws none
    assert [a["resamples"] for a in records[0]["analyses"]][:2] == [9999, 9999]
    assert records[0]["analyses"][2]["exact"] is True and records[0]["analyses"][3]["resamples"] is None
    for other in records[1:]:
        _compare(records[0], other)
        for a, b in zip(records[0]["analyses"], other["analyses"]):  # lists of dicts: field by field
            _compare(a, b)


def _scheme_plan(write_plan) -> Path:
    """A plan with every bootstrap scheme that draws: blocks, parametric, studentized (inner
    jackknife, analytic and nested bootstrap), clusters, pairs and exhaustive enumeration."""
    rng = np.random.default_rng(31)  # invented readings; the test compares executors, not values
    rows = ["day,reading,arm,pair,site"] + [
        f"{d},{20 + 0.3 * np.sin(d / 3) + rng.normal(0, 1):.3f},{'ab'[d % 2]},{d // 2},{d % 8}" for d in range(48)]
    two_arms = "groups: {by: arm, compare: [a, b]}"
    analyses = [
        ("moving", "d", "mean", "resamples: 2500, order: day, blocks: {scheme: moving, length: 5}"),
        ("stationary", "d", "median", "resamples: 2500, order: day, blocks: {scheme: stationary, length: 4}"),
        ("normal-model", "d", "mean", "resamples: 2500, parametric: normal, intervals: [percentile, studentized]"),
        ("t-jackknife", "d", "mean", "resamples: 1500, intervals: [percentile, studentized], "
                                     "studentized_se: jackknife"),
        ("t-nested", "d", "mean_difference", f"resamples: 1200, {two_arms}, intervals: [studentized], "
                                             "studentized_se: bootstrap, inner_resamples: 20"),
        ("t-pairs", "d", "mean_difference", f"resamples: 1500, {two_arms}, pairs: pair, "
                                            "intervals: [percentile, studentized], studentized_se: jackknife"),
        # a bound statistic seen as pairs travels to worker processes by value
        ("pair-quantile", "d", "quantile_difference", f"resamples: 1500, quantile: 0.5, {two_arms}, pairs: pair"),
        ("sites", "d", "mean_difference", f"resamples: 2500, {two_arms}, clusters: site"),
        ("enumerated", "six", "mean", "resamples: 999, exhaustive: true, intervals: [percentile, studentized]"),
    ]
    text = "\n".join([
        "plan: schemes", "title: Every bootstrap scheme on every executor", "seed: 8080", "datasets:",
        "  d:", "    file: d.csv", "    columns:", "      day: {type: integer}", "      reading: {type: number}",
        "      arm: {type: category, levels: [a, b]}", "      pair: {type: integer}", "      site: {type: integer}",
        "  six:", "    file: six.csv", "    columns:", "      reading: {type: number}", "analyses:",
        *(f"  - {{id: {name}, role: secondary, data: {data}, outcome: reading, statistic: {statistic}, "
          f"method: bootstrap, {rest}}}"
          for name, data, statistic, rest in analyses)])
    return write_plan(text, {"d.csv": "\n".join(rows) + "\n", "six.csv": "reading\n3.1\n4.7\n2.2\n5.9\n4.4\n3.8\n"})


def test_every_bootstrap_scheme_identical_serial_threads_processes_and_dask(write_plan, tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    plan = _scheme_plan(write_plan)
    executions = [Execution(), Execution("threads", 2), Execution("processes", 2), Execution("dask", 2)]
    records = [run_plan(plan, out=tmp_path / f"out-{e.executor}", clock=fixed_clock, execution=e).record
               for e in executions]
    analyses = {a["id"]: a for a in records[0]["analyses"]}
    assert analyses["moving"]["scheme"] == "moving-block bootstrap, block length 5"
    assert analyses["stationary"]["scheme"] == "stationary bootstrap, mean block length 4"
    assert analyses["normal-model"]["scheme"].startswith("parametric: normal model")
    assert analyses["t-nested"]["details"]["studentized_se"]["method"] == "bootstrap"
    assert analyses["t-pairs"]["scheme"] == "whole pairs resampled"
    assert analyses["sites"]["scheme"].startswith("whole clusters resampled")
    assert analyses["enumerated"]["resamples"] == 462  # identity: C(2n - 1, n) distinct resamples, n = 6
    assert all(a["intervals"] and a["intervals"][-1]["lower"] is not None for a in analyses.values())
    for other in records[1:]:
        _compare(records[0], other)
        for a, b in zip(records[0]["analyses"], other["analyses"]):  # lists of dicts: field by field
            _compare(a, b)


def test_progress_counts_every_resample_once(demo: Path) -> None:
    jobs = check_plan(demo).jobs
    assert jobs is not None
    seen: list[tuple[int, int]] = []
    execute_all(jobs, progress=lambda done, total: seen.append((done, total)))
    totals = {total for _, total in seen}
    assert totals == {3 * 9999}  # one bootstrap and two permutation tests of 9999; the jackknife draws none
    dones = [done for done, _ in seen]
    assert dones == sorted(dones) and dones[0] == 0 and dones[-1] == 3 * 9999


def _interrupting_bar(after: int):
    class Bar:
        calls = 0

        def __call__(self, done: int, total: int) -> None:
            Bar.calls += 1
            if Bar.calls > after:
                raise KeyboardInterrupt

        def close(self) -> None:
            pass

    return Bar()


@pytest.mark.parametrize("options", [[], ["--workers", "2"], ["--executor", "threads", "--workers", "2"]])
def test_interrupt_stops_cleanly_without_a_record(demo: Path, tmp_path: Path, monkeypatch, capsys,
                                                  options: list[str]) -> None:
    monkeypatch.setattr(cli, "progress_bar", lambda quiet: _interrupting_bar(after=2))
    out = tmp_path / "runs"
    code = cli.main(["run", str(demo), "--out", str(out), *options])
    assert code == 130
    err = capsys.readouterr().err
    assert "interrupted" in err and "no record was written" in err and "Traceback" not in err
    assert not out.exists() or list(out.iterdir()) == []


@pytest.mark.parametrize(("options", "expected"), [
    ([], ("serial", 1)), (["--workers", "2"], ("processes", 2)), (["--workers", "3"], ("processes", 3)),
    (["--executor", "threads"], ("threads", 2)), (["--executor", "dask"], ("dask", 2)),
    (["--scheduler", "tcp://127.0.0.1:8786"], ("dask", 2))])
def test_workers_default_to_processes_the_executor_that_scales_on_every_design(options, expected) -> None:
    """`--workers N` alone runs processes (README, "Executors side by side": threads scale poorly on
    the permutation workload and not at all on the cluster permutation); an executor named without
    --workers has two workers."""
    import argparse

    from planrunner.cli.options import add_execution_options, execution_of

    parser = argparse.ArgumentParser()
    add_execution_options(parser)
    execution = execution_of(parser.parse_args(options))
    assert (execution.executor, execution.workers) == expected


def test_executor_choices_are_checked(demo: Path, capsys) -> None:
    assert cli.main(["run", str(demo), "--executor", "serial", "--workers", "3"]) == 2
    assert "serial executor runs one worker" in capsys.readouterr().err
    assert cli.main(["run", str(demo), "--workers", "0"]) == 2
    assert "at least 1" in capsys.readouterr().err
    assert cli.main(["run", str(demo), "--executor", "processes", "--scheduler", "tcp://127.0.0.1:1"]) == 2
    assert "only used by the dask executor" in capsys.readouterr().err


def test_dask_missing_is_a_clear_error(demo: Path, monkeypatch) -> None:
    jobs = check_plan(demo).jobs
    assert jobs is not None
    monkeypatch.setitem(sys.modules, "distributed", None)  # import fails as if not installed
    with pytest.raises(ExecutorError, match=r"planrunner\[dask\]"):
        execute_all(jobs, execution=Execution("dask", 2))


def _peak_bytes(call) -> int:
    tracemalloc.start()
    try:
        call()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.parametrize("method", ["bootstrap", "permutation"])
def test_memory_of_one_engine_call_stays_bounded_as_resamples_grow(method: str) -> None:
    rng = np.random.default_rng(1)
    data = [rng.normal(size=3000), rng.normal(size=2000)]
    stat = get_statistic("median_difference" if method == "bootstrap" else "mean_difference")

    def call(resamples: int):
        if method == "bootstrap":
            return lambda: bootstrap(data, stat, BootstrapOptions(resamples, 0.95, ("percentile",)),
                                     stream=stream_for(1, "memory"))
        return lambda: permutation_test(data, stat,
                                        PermutationOptions(resamples, "two-sided", exact="never"),
                                        stream=stream_for(1, "memory"))

    small, large = _peak_bytes(call(1000)), _peak_bytes(call(8000))
    # B x n draws would be 8000 * 5000 * 8 bytes = 320 MB; the growth allowed is four arrays of B doubles
    assert large - small <= 4 * 8 * (8000 - 1000)
    # and the peak itself is the memory batch (2e6 elements by default, a few arrays of it), not B x n
    assert large < 100 * 2 ** 20


def test_engine_errors_from_workers_keep_where_and_hint() -> None:
    from planrunner.compile.jobs import Job
    from planrunner.engines.jackknife import JackknifeOptions
    from planrunner.errors import EngineError
    from planrunner.execute.executors import _execute_caught, _result_of

    job = Job(analysis_id="one-row", method="jackknife", statistic=get_statistic("mean"),
              samples=(np.array([1.0]),), strata=None, group_labels=("all rows",), strata_labels=None,
              options=JackknifeOptions(), stream=stream_for(1, "one-row"))
    outcome = _execute_caught(job)  # what a worker sends back
    with pytest.raises(EngineError) as caught:
        _result_of(outcome)
    assert "at least 2" in caught.value.message and caught.value.hint == "use more data or another method"


def test_progress_bar_is_silent_off_a_terminal_and_when_quiet(capsys) -> None:
    for quiet in (False, True):
        bar = cli.progress_bar(quiet)
        for done in (0, 500, 1000):
            bar(done, 1000)
        bar.close()
    captured = capsys.readouterr()
    assert captured.err == "" and captured.out == ""  # pytest's stderr is not a terminal


def test_dask_scheduler_address_is_used(demo: Path) -> None:
    distributed = pytest.importorskip("distributed")
    jobs = check_plan(demo).jobs
    assert jobs is not None
    serial = execute_all(jobs)
    # a scheduler listening on loopback TCP, as a remote one would (its workers are threads here)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp://",
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        remote = execute_all(jobs, execution=Execution("dask", 2, cluster.scheduler_address))
    for a, b in zip(serial, remote):
        for field in dataclasses.fields(a):
            x, y = getattr(a, field.name), getattr(b, field.name)
            if isinstance(x, np.ndarray) or (isinstance(x, tuple) and x and isinstance(x[0], np.ndarray)):
                assert np.asarray(x).tobytes() == np.asarray(y).tobytes(), field.name
            else:
                assert x == y, field.name


def test_unreachable_scheduler_is_a_clear_error(demo: Path, monkeypatch) -> None:
    pytest.importorskip("distributed")
    import planrunner.execute.executors as execute

    monkeypatch.setattr(execute, "SCHEDULER_TIMEOUT", 1.0)
    jobs = check_plan(demo).jobs
    assert jobs is not None
    with pytest.raises(ExecutorError, match="cannot reach the dask scheduler tcp://127.0.0.1:1") as caught:
        execute_all(jobs, execution=Execution("dask", 2, "tcp://127.0.0.1:1"))  # port 1: nothing listens
    assert "check the address" in str(caught.value)


def test_statistics_with_a_parameter_travel_to_workers() -> None:
    """A bound quantile's function is a closure; it must reach a worker by name and level."""
    import pickle

    from planrunner.engines.statistics import bind

    q90 = bind(get_statistic("quantile"), 0.9)
    again = pickle.loads(pickle.dumps(q90))
    x = np.arange(11.0)
    assert again.name == "quantile" and again.value == 0.9
    assert float(again.compute(x)) == float(np.quantile(x, 0.9))  # numpy reference (type 7)


def _children() -> list[tuple[int, str]]:
    """(pid, state) of this process's children, from /proc (state Z: a zombie nobody reaped)."""
    import os

    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == os.getpid():
            found.append((int(entry.name), fields[0]))
    return found


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc")
@pytest.mark.parametrize("executor", ["processes", "dask"])
def test_worker_processes_are_reaped_when_the_run_ends(demo: Path, executor: str) -> None:
    """No zombie and no worker is left behind by the processes executor or a local dask cluster of
    worker processes: each worker's exit is collected before execute_all returns."""
    if executor == "dask":
        pytest.importorskip("distributed")
    jobs = check_plan(demo).jobs
    assert jobs is not None
    before = {pid for pid, _ in _children()}
    execute_all(jobs, execution=Execution(executor, 2))
    left = [(pid, state) for pid, state in _children() if pid not in before]
    # the spawn context's resource tracker lives as long as this interpreter (one per interpreter)
    import multiprocessing.resource_tracker as tracker

    tracker_pid = getattr(tracker._resource_tracker, "_pid", None)
    assert [(pid, state) for pid, state in left if pid != tracker_pid] == []


def test_a_worker_is_sent_each_task_once_and_asks_for_it_when_missing() -> None:
    import pickle

    from planrunner.engines.blocks import bind
    from planrunner.execute import rangework

    task = bind(np.arange)  # np.arange(start, stop): a picklable task of (start, stop)
    key = "test-key"
    rangework.TASKS.pop(key, None)
    assert rangework.call_cached_range(key, None, 0, 3) == rangework.NEEDS_TASK
    payload = pickle.dumps(task)
    assert rangework.call_cached_range(key, payload, 0, 3).tolist() == [0, 1, 2]
    assert rangework.call_cached_range(key, None, 5, 7).tolist() == [5, 6]  # kept: no second sending
    for other in range(rangework.TASKS_KEPT):  # only the last few tasks are kept
        rangework.call_cached_range(f"other-{other}", payload, 0, 1)
    assert rangework.call_cached_range(key, None, 0, 3) == rangework.NEEDS_TASK


def _aligned_flags(x: np.ndarray, y: np.ndarray, start: int, stop: int) -> np.ndarray:
    return np.array([x.flags.aligned, y.flags.aligned])


def test_a_task_reaches_a_worker_with_aligned_arrays_and_a_light_import() -> None:
    """A task travels as pickled bytes and is unpickled in the worker: an array that reached this
    process unaligned (as a dask message frame can leave it) is aligned there, and a worker process
    imports the engines it runs but none of the plan, data or compile stages."""
    import multiprocessing

    from planrunner.engines import statistics
    from planrunner.engines.blocks import bind
    from planrunner.execute import executors, rangework

    raw = bytearray(8 * 1001)
    unaligned = np.frombuffer(raw, dtype=np.float64, count=1000, offset=3)
    assert not unaligned.flags.aligned
    payload = executors.pickled(bind(_aligned_flags, unaligned, np.arange(5.0)))
    assert rangework.call_cached_range("aligned-test", payload, 0, 1).tolist() == [True, True]
    # a worker process as the processes executor starts it; its task and the module listing come from
    # numpy and the standard library, so that unpickling them imports no test module
    with multiprocessing.get_context("spawn").Pool(1, initializer=rangework.prepare_worker) as pool:
        imported_at_start = pool.apply(eval, ("sorted(__import__('sys').modules)",))
        ranged = pool.apply(rangework.call_cached_range, ("light", executors.pickled(bind(np.arange)), 2, 5))
        # a statistic with a parameter travels by name and value, unpickled by the engines alone
        quantile = statistics.bind(statistics.get_statistic("quantile"), 0.9)
        assert pool.apply(operator.attrgetter("label"), (quantile,)) == "0.9 quantile"
        imported = pool.apply(eval, ("sorted(__import__('sys').modules)",))
    assert ranged.tolist() == [2, 3, 4]
    # the engines are imported as the worker starts (before its first task: `run` starts workers early)
    assert set(rangework.ENGINE_MODULES) <= set(imported_at_start)
    heavy = [name for name in imported if name.split(".")[1:2] in (["plan"], ["data"], ["compile"], ["pipeline"])
             or name == "planrunner.execute.executors"]
    assert heavy == []


def test_a_local_dask_cluster_keeps_the_adaptive_malloc_threshold() -> None:
    """dask's MALLOC_TRIM_THRESHOLD_ for its worker processes is dropped for the run's own cluster
    (it turns off glibc's adaptive mmap threshold: every batch buffer faulted in afresh)."""
    dask = pytest.importorskip("dask")
    pytest.importorskip("distributed")
    from planrunner.execute import executors

    setting = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"
    assert dask.config.get(setting, None) is not None  # dask's own default, which the cluster drops
    with executors._dask_worker_environment():
        assert dask.config.get(setting) is None
    assert dask.config.get(setting, None) is not None
