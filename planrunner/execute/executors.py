"""Run jobs through the engines: serially, on local processes, or on a dask.distributed cluster.

The numbers never depend on how jobs are run, because every random draw comes from the job's own
stream (see `engines.streams`) and resample r depends only on row r of it. Work is split two ways:
jobs without resamples (the jackknife) go whole to a worker, and the resamples of a bootstrap or a
Monte Carlo permutation test are cut into ranges (`engines.blocks`) that the workers compute and the
calling process concatenates in order. The engine's own summary (sorting, intervals, counts) runs in
the calling process.

On threads and processes the calling process is one of the ``workers``: it computes ranges itself
while the others start, and takes whichever range is next when it is free (`_Shares`). Every range
reads its own rows of the stream, so who computes a range changes no number.
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
import threading
from collections.abc import Callable
from typing import Any

import numpy as np

from planrunner.compile.jobs import Job
from planrunner.engines.blocks import RangeTask, mapping_ranges, resample_ranges
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.jackknife import JackknifeOptions, jackknife
from planrunner.engines.modelboot import ModelBootstrapOptions, model_bootstrap
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.results import BootstrapResult, JackknifeResult, PermutationResult
from planrunner.engines.statistics import STATISTICS, Statistic, bound_statistic, get_statistic
from planrunner.engines.streams import DRAW_BLOCK
from planrunner.errors import EngineError, PlanrunnerError
from planrunner.execute.permutation import run_permutation
from planrunner.execute.pool import Execution, ExecutorError, stop_process_pool, worker_pool
from planrunner.execute.rangework import call_cached_range, keep_task
from planrunner.execute.signals import stopping_on_termination

EngineResult = BootstrapResult | JackknifeResult | PermutationResult
# (resamples done, resamples in total) after every finished range and job
Progress = Callable[[int, int], None]
RANGES_PER_WORKER = 4  # dask: a few ranges per worker keep them busy while one finishes early
MIN_RANGE = DRAW_BLOCK  # ... but none shorter than a draw block: a range's fixed cost stays small beside its work
# threads and processes hand out ranges as workers ask for them, largest first: each is this share
# of what is left per worker (guided self-scheduling), so the first ones amortise a worker's start
# and the last ones are short enough that no worker waits long for another at the end
GUIDED_SHARE = 2
SMALLEST_SHARE = DRAW_BLOCK // 4  # ... but none shorter: a range's fixed cost (a generator, buffers) stays small
IN_FLIGHT = 2  # ranges queued for a worker process: one computing, one on its way (the parent's round trip)
WAIT_SECONDS = 0.1  # the calling thread wakes this often while it waits, so Ctrl-C is handled at once
SERIAL_RANGE = 5  # draw blocks per progress step in a serial run
SCHEDULER_TIMEOUT = 30.0  # seconds to reach a dask scheduler before giving up


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
        return bound_statistic, (statistic.name, statistic.value)
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


def shared_ranges(total: int, workers: int) -> list[tuple[int, int]]:
    """Consecutive ranges covering [0, total), largest first: each 1/(GUIDED_SHARE·workers) of the
    resamples not yet handed out, none shorter than SMALLEST_SHARE (but the last)."""
    ranges: list[tuple[int, int]] = []
    start = 0
    while start < total:
        size = max(SMALLEST_SHARE, -(-(total - start) // (GUIDED_SHARE * workers)))
        ranges.append((start, min(total, start + size)))
        start = ranges[-1][1]
    return ranges


class _Shares:
    """The ranges of one task (`shared_ranges`), each computed once, by whoever asks for it first:
    the calling thread (`compute`) or a worker (`claim`, then `finish` or `fail`). The calling
    thread alone reports progress and collects the parts in range order (`collect`)."""

    def __init__(self, task: RangeTask, total: int, workers: int, tally: _Tally):
        self.task = task
        self.ranges = shared_ranges(total, workers)
        self._parts: list[np.ndarray | None] = [None] * len(self.ranges)
        self._claimed = 0  # ranges handed out, in order
        self._finished = 0
        self._resamples_finished = 0
        self._resamples_reported = 0
        self._error: BaseException | None = None
        self._changed = threading.Condition()
        self._tally = tally

    def claim(self) -> int | None:
        """The next range's index, or None when every range is handed out, one failed, or `stop` was called."""
        with self._changed:
            if self._claimed == len(self.ranges) or self._error is not None:
                return None
            self._claimed += 1
            return self._claimed - 1

    def finish(self, index: int, part: np.ndarray) -> None:
        with self._changed:
            self._parts[index] = part
            self._finished += 1
            self._resamples_finished += self.ranges[index][1] - self.ranges[index][0]
            self._changed.notify_all()

    def fail(self, error: BaseException) -> None:
        with self._changed:
            if self._error is None:
                self._error = error
            self._changed.notify_all()

    def stop(self) -> None:
        """Hand out no more ranges (the calling thread is stopping: an error or an interrupt)."""
        with self._changed:
            self._claimed = len(self.ranges)

    def compute(self, report: bool = False) -> None:
        """Compute ranges in this thread until none is left to hand out; ``report``: in the calling thread."""
        while (index := self.claim()) is not None:
            self.finish(index, self.task(*self.ranges[index]))
            if report:
                self._report()

    def compute_on_helper(self) -> None:
        """`compute` on a helper thread: its error goes to the calling thread."""
        try:
            self.compute()
        except BaseException as exc:  # noqa: BLE001 (raised again by `collect` in the calling thread)
            self.fail(exc)

    def collect(self) -> list[np.ndarray]:
        """Every range's part in range order, once all are finished; a worker's error is raised here."""
        while True:
            with self._changed:
                if self._error is None and self._finished < len(self.ranges):
                    self._changed.wait(WAIT_SECONDS)  # a timeout: Ctrl-C is handled while waiting
                error, done = self._error, self._finished == len(self.ranges)
            self._report()
            if error is not None:
                raise error
            if done:
                return [part for part in self._parts if part is not None]

    def _report(self) -> None:
        with self._changed:
            new = self._resamples_finished - self._resamples_reported
            self._resamples_reported = self._resamples_finished
        if new:
            self._tally.add(new)


