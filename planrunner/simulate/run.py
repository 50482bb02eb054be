"""Run a plan's analyses on simulated data sets and keep, per data set, only what the operating
characteristics need (README: Simulating the plan before the data).

Each simulated data set is an independent task. Its data come from the generator of draw stream
(simulation seed, key of the scenario's label, data-set index); its analyses run exactly as a run
runs them (`check_tables`, `compile_jobs`, the engines through `execute.executors.execute`, every
max-t family, the record's own adapters, multiplicity adjustment and decision rule), each analysis
on its plan stream salted by (scenario key, data-set index), so the data sets are independent of
each other and of the plan's own run. Nothing about a data set depends on which worker ran it or
in which order, so the numbers are the same serially, on threads, processes or dask.

A data set whose data cannot carry an analysis (a group left empty, an engine's refusal) is kept
as a failure with its located message, never dropped.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from planrunner.compile import limits
from planrunner.compile.jobs import Job, compile_jobs
from planrunner.data.checks import check_tables
from planrunner.data.columns import table_from_columns
from planrunner.data.tables import Table
from planrunner.engines.batched import BATCH_ELEMENTS
from planrunner.engines.blocks import resample_ranges
from planrunner.engines.statistics import null_value
from planrunner.engines.streams import Stream, analysis_key
from planrunner.errors import PlanrunnerError
from planrunner.execute.executors import dask_client, execute, job_resamples, stop_dask
from planrunner.execute.families import max_t_families
from planrunner.execute.pool import Execution, process_pool, stop_process_pool
from planrunner.plan.schema import Plan
from planrunner.record.build import family_fields, method_fields
from planrunner.record.decisions import decision_entry
from planrunner.simulate.batching import answering

# columns per dataset of one simulated data set, from that data set's generator
Columns = Mapping[str, Mapping[str, np.ndarray]]
DataMaker = Callable[[np.random.Generator], Columns]
# (data sets done, data sets in total), after every finished chunk
Progress = Callable[[int, int], None]
CHUNKS_PER_WORKER = 8  # a few chunks per worker keep them busy while one finishes early
MAX_CHUNK = 50  # data sets per chunk at most: an interrupt or a progress step waits for one chunk


@dataclass(frozen=True)
class IntervalOutcome:
    method: str
    level: float
    side: str  # two-sided, lower (an upper end of +inf), upper (a lower end of -inf)
    lower: float | None  # None: open (side) or not formed
    upper: float | None
    formed: bool  # False when the engine could not form the interval (its note says why)


@dataclass(frozen=True)
class AnalysisOutcome:
    """What one analysis gave on one simulated data set."""

    estimate: float | None = None
    intervals: tuple[IntervalOutcome, ...] = ()
    p_value: float | None = None
    adjusted_p_value: float | None = None  # in a multiplicity family: its adjusted p-value
    rejected: bool | None = None  # None: the analysis gives no test of its null (see `rejects`)
    verdict: str | None = None  # met, not met, unresolved; None without a decision rule
    warnings: tuple[str, ...] = ()  # codes of the job's, the engine's and the family's warnings
    failure: str | None = None  # the located message of a data set this analysis could not be run on


@dataclass(frozen=True)
class DatasetOutcome:
    index: int
    analyses: tuple[AnalysisOutcome, ...]  # in plan order


@dataclass(frozen=True)
class SimulationTask:
    """Everything a worker needs for the data sets of one scenario (sent once per chunk)."""

    plan: Plan
    seed: int  # the simulation's master seed
    label: str  # the scenario's name, with the group size in a sample-size search ("name n=40")
    make: DataMaker
    used: tuple[str, ...]  # the plan datasets the analyses read
    # data sets whose engines share passes (simulate/batching.py); None: a whole chunk; 0: one at a
    # time, without the batched engines. Never changes a number.
    batch: int | None = None

    def data_stream(self, index: int) -> np.random.Generator:
        """The data generator of data set ``index``: SeedSequence(seed, spawn_key=(label key, index))."""
        sequence = np.random.SeedSequence(entropy=self.seed, spawn_key=(analysis_key(self.label), index))
        return np.random.Generator(np.random.PCG64(sequence))

    def salt(self, index: int) -> tuple[int, int]:
        """What an analysis stream of data set ``index`` adds to its plan key."""
        return analysis_key(self.label), index


def used_datasets(plan: Plan) -> tuple[str, ...]:
    return tuple(dict.fromkeys(a.data for a in plan.analyses))


def source_name(label: str, dataset: str) -> str:
    """How messages name a simulated dataset (in place of its file)."""
    return f"simulated {dataset} ({label})"


def simulated_tables(task: SimulationTask, index: int) -> dict[str, Table]:
    columns = task.make(task.data_stream(index))
    return {name: table_from_columns(name, task.plan.datasets[name], columns[name],
                                     source=source_name(task.label, name)) for name in task.used}


def salted(job: Job, salt: tuple[int, ...]) -> Job:
    return replace(job, stream=Stream(job.stream.root_seed, job.stream.key + salt))


@dataclass(frozen=True)
class Compiled:
    """A data set's jobs (its plan streams salted), or the located message of its failure before them."""

    index: int
    jobs: list[Job] | None
    failure: str | None = None


