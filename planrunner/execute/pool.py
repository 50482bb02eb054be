"""Where jobs run (`Execution`) and the worker processes of the processes executor, in a module that
imports no engine, no numpy and no plan stage.

`planrunner run` starts its worker processes before it imports the rest of the run (the plan
schema, the data readers, the engines: about a quarter of a second) and before it reads the plan
and the data, so that a worker (a fresh interpreter importing numpy and its engine, 0.1–0.2 s) is up
when the computing begins. That is only worth it if choosing and starting the workers costs
nothing heavy first: hence this module.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from planrunner.errors import PlanrunnerError
from planrunner.execute.rangework import prepare_worker

EXECUTORS = ("serial", "threads", "processes", "dask")


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

    @property
    def worker_processes(self) -> int:
        """The worker processes the processes executor starts: the calling process is one of the
        ``workers`` (0 for every other executor)."""
        return self.workers - 1 if self.executor == "processes" else 0


# OpenBLAS (numpy's BLAS) starts its threads when numpy is imported, and an idle BLAS thread spins
# for 2**28 cycles (about 0.1 s) before it sleeps: every worker process paid that in CPU at its start,
# taken from the processes computing on a machine with few cores. 2**20 cycles (under a millisecond)
# still keeps a thread awake between the BLAS calls of one batch. The setting changes when BLAS
# threads sleep, never how many there are or how they split a product, so no number changes.
WORKER_ENVIRONMENT = {"OPENBLAS_THREAD_TIMEOUT": "20"}


def process_pool(workers: int) -> Any:
    """A pool of ``workers`` worker processes that leave Ctrl-C to this process and import the engines
    as they start (`rangework.prepare_worker`). spawn: a clean interpreter per worker (forking a
    process that holds threads is unsafe)."""
    with _environment_for_workers():
        return multiprocessing.get_context("spawn").Pool(workers, initializer=prepare_worker)


@contextlib.contextmanager
def _environment_for_workers() -> Iterator[None]:
    """WORKER_ENVIRONMENT, but where the user set a variable, while the pool starts its processes
    (spawn hands them this process's environment as it is at that moment)."""
    added = {name: value for name, value in WORKER_ENVIRONMENT.items() if name not in os.environ}
    os.environ.update(added)
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


def stop_process_pool(pool: Any) -> None:
    pool.terminate()  # after an error or an interrupt: no worker outlives the run
    pool.join()  # and every worker is reaped: none is left a zombie after the run
    multiprocessing.active_children()  # reaps any other finished child (the pool's helpers)


# worker processes started ahead of a run by `early_workers`: (number of processes, pool); the
# processes executor takes a pool of the size it needs from here instead of starting one
_early: list[tuple[int, Any]] = []


def early_pools() -> list[tuple[int, Any]]:
    """The pools started by `early_workers` and not yet taken: (number of processes, pool)."""
    return list(_early)


@contextlib.contextmanager
def early_workers(execution: Execution) -> Iterator[None]:
    """Start the worker processes of ``execution`` (processes, two workers or more) on entry, so that
    they start while the rest of the run is imported and the plan and the data are read and checked;
    `executors.execute_all` inside takes them. Whatever was not taken is stopped on exit, also after
    an error or an interrupt before computing. Inside another `early_workers` of the same size
    (the command line's, around the run's own) it starts nothing: the outer one's pool is taken."""
    processes = execution.worker_processes
    if processes < 1 or any(count == processes for count, _ in _early):
        yield
        return
    entry = (processes, process_pool(processes))
    _early.append(entry)
    try:
        yield
    finally:
        if entry in _early:
            _early.remove(entry)
            stop_process_pool(entry[1])


def worker_pool(processes: int) -> Any:
    """A pool of ``processes`` worker processes: one started early (`early_workers`), else a new one.
    The caller stops it (`stop_process_pool`)."""
    for entry in _early:
        if entry[0] == processes:
            _early.remove(entry)
            return entry[1]
    return process_pool(processes)
