"""Run jobs through the engines: serially, on local processes, or on a dask.distributed cluster.

The numbers never depend on how jobs are run, because every random draw comes from the job's own
stream (see `engines.streams`) and resample r depends only on row r of it. Work is split two ways:
jobs without resamples (the jackknife) go whole to a worker, and the resamples of a bootstrap or a
Monte Carlo permutation test are cut into ranges of equal size (`engines.blocks`) that the
workers compute and the calling process concatenates in order. The engine's own summary (sorting,
intervals, counts) runs in the calling process.
"""

from __future__ import annotations

import copyreg
import functools
import itertools
import logging
import math
import multiprocessing
import os
import pickle
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.compile.jobs import Job
from planrunner.engines.blocks import RangeTask, mapping_ranges, resample_ranges
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.jackknife import JackknifeOptions, jackknife
from planrunner.engines.modelboot import ModelBootstrapOptions, model_bootstrap
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.results import BootstrapResult, JackknifeResult, PermutationResult
from planrunner.engines.statistics import STATISTICS, Statistic, bind, get_statistic
from planrunner.engines.streams import DRAW_BLOCK
from planrunner.errors import EngineError, PlanrunnerError
from planrunner.execute.permutation import run_permutation
from planrunner.execute.rangework import call_cached_range, ignore_interrupts
from planrunner.execute.signals import stopping_on_termination

EXECUTORS = ("serial", "threads", "processes", "dask")
EngineResult = BootstrapResult | JackknifeResult | PermutationResult
# (resamples done, resamples in total) after every finished range and job
Progress = Callable[[int, int], None]
RANGES_PER_WORKER = 4  # a few ranges per worker keep them busy while one finishes early
MIN_RANGE = DRAW_BLOCK  # ... but none shorter than a draw block: a range's fixed cost stays small beside its work
SERIAL_RANGE = 5  # draw blocks per progress step in a serial run
SCHEDULER_TIMEOUT = 30.0  # seconds to reach a dask scheduler before giving up


class ExecutorError(PlanrunnerError):
    """The chosen executor cannot run (a missing optional package, an unreachable scheduler)."""


@dataclass(frozen=True)
class Execution:
    """How jobs are run. Informational in the record: it never changes a number."""

    executor: str = "serial"
    workers: int = 1
    scheduler: str | None = None  # dask: address of a running scheduler; None starts a local cluster
    local_processes: bool = True  # dask local cluster: worker processes (False: threads, for tests)

    def __post_init__(self) -> None:
        if self.executor not in EXECUTORS:
            raise ExecutorError(f"unknown executor {self.executor!r}", hint=f"use one of {', '.join(EXECUTORS)}")
        if self.workers < 1:
            raise ExecutorError(f"the number of workers must be at least 1, got {self.workers}")
        if self.executor == "serial" and self.workers != 1:
            raise ExecutorError("the serial executor runs one worker",
                                hint="use --executor threads, processes or dask with --workers")
        if self.scheduler is not None and self.executor != "dask":
            raise ExecutorError("a scheduler address is only used by the dask executor",
                                hint="add --executor dask")

    def describe(self) -> dict[str, Any]:
        return {"executor": self.executor, "workers": self.workers, "scheduler": self.scheduler}


def _bound_statistic(name: str, value: float) -> Statistic:
    return bind(get_statistic(name), value)


def _reduce_statistic(statistic: Statistic) -> tuple:
    """Registered statistics travel to workers by name, and those with a parameter (a quantile's
    level) by name and value: their functions are closures, which cannot be pickled."""
    registered = STATISTICS.get(statistic.name)
    if registered is statistic:
        return get_statistic, (statistic.name,)
    # a view of a registered statistic under its name (the bootstrap's pairs: one sample of two
    # columns) is not the bound statistic: it travels by value
    same_shape = registered is not None and (registered.samples, registered.columns) == (statistic.samples,
                                                                                         statistic.columns)
    # a flipped Kaplan–Meier statistic (left censoring) carries its M: it travels by value
    plain = getattr(getattr(statistic.compute, "spec", None), "flip", None) is None
    if (same_shape and plain and registered is not None and registered.parameter is not None
            and statistic.value is not None):
        return _bound_statistic, (statistic.name, statistic.value)
    by_value = object.__reduce_ex__(statistic, 4)  # by value, whatever fields it has
    assert isinstance(by_value, tuple)
    return by_value


copyreg.pickle(Statistic, _reduce_statistic)