def compile_dataset(task: SimulationTask, index: int) -> Compiled:
    """Simulated data set ``index`` as tables, checked, and its jobs."""
    try:
        tables = simulated_tables(task, index)
        check_tables(task.plan, tables)
        return Compiled(index, [salted(job, task.salt(index)) for job in compile_jobs(task.plan, tables)])
    except PlanrunnerError as exc:
        return Compiled(index, None, str(exc))


def run_dataset(task: SimulationTask, index: int) -> DatasetOutcome:
    """Every analysis of the plan on simulated data set ``index``."""
    return finish_dataset(task, compile_dataset(task, index))


def finish_dataset(task: SimulationTask, compiled: Compiled) -> DatasetOutcome:
    """Every analysis of a compiled data set through its engines (under whatever range mapper is
    installed: a batch's, see simulate/batching.py), its max-t families and the record's adapters."""
    plan, index = task.plan, compiled.index
    failed = _failed_whole(plan, index)
    if compiled.jobs is None:
        assert compiled.failure is not None
        return failed(compiled.failure)
    jobs = compiled.jobs
    results: list[Any] = []
    failures: list[str | None] = []
    for job in jobs:
        try:
            results.append(execute(job))
            failures.append(None)
        except PlanrunnerError as exc:
            results.append(None)
            failures.append(str(exc))
    try:
        max_t = max_t_families(plan, jobs, salt=task.salt(index)) if not any(failures) else {}
    except PlanrunnerError as exc:
        return failed(str(exc))
    return DatasetOutcome(index, outcomes_of(plan, jobs, results, failures, max_t))


