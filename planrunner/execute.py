"""Run jobs through the engines. Serial for now; the numbers never depend on how jobs are run,
because every random draw comes from the job's own stream (see `engines.streams`)."""

from __future__ import annotations

from typing import Any

from .compile import Job
from .errors import EngineError
from .engines.bootstrap import bootstrap
from .engines.jackknife import jackknife
from .permrun import run_permutation


def execute(job: Job) -> Any:
    """The engine result for one job (a frozen dataclass of numbers). An engine knows only arrays,
    so its errors are given the analysis id here, where the reader can find it in the plan."""
    try:
        return _run_engine(job)
    except EngineError as exc:
        raise EngineError(f"{exc.message}", where=f"analysis '{job.analysis_id}'", hint=exc.hint) from None


def _run_engine(job: Job) -> Any:
    o = job.options
    if job.method == "bootstrap":
        return bootstrap(job.samples, job.statistic, resamples=o["resamples"], confidence=o["confidence"],
                         intervals=o["intervals"], stream=job.stream, strata=job.strata,
                         clusters=job.clusters, paired=job.paired, blocks=o.get("blocks"),
                         parametric=o.get("parametric"), trials=o.get("trials"),
                         exhaustive=o.get("exhaustive", False), studentized_se=o.get("studentized_se"),
                         inner_resamples=o.get("inner_resamples", 50),
                         on_degenerate=o.get("on_degenerate", "estimate-only"))
    if job.method == "permutation":
        return run_permutation(job)
    if job.method == "jackknife":
        return jackknife(job.samples, job.statistic, clusters=job.clusters)
    raise ValueError(f"no engine for method {job.method!r}")  # the schema makes this unreachable


def execute_all(jobs: list[Job]) -> list[Any]:
    return [execute(job) for job in jobs]
