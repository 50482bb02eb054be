"""What a worker process runs: resample ranges of tasks it keeps, sent to it as pickled bytes.

A worker process (of the processes executor or of a dask cluster) imports this module, and, as it
starts, numpy and the engines (`prepare_worker`), but nothing of the plan, data, compile or execute
stages: importing the executors module instead would cost each worker the plan, data and compile
stages (about 0.6 s of CPU per worker, measured), paid before it can draw a single resample. The
engines are imported at the start rather than when the first task arrives because `planrunner run`
starts its workers before it reads the plan and the data: a worker idle until then would import
numpy and its engine (0.1 s) only once the computing had begun.

Tasks travel as pickled bytes and are unpickled here, once per worker, never through a
framework's own serialisation: `pickle.loads` gives every array its own aligned buffer, while an
array deserialised in place from a dask message frame may start at an odd address, and numpy's
gathers from an unaligned array run about twice as slowly (measured on a dask worker:
``aligned=False``, address mod 64 = 11).
"""

from __future__ import annotations

import importlib
import pickle
import signal
import threading
import warnings
from typing import Any

# Non-finite intermediates are checked and reported by the engines (a message, or a warning in the
# result). numpy's own RuntimeWarnings about them (e.g. "Degrees of freedom <= 0" from a variance of
# one value) would reach stderr, from the planrunner process and from worker processes alike; the
# floating-point ones are silenced by np.errstate around each engine and range.
warnings.filterwarnings("ignore", category=RuntimeWarning, module=r"numpy\.")

# A worker keeps the last few range tasks it was sent (their arrays, streams and statistic), so a
# job's data cross to it about once rather than once per range.
TASKS: dict[str, Any] = {}
TASKS_KEPT = 4
NEEDS_TASK = "needs the task"  # what a worker answers for a range whose task it has not been sent
_KEEPING = threading.Lock()  # a dask worker of several threads may meet a new task twice at once


# what a range task needs: numpy and every engine (importing one engine imports most of the others
# through the registry of statistics, so all of them cost about as much as one)
ENGINE_MODULES = ("planrunner.engines.blocks", "planrunner.engines.bootstrap", "planrunner.engines.permutation",
                  "planrunner.engines.signflip", "planrunner.engines.clusters", "planrunner.engines.association",
                  "planrunner.engines.modelboot", "planrunner.engines.jackknife")


def ignore_interrupts() -> None:
    """Ctrl-C reaches the whole process group; the parent alone handles it and stops the workers."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def prepare_worker() -> None:
    """A worker process's start (the pool's initializer): leave Ctrl-C to the parent, and import
    numpy and the engines now, while the parent still reads the plan and the data."""
    ignore_interrupts()
    for name in ENGINE_MODULES:
        importlib.import_module(name)


def call_cached_range(key: str, payload: bytes | None, start: int, stop: int) -> Any:
    """The replicates of resamples [start, stop) of the task ``key`` (unpickled from ``payload``
    the first time this worker meets it), or NEEDS_TASK when it has neither."""
    task = TASKS.get(key)
    if task is None:
        if payload is None:
            return NEEDS_TASK
        task = _keep(key, payload)
    return task(start, stop)


def keep_task(key: str, payload: bytes) -> bool:
    """Unpickle and keep the task ``key`` before any range is sent: the answer tells the sender that
    this worker is up (its initializer has imported the engines) and holds the task's arrays."""
    if key not in TASKS:
        _keep(key, payload)
    return True


def _keep(key: str, payload: bytes) -> Any:
    task = pickle.loads(payload)
    with _KEEPING:
        while len(TASKS) >= TASKS_KEPT:
            del TASKS[next(iter(TASKS))]
        TASKS[key] = task
    return task