def check_memory(task: SimulationTask, workers: int, available: int | None) -> None:
    """Refuse a scenario whose data sets would not fit, as a run refuses a plan (compile/limits.py):
    the jobs of data set 0, against the memory each of the ``workers`` may use, less what a batch
    holds beside them (its other data sets' observations and batched replicates: at most
    BATCH_ELEMENTS doubles; see `batches`). A data set 0 the analyses cannot use says nothing about
    memory: it is skipped."""
    try:
        jobs = compile_jobs(task.plan, simulated_tables(task, 0))
    except PlanrunnerError:
        return
    beside = 0 if task.batch == 0 else 8 * BATCH_ELEMENTS
    limits.check_jobs(jobs, available=None if available is None else max(0, available // max(1, workers) - beside))


def _failed_whole(plan: Plan, index: int) -> Callable[[str], DatasetOutcome]:
    return lambda message: DatasetOutcome(index, tuple(AnalysisOutcome(failure=message) for _ in plan.analyses))


def outcomes_of(plan: Plan, jobs: Sequence[Job], results: Sequence[Any], failures: Sequence[str | None],
                max_t: Mapping[int, Any]) -> tuple[AnalysisOutcome, ...]:
    """Each analysis's numbers as the record states them (its adapter, families and decision),
    without building the record: the estimate, the intervals, the p-value, the verdict."""
    bins = plan.report.bins
    fields = {a.id: method_fields(r, j, bins) for a, j, r in zip(plan.analyses, jobs, results) if r is not None}
    families = (family_fields(plan, fields, dict(max_t))
                if all(f is None for f in failures) and plan.multiplicity else [])
    out = []
    for analysis, job, result, failure in zip(plan.analyses, jobs, results, failures):
        if failure is not None:
            out.append(AnalysisOutcome(failure=failure))
            continue
        mine = fields[analysis.id]
        adjusted = [a["p_value"] for family in families for a in family.for_member(analysis.id)[0]]
        family_warnings = [w["code"] for family in families for w in family.for_member(analysis.id)[1]]
        decision = decision_entry(analysis, plan, mine, result)
        out.append(AnalysisOutcome(
            estimate=mine.estimate,
            intervals=tuple(_interval(i) for i in mine.intervals),
            p_value=mine.p_value,
            adjusted_p_value=adjusted[0] if adjusted else None,
            rejected=rejects(analysis, plan, mine.p_value, mine.intervals),
            verdict=None if decision is None else decision["verdict"],
            warnings=tuple(w.code for w in (*job.warnings, *result.warnings)) + tuple(family_warnings)))
    return tuple(out)


def _interval(entry: Mapping[str, Any]) -> IntervalOutcome:
    side = entry["side"]
    lower, upper = entry["lower"], entry["upper"]
    formed = (lower is not None or side == "upper") and (upper is not None or side == "lower")
    return IntervalOutcome(entry["method"], float(entry["level"]), side, lower, upper, formed)


def alpha_of(analysis: Any, plan: Plan) -> float:
    """The level at which an analysis rejects its null: 1 − its confidence (or the plan's)."""
    return round(1.0 - (getattr(analysis, "confidence", None) or plan.defaults.confidence), 12)


def tested_null(analysis: Any) -> float | None:
    """The null an interval is read against: the analysis's `null_value`, else the statistic's
    no-effect value (0 for a difference, 1 for a ratio); None when it has none."""
    own = getattr(analysis, "null_value", None)
    return float(own) if own is not None else null_value(analysis.statistic)


def rejects(analysis: Any, plan: Plan, p_value: float | None,
            intervals: Sequence[Mapping[str, Any]]) -> bool | None:
    """Whether the analysis rejects its null at α = 1 − confidence: p ≤ α when it gives a p-value;
    else when its pre-specified interval (or one-sided bound) leaves out the null value (the
    interval at confidence c is the set of nulls a test at α = 1 − c keeps). None when it gives
    neither (a jackknife, a statistic with no null value) or the interval was not formed."""
    if p_value is not None:
        return p_value <= alpha_of(analysis, plan)
    null = tested_null(analysis)
    if null is None or not intervals:
        return None
    first = _interval(intervals[0])
    if not first.formed:
        return None
    below = first.upper is not None and first.upper < null
    above = first.lower is not None and first.lower > null
    return below or above


# --- spreading the data sets over workers ----------------------------------------------------------

def chunks(total: int, workers: int) -> list[tuple[int, int]]:
    """Consecutive index ranges: a few per worker, none longer than MAX_CHUNK (they only group the
    work; every data set is computed alone, so the ranges never change a number)."""
    return resample_ranges(total, max(CHUNKS_PER_WORKER * workers, math.ceil(total / MAX_CHUNK)))


def run_chunk(task: SimulationTask, start: int, stop: int) -> list[DatasetOutcome]:
    with np.errstate(all="ignore"):
        if task.batch == 0:
            return [run_dataset(task, index) for index in range(start, stop)]
        out: list[DatasetOutcome] = []
        for batch in batches(task, start, stop):
            with answering([compiled.jobs for compiled in batch]):
                out.extend(finish_dataset(task, compiled) for compiled in batch)
        return out


def batches(task: SimulationTask, start: int, stop: int) -> Iterator[list[Compiled]]:
    """The compiled data sets [start, stop) in consecutive batches of at most ``task.batch`` (None:
    the whole range), each closed before what its data sets hold (`held_elements`) would exceed
    ``BATCH_ELEMENTS`` doubles (at least one data set a batch: a large data set runs alone)."""
    most = stop - start if task.batch is None else task.batch
    batch: list[Compiled] = []
    kept = 0
    for index in range(start, stop):
        compiled = compile_dataset(task, index)
        held = held_elements(compiled)
        if batch and (len(batch) == most or kept + held > BATCH_ELEMENTS):
            yield batch
            batch, kept = [], 0
        batch.append(compiled)
        kept += held
    if batch:
        yield batch


def held_elements(compiled: Compiled) -> int:
    """What a data set of a batch holds until its engines have run: its jobs' observations and,
    at most, one replicate per resample of each (the batched ones; a jackknife draws none)."""
    return sum(job_resamples(job) + sum(int(s.size) for s in job.samples) for job in compiled.jobs or ())


def run_scenario(task: SimulationTask, replicates: int, *, execution: Execution | None = None,
                 progress: Progress | None = None, pool: Any = None) -> list[DatasetOutcome]:
    """Every data set of one scenario, in index order. ``pool`` is an open `WorkerPool` (made by
    `worker_pool` for the whole simulation, so workers start once); None runs serially here."""
    execution = execution or Execution()
    done = 0
    out: list[DatasetOutcome] = []
    if progress is not None:
        progress(0, replicates)
    for part in (pool.map(task, chunks(replicates, execution.workers)) if pool is not None
                 else (run_chunk(task, a, b) for a, b in chunks(replicates, 1))):
        out.extend(part)
        done += len(part)
        if progress is not None:
            progress(done, replicates)
    return out


class WorkerPool:
    """The chunks of a scenario on threads, processes or dask; results in chunk order."""

    def __init__(self, execution: Execution):
        self.execution = execution
        self._pool: Any = None
        self._client: Any = None
        self._cluster: Any = None

    def __enter__(self) -> WorkerPool:
        kind = self.execution.executor
        if kind == "threads":
            from concurrent.futures import ThreadPoolExecutor
            self._pool = ThreadPoolExecutor(max_workers=self.execution.workers, thread_name_prefix="planrunner-sim")
        elif kind == "processes":
            self._pool = process_pool(self.execution.workers)
        elif kind == "dask":
            self._client, self._cluster = dask_client(self.execution)
        return self

    def map(self, task: SimulationTask, ranges: list[tuple[int, int]]) -> Iterator[list[DatasetOutcome]]:
        kind = self.execution.executor
        if kind == "threads":
            futures = [self._pool.submit(run_chunk, task, a, b) for a, b in ranges]
            return (f.result() for f in futures)
        if kind == "processes":
            waiting = [self._pool.apply_async(run_chunk, (task, a, b)) for a, b in ranges]
            return (w.get() for w in waiting)
        if kind == "dask":
            # as the run's dask ranges (execute/rangework): the task travels as pickled bytes, unpickled
            # once per worker, so that its arrays get aligned buffers rather than places in a message frame
            import functools

            from planrunner.execute.executors import new_task_key, pickled
            from planrunner.execute.rangework import call_cached_range

            key = new_task_key()
            payload = self._client.scatter(pickled(functools.partial(run_chunk, task)), broadcast=True, hash=False)
            futures = [self._client.submit(call_cached_range, key, payload, a, b, pure=False) for a, b in ranges]
            return (f.result() for f in futures)
        return (run_chunk(task, a, b) for a, b in ranges)

    def __exit__(self, *exc: object) -> None:
        if self._pool is not None and self.execution.executor == "threads":
            self._pool.shutdown(wait=True, cancel_futures=True)
        elif self._pool is not None:
            stop_process_pool(self._pool)  # after an error or an interrupt: no worker outlives the simulation
        if self._client is not None:
            stop_dask(self._client, self._cluster)
