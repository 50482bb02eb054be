"""Run jobs through the engines. Serial for now; the numbers never depend on how jobs are run,
because every random draw comes from the job's own stream (see `engines.streams`)."""

from __future__ import annotations

from typing import Any

from .compile import Job
from .engines.bootstrap import bootstrap
from .engines.jackknife import jackknife
from .permrun import run_permutation


def execute(job: Job) -> Any:
    """The engine result for one job (a frozen dataclass of numbers)."""
    o = job.options
    if job.method == "bootstrap":
        return bootstrap(job.samples, job.statistic, resamples=o["resamples"], confidence=o["confidence"],
                         intervals=o["intervals"], stream=job.stream, strata=job.strata)
    if job.method == "permutation":
        return run_permutation(job)
    if job.method == "jackknife":
        return jackknife(job.samples, job.statistic)
    raise ValueError(f"no engine for method {job.method!r}")  # the schema makes this unreachable


def execute_all(jobs: list[Job]) -> list[Any]:
    return [execute(job) for job in jobs]
