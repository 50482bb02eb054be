"""What `planrunner check` does: read and validate the plan, read and check its data, compile the
jobs and check that the run fits in memory, without computing anything.

A module of its own so that `check` imports only what it uses: `pipeline.run` (which also computes,
writes the record and the reports, and keeps the history) builds on it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field, replace
from pathlib import Path

from planrunner.compile import limits
from planrunner.compile.jobs import Job, compile_jobs
from planrunner.data.checks import check_tables
from planrunner.data.dummy import refuse_dummy_data
from planrunner.data.sets import evaluate_sets
from planrunner.data.tables import Table, read_table, resolve_data_path
from planrunner.engines.modelboot import ModelBootstrapOptions
from planrunner.execute.families import planned_family_computations
from planrunner.execute.permutation import planned_computation, planned_model
from planrunner.plan.load import LoadedPlan, read_plan
from planrunner.plan.params import apply as apply_parameters
from planrunner.plan.params import resolve_values


@dataclass(frozen=True)
class CheckOutcome:
    loaded: LoadedPlan
    tables: dict[str, Table] | None  # None when data were not checked
    jobs: list[Job] | None
    parameters: dict[str, str] = field(default_factory=dict)


def available_memory() -> int | None:
    """Bytes of memory available now (Linux: MemAvailable; else physical memory), None if unknown."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        return None


def load_tables(loaded: LoadedPlan, data_root: str | Path | None = None) -> dict[str, Table]:
    root = Path(data_root) if data_root is not None else None
    sizes = []
    paths = [resolve_data_path(loaded.folder, spec.file, data_root=root) for spec in loaded.plan.datasets.values()]
    refuse_dummy_data(paths)  # a rehearsal's dummy files are never a run's data
    for spec, path in zip(loaded.plan.datasets.values(), paths):
        if path.is_file():  # a missing file is reported by read_table with its own message
            sizes.append((spec.file, path.stat().st_size))
    limits.check_files(sizes, available=available_memory())
    return {name: evaluate_sets(name, spec, read_table(name, spec, loaded.folder, data_root=root))
            for name, spec in loaded.plan.datasets.items()}


def load_plan(path: str | Path, params: dict[str, str] | None = None, *,
              require_values: bool = True) -> tuple[LoadedPlan, dict[str, str]]:
    """Read and check the plan, and fill its parameters (file paths and titles only)."""
    loaded = read_plan(path)
    values = resolve_values(loaded.plan, params or {}, require=require_values)
    return replace(loaded, plan=apply_parameters(loaded.plan, values)), values


def check_plan(path: str | Path, *, with_data: bool = True, params: dict[str, str] | None = None,
               data_root: str | Path | None = None) -> CheckOutcome:
    """Validate the plan; with data, also read the files, check what each analysis will use and
    that the run fits in memory, and build the jobs (no resampling)."""
    # the plan alone can be checked before the month's value is known
    loaded, values = load_plan(path, params, require_values=with_data or bool(params))
    if not with_data:
        return CheckOutcome(loaded, None, None, values)
    tables = load_tables(loaded, data_root)
    check_tables(loaded.plan, tables)
    jobs = compile_jobs(loaded.plan, tables)
    limits.check_jobs(jobs, available=available_memory())
    for job in jobs:  # what a run would refuse, refused now, by the engines' own rule (no resampling)
        if job.method == "permutation":
            planned_computation(job)
        elif isinstance(job.options, ModelBootstrapOptions):
            planned_model(job)
    planned_family_computations(loaded.plan, jobs)
    return CheckOutcome(loaded, tables, jobs, values)
