"""Threads and processes share a task's ranges between the calling process and the workers: whoever
is free takes the next range. Every range reads its own rows of the stream, so who computes which
range changes no number (DEVELOPERS.md, "Executors and fast paths"); these tests force the two
extremes and a mixed order and compare the bits with the serial run."""

from __future__ import annotations

import pickle
import threading

import numpy as np
import pytest

from planrunner.compile.jobs import Job
from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for
from planrunner.execute import executors, pool
from planrunner.execute.executors import SMALLEST_SHARE, execute_all, shared_ranges
from planrunner.execute.pool import Execution


def _jobs() -> list[Job]:
    rng = np.random.default_rng(20261203)
    a, b = rng.gamma(2.0, 10.0, 300), rng.gamma(2.0, 11.0, 250)  # invented, skewed
    permutation = Job(analysis_id="difference", method="permutation", statistic=get_statistic("mean_difference"),
                      samples=(a, b), strata=None, group_labels=("a", "b"), strata_labels=None,
                      options=PermutationOptions(4999, "two-sided", exact="never"),
                      stream=stream_for(11, "difference"))
    bootstrap = Job(analysis_id="median", method="bootstrap", statistic=get_statistic("median"),
                    samples=(a,), strata=None, group_labels=("all rows",), strata_labels=None,
                    options=BootstrapOptions(3001, 0.95, ("percentile", "bca")), stream=stream_for(11, "median"))
    return [permutation, bootstrap]


def _bits(results: list) -> bytes:
    return pickle.dumps(results)


@pytest.mark.parametrize(("total", "workers"), [(1, 2), (249, 2), (1000, 2), (9999, 2), (20_000, 3), (4321, 1)])
def test_shared_ranges_cover_every_resample_once_largest_first(total: int, workers: int) -> None:
    ranges = shared_ranges(total, workers)
    assert ranges[0][0] == 0 and ranges[-1][1] == total
    assert all(stop == start for (_, stop), (start, _) in zip(ranges, ranges[1:]))  # consecutive
    sizes = [stop - start for start, stop in ranges]
    assert sizes[:-1] == sorted(sizes[:-1], reverse=True)
    assert all(size >= SMALLEST_SHARE for size in sizes[:-1]) and sizes[-1] >= 1


def test_the_calling_thread_alone_gives_the_serial_numbers(monkeypatch) -> None:
    jobs = _jobs()
    serial = _bits(execute_all(jobs))
    # threads whose helpers never start: every range is computed by the calling thread
    monkeypatch.setattr(executors._Shares, "compute_on_helper", lambda self: None)
    assert _bits(execute_all(jobs, execution=Execution("threads", 3))) == serial


def test_helpers_that_take_every_range_in_reverse_give_the_serial_numbers(monkeypatch) -> None:
    jobs = _jobs()
    serial = _bits(execute_all(jobs))

    def take_all_backwards(self: executors._Shares) -> None:
        claimed = []
        while (index := self.claim()) is not None:
            claimed.append(index)
        for index in reversed(claimed):  # the last range first, on another thread
            self.finish(index, self.task(*self.ranges[index]))

    def helpers_first(workers, tally, helpers):
        def mapper(task, total):
            shares = executors._Shares(task, total, workers, tally)
            helper = threading.Thread(target=take_all_backwards, args=(shares,))
            helper.start()
            helper.join()  # before the calling thread asks: it computes nothing
            shares.compute(report=True)
            return shares.collect()
        return mapper

    monkeypatch.setattr(executors, "_sharing", helpers_first)
    assert _bits(execute_all(jobs, execution=Execution("threads", 2))) == serial


def test_processes_share_ranges_with_the_calling_process_and_give_the_serial_numbers() -> None:
    jobs = _jobs()
    serial = _bits(execute_all(jobs))
    computed_here: list[tuple[int, int]] = []
    original = executors._Shares.compute

    def counting(self: executors._Shares, report: bool = False) -> None:
        task = self.task

        def here(start: int, stop: int) -> np.ndarray:
            computed_here.append((start, stop))
            return task(start, stop)

        self.task = here
        try:
            original(self, report)
        finally:
            self.task = task

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(executors._Shares, "compute", counting)
        assert _bits(execute_all(jobs, execution=Execution("processes", 2))) == serial
    # the calling process computed while its worker started (how many depends on the machine's speed)
    assert computed_here


def test_workers_started_early_are_taken_by_the_run_and_stopped_after_an_error() -> None:
    import multiprocessing

    from planrunner.errors import PlanError

    jobs = _jobs()
    serial = _bits(execute_all(jobs))
    execution = Execution("processes", 2)
    with pool.early_workers(execution):
        assert [count for count, _ in pool.early_pools()] == [1]  # this process and one worker process
        early = pool.early_pools()[0][1]
        with pool.early_workers(execution):  # the run's own, inside the command line's: no second pool
            assert pool.early_pools() == [(1, early)]
            assert _bits(execute_all(jobs, execution=execution)) == serial
        assert pool.early_pools() == []  # the run took the pool started early ...
    assert early._state != "RUN"  # ... and stopped it
    assert multiprocessing.active_children() == []
    with pytest.raises(PlanError), pool.early_workers(execution):
        raise PlanError("a plan error found while the workers start")
    assert pool.early_pools() == [] and multiprocessing.active_children() == []  # stopped and reaped


def test_only_the_processes_executor_starts_workers_early() -> None:
    for execution in (Execution(), Execution("threads", 2), Execution("processes", 1),
                      Execution("dask", 2, local_processes=False)):
        with pool.early_workers(execution):
            assert pool.early_pools() == []


def test_worker_processes_start_without_a_long_blas_spin_and_this_process_keeps_its_environment(
        monkeypatch) -> None:
    import os

    monkeypatch.delenv("OPENBLAS_THREAD_TIMEOUT", raising=False)
    workers = pool.process_pool(1)
    try:
        seen = workers.apply(os.getenv, ("OPENBLAS_THREAD_TIMEOUT",))
    finally:
        pool.stop_process_pool(workers)
    assert seen == pool.WORKER_ENVIRONMENT["OPENBLAS_THREAD_TIMEOUT"]
    assert "OPENBLAS_THREAD_TIMEOUT" not in os.environ  # set for the workers' start only
    monkeypatch.setenv("OPENBLAS_THREAD_TIMEOUT", "25")  # the user's own setting wins
    workers = pool.process_pool(1)
    try:
        assert workers.apply(os.getenv, ("OPENBLAS_THREAD_TIMEOUT",)) == "25"
    finally:
        pool.stop_process_pool(workers)