def _sharing(workers: int, tally: _Tally,
             helpers: Callable[[_Shares], None]) -> Callable[[RangeTask, int], list[np.ndarray]]:
    """A range mapper: ``helpers(shares)`` sets the other workers on the task's ranges, the calling
    thread computes ranges too, then collects them all in order."""
    def mapper(task: RangeTask, total: int) -> list[np.ndarray]:
        shares = _Shares(task, total, workers, tally)
        try:
            helpers(shares)
            shares.compute(report=True)
            return shares.collect()
        finally:
            shares.stop()  # after an error or an interrupt: no worker starts another range

    return mapper


def _on_threads(jobs: list[Job], execution: Execution, tally: _Tally) -> list[Any]:
    """Resample ranges on this thread and ``workers - 1`` more of this process: numpy releases the
    interpreter lock while it draws, gathers and reduces, so on a few cores this costs neither
    start-up nor copying."""
    from concurrent.futures import ThreadPoolExecutor

    pool = ThreadPoolExecutor(max_workers=max(1, execution.workers - 1), thread_name_prefix="planrunner")
    try:
        def helpers(shares: _Shares) -> None:
            for _ in range(execution.workers - 1):
                pool.submit(shares.compute_on_helper)

        return _run_jobs(jobs, tally, _sharing(execution.workers, tally, helpers), {})
    finally:
        # after an error or an interrupt: ranges already running end with their range
        pool.shutdown(wait=True, cancel_futures=True)


def stop_dask(client: Any, cluster: Any) -> None:
    """Close the client, and the local cluster started for it (None with a scheduler address)."""
    client.close()
    if cluster is not None:
        cluster.close()
        multiprocessing.active_children()  # reap the local cluster's worker processes now, not at exit


def _on_processes(jobs: list[Job], execution: Execution, tally: _Tally) -> list[Any]:
    """This process and ``workers - 1`` worker processes. While they start (a fresh interpreter
    importing numpy and the engines: 0.1–0.2 s), this process computes ranges."""
    if execution.worker_processes == 0:
        return _run_jobs(jobs, tally, None, {})
    pool = worker_pool(execution.worker_processes)
    try:
        pending = {i: pool.apply_async(_execute_caught, (job,)) for i, job in enumerate(jobs)
                   if job.method == "jackknife"}
        helpers = functools.partial(_feed_processes, pool, execution.worker_processes)
        return _run_jobs(jobs, tally, _sharing(execution.workers, tally, helpers),
                         {i: functools.partial(_pool_result, r) for i, r in pending.items()})
    finally:
        # every result is in (or the run stops): what a worker still has queued (a task it was sent
        # while this process computed the ranges) is not needed, so it is stopped rather than waited for
        stop_process_pool(pool)


def _feed_processes(pool: Any, processes: int, shares: _Shares) -> None:
    """Set the pool's ``processes`` on the ranges of ``shares``: each is first sent the pickled task
    (`rangework.keep_task`); once it has answered, it is sent ranges, IN_FLIGHT at a time, each new
    one as one comes back. The task's data so cross about once per worker, and a worker still
    starting holds no range back from the others. Everything below runs on the pool's result
    thread, whose callbacks must not raise: an error goes to the calling thread through `shares`."""
    key, payload = new_task_key(), pickled(shares.task)

    def guarded(step: Callable[..., None]) -> Callable[..., None]:
        def run(*args: Any) -> None:
            try:
                step(*args)
            except BaseException as exc:  # noqa: BLE001 (raised again by `collect`)
                shares.fail(exc)
        return run

    def send(index: int, with_task: bool) -> None:
        start, stop = shares.ranges[index]
        pool.apply_async(call_cached_range, (key, payload if with_task else None, start, stop),
                         callback=guarded(functools.partial(received, index)), error_callback=shares.fail)

    def send_next() -> None:
        index = shares.claim()
        if index is not None:
            send(index, with_task=False)

    def received(index: int, part: Any) -> None:
        if isinstance(part, str):  # NEEDS_TASK: a worker that another's keep_task passed by
            send(index, with_task=True)
            return
        shares.finish(index, part)
        send_next()

    def ready(_: Any) -> None:
        for _ in range(IN_FLIGHT):
            send_next()

    for _ in range(processes):
        pool.apply_async(keep_task, (key, payload), callback=guarded(ready), error_callback=shares.fail)


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