def execute(job: Job) -> EngineResult:
    """The engine result for one job (a frozen dataclass of numbers). An engine knows only arrays,
    so its errors are given the analysis id here, where the reader can find it in the plan."""
    try:
        # every non-finite intermediate is checked and reported by the engines as a message (or a
        # warning in the result); numpy's RuntimeWarnings about them would only reach stderr
        with np.errstate(all="ignore"):
            return _run_engine(job)
    except EngineError as exc:
        raise EngineError(f"{exc.message}", where=f"analysis '{job.analysis_id}'", hint=exc.hint) from None


def _run_engine(job: Job) -> EngineResult:
    if isinstance(job.options, ModelBootstrapOptions):
        return model_bootstrap(job.design["model"], job.statistic.name, job.options, stream=job.stream)
    if isinstance(job.options, BootstrapOptions):
        return bootstrap(job.samples, job.statistic, job.options, stream=job.stream, strata=job.strata,
                         clusters=job.clusters, paired=job.paired)
    if job.method == "permutation":
        return run_permutation(job)
    if isinstance(job.options, JackknifeOptions):
        return jackknife(job.samples, job.statistic, job.options, clusters=job.clusters)
    raise ValueError(f"no engine for method {job.method!r}")  # the schema makes this unreachable


def job_resamples(job: Job) -> int:
    """The resamples a job draws (its share of the progress total); the jackknife draws none."""
    if isinstance(job.options, (BootstrapOptions, PermutationOptions, ModelBootstrapOptions)):
        return job.options.resamples
    return 0


class _Tally:
    """Counts finished resamples and reports them; a job's unreported rest is added when it ends
    (an exact permutation test enumerates instead of drawing its ranges)."""

    def __init__(self, jobs: list[Job], progress: Progress | None):
        self.total = sum(job_resamples(job) for job in jobs)
        self.done = 0
        self.progress = progress
        if progress is not None:
            progress(0, self.total)

    def add(self, count: int) -> None:
        self.done += count
        if self.progress is not None:
            # an engine that draws more than its job's resamples (e.g. nested resampling) never
            # shows more than the total
            self.progress(min(self.done, self.total), self.total)


def execute_all(jobs: list[Job], *, execution: Execution | None = None,
                progress: Progress | None = None) -> list[Any]:
    """The results of every job, in job order. ``progress`` is called as ranges and jobs finish;
    an exception it raises (KeyboardInterrupt included) stops the run and the workers."""
    execution = execution or Execution()
    with stopping_on_termination():
        tally = _Tally(jobs, progress)
        if execution.executor == "serial":
            return _serial(jobs, tally)
        if execution.executor == "threads":
            return _on_threads(jobs, execution, tally)
        if execution.executor == "processes":
            return _on_processes(jobs, execution, tally)
        return _on_dask(jobs, execution, tally)


def _run_jobs(jobs: list[Job], tally: _Tally, mapper: Callable[[RangeTask, int], list[np.ndarray]] | None,
              whole: dict[int, Callable[[], Any]]) -> list[Any]:
    """Run the jobs not in ``whole`` here with ``mapper`` spreading their ranges; then collect
    ``whole`` (jobs already sent to workers) through their getters."""
    results: list[Any] = [None] * len(jobs)
    for i, job in enumerate(jobs):
        if i in whole:
            continue
        before = tally.done
        with mapping_ranges(mapper):
            results[i] = execute(job)
        tally.add(max(0, job_resamples(job) - (tally.done - before)))
    for i, get in whole.items():
        results[i] = get()
    return results


def _serial(jobs: list[Job], tally: _Tally) -> list[Any]:
    if tally.progress is None:
        return _run_jobs(jobs, tally, None, {})

    def mapper(task: RangeTask, total: int) -> list[np.ndarray]:
        parts = []
        for start, stop in resample_ranges(total, math.ceil(total / (SERIAL_RANGE * DRAW_BLOCK))):
            parts.append(task(start, stop))
            tally.add(stop - start)
        return parts

    return _run_jobs(jobs, tally, mapper, {})


_task_keys = itertools.count()  # tasks are known to workers by key (see rangework)


def new_task_key() -> str:
    return f"{os.getpid()}-{next(_task_keys)}"


def pickled(value: Any) -> bytes:
    """What a worker process is sent: unpickled there with `pickle.loads`, each array in an aligned
    buffer of its own (see `rangework`)."""
    return pickle.dumps(value, protocol=pickle.HIGHEST_PROTOCOL)


def _execute_caught(job: Job) -> tuple[Any, tuple | None]:
    """``execute`` in a worker, with a planrunner error sent back whole (pickling an exception
    keeps only its message, not where it happened or what to do)."""
    try:
        return execute(job), None
    except PlanrunnerError as exc:
        return None, (type(exc), exc.message, exc.where, exc.hint)


def _execute_pickled(payload: bytes) -> tuple[Any, tuple | None]:
    return _execute_caught(pickle.loads(payload))


def _result_of(outcome: tuple[Any, tuple | None]) -> Any:
    result, error = outcome
    if error is not None:
        kind, message, where, hint = error
        raise kind(message, where=where, hint=hint)
    return result


def _pool_result(pending: Any) -> Any:
    """The result of a multiprocessing AsyncResult of one job (result, error)."""
    return _result_of(pending.get())


def _future_result(pending: Any) -> Any:
    """The result of a concurrent or dask future of one job (result, error)."""
    return _result_of(pending.result())


def _ranges(total: int, workers: int) -> list[tuple[int, int]]:
    """A few ranges per worker, none shorter than MIN_RANGE resamples (so a small job is not cut
    into pieces that cost more to send and start than to compute)."""
    return resample_ranges(total, max(1, min(RANGES_PER_WORKER * workers, total // MIN_RANGE)))


def _spreading(submit: Callable[[RangeTask, int, int], Any], result: Callable[[Any], np.ndarray], workers: int,
               tally: _Tally) -> Callable[[RangeTask, int], list[np.ndarray]]:
    """A range mapper that hands a few equal ranges per worker to ``submit`` at once, then collects
    them in order with ``result``, counting each finished range for the progress bar."""
    def mapper(task: RangeTask, total: int) -> list[np.ndarray]:
        ranges = _ranges(total, workers)
        waiting = [submit(task, start, stop) for start, stop in ranges]
        parts = []
        for (start, stop), pending in zip(ranges, waiting):
            parts.append(result(pending))
            tally.add(stop - start)
        return parts

    return mapper


def _on_threads(jobs: list[Job], execution: Execution, tally: _Tally) -> list[Any]:
    """Resample ranges on threads of this process: numpy releases the interpreter lock while it
    draws, gathers and reduces, so on a few cores this costs neither start-up nor copying."""
    from concurrent.futures import ThreadPoolExecutor

    pool = ThreadPoolExecutor(max_workers=execution.workers, thread_name_prefix="planrunner")
    try:
        mapper = _spreading(lambda task, start, stop: pool.submit(task, start, stop), lambda f: f.result(),
                            execution.workers, tally)
        return _run_jobs(jobs, tally, mapper, {})
    finally:
        # after an error or an interrupt: queued ranges are dropped, running ones end with their range
        pool.shutdown(wait=True, cancel_futures=True)


def process_pool(workers: int) -> Any:
    """A pool of ``workers`` worker processes that leave Ctrl-C to this process. spawn: a clean
    interpreter per worker (forking a process that holds threads is unsafe)."""
    return multiprocessing.get_context("spawn").Pool(workers, initializer=ignore_interrupts)


def stop_process_pool(pool: Any) -> None:
    pool.terminate()  # after an error or an interrupt: no worker outlives the run
    pool.join()  # and every worker is reaped: none is left a zombie after the run
    multiprocessing.active_children()  # reaps any other finished child (the pool's helpers)


def stop_dask(client: Any, cluster: Any) -> None:
    """Close the client, and the local cluster started for it (None with a scheduler address)."""
    client.close()
    if cluster is not None:
        cluster.close()
        multiprocessing.active_children()  # reap the local cluster's worker processes now, not at exit


def _on_processes(jobs: list[Job], execution: Execution, tally: _Tally) -> list[Any]:
    pool = process_pool(execution.workers)
    try:
        pending = {i: pool.apply_async(_execute_caught, (job,)) for i, job in enumerate(jobs)
                   if job.method == "jackknife"}

        mapper = _cached_spreading(pool, execution.workers, tally)

        results = _run_jobs(jobs, tally, mapper, {i: functools.partial(_pool_result, r) for i, r in pending.items()})
        pool.close()
        pool.join()
        return results
    finally:
        stop_process_pool(pool)


def _cached_spreading(pool: Any, workers: int, tally: _Tally) -> Callable[[RangeTask, int], list[np.ndarray]]:
    """`_spreading` for a process pool that sends each task's data about once per worker: the
    pickled task rides with the first range of each worker; a worker that gets a later range
    first answers that it needs the task, and that range is sent again with it."""
    def mapper(task: RangeTask, total: int) -> list[np.ndarray]:
        key, payload = new_task_key(), pickled(task)
        ranges = _ranges(total, workers)
        waiting = [pool.apply_async(call_cached_range, (key, payload if i < workers else None, start, stop))
                   for i, (start, stop) in enumerate(ranges)]
        parts = []
        for (start, stop), pending in zip(ranges, waiting):
            part = pending.get()
            if isinstance(part, str):  # NEEDS_TASK: that worker had not been sent the task yet
                part = pool.apply_async(call_cached_range, (key, payload, start, stop)).get()
            parts.append(part)
            tally.add(stop - start)
        return parts

    return mapper


def _dask_worker_environment() -> Any:
    """dask's settings for the local cluster's worker processes, less the malloc trim threshold.

    dask starts its workers with MALLOC_TRIM_THRESHOLD_=65536 so that they hand freed memory back
    to the system at once; setting it also turns off glibc's adaptive mmap threshold, so every
    batch buffer of about 1 MB is mapped afresh and faulted in page by page (measured: 196,000
    page faults and +60% CPU per 1000 resamples of a bootstrap of the mean, n = 1e5). A cluster
    that lives for one run has no use for the trimming. A value the user set in the environment
    still wins (dask's own rule)."""
    import dask

    return dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None})


def dask_client(execution: Execution) -> tuple[Any, Any]:
    """A dask client for ``execution`` and the local cluster it started (None with a scheduler address)."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise ExecutorError("the dask executor needs the optional packages dask and distributed",
                            hint="install them with: pip install 'planrunner[dask]'") from None
    cluster = None
    try:
        if execution.scheduler is None:
            # worker processes listen on loopback only, threads talk in-process; no dashboard, and
            # the scheduler's small HTTP server (health, metrics) on a free loopback port, not on
            # 8787 with a warning on stderr when another cluster holds that: a local cluster opens
            # nothing to the network
            network = {"host": "127.0.0.1"} if execution.local_processes else {}
            # the cluster lives for this run only: its workers' failures reach the run as errors of
            # their futures, and their log lines (heartbeats lost while the cluster is stopped after
            # an interrupt, with tracebacks) would only bury planrunner's own message
            with _dask_worker_environment():
                cluster = LocalCluster(n_workers=execution.workers, threads_per_worker=1,
                                       processes=execution.local_processes, dashboard_address=None,
                                       silence_logs=logging.CRITICAL, **network,
                                       scheduler_kwargs={"dashboard": False, "dashboard_address": "127.0.0.1:0"})
            client = Client(cluster)
        else:
            client = Client(execution.scheduler, timeout=SCHEDULER_TIMEOUT)
    except (OSError, TimeoutError) as exc:
        if cluster is not None:
            cluster.close()
        raise ExecutorError(f"cannot reach the dask scheduler {execution.scheduler or 'local cluster'}: {exc}",
                            hint="check the address (e.g. tcp://host:8786) and that the scheduler runs") from None
    return client, cluster


def _on_dask(jobs: list[Job], execution: Execution, tally: _Tally) -> list[Any]:
    client, cluster = dask_client(execution)
    futures: list[Any] = []
    try:
        pending = {i: client.submit(_execute_pickled, pickled(job), pure=False) for i, job in enumerate(jobs)
                   if job.method == "jackknife"}
        futures.extend(pending.values())

        # each task goes to every worker once, as pickled bytes (by id: tasks are not hashable)
        scattered: dict[int, tuple[RangeTask, str, Any]] = {}

        def submit(task: RangeTask, start: int, stop: int) -> Any:
            if id(task) not in scattered:
                scattered.clear()  # the previous job's task is finished with
                scattered[id(task)] = (task, new_task_key(),
                                       client.scatter(pickled(task), broadcast=True, hash=False))
            _, key, payload = scattered[id(task)]
            futures.append(client.submit(call_cached_range, key, payload, start, stop, pure=False))
            return futures[-1]

        mapper = _spreading(submit, lambda f: f.result(), execution.workers, tally)

        return _run_jobs(jobs, tally, mapper, {i: functools.partial(_future_result, f) for i, f in pending.items()})
    finally:
        client.cancel([f for f in futures if not f.done()])
        stop_dask(client, cluster)
