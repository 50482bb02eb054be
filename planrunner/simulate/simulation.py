"""`planrunner simulate`: the plan's analyses on simulated data sets, their operating
characteristics, a sample-size search, and a new folder with simulation.json and its reports.

    plan (+ lock check) + scenarios file ──▶ per scenario: data sets (run.py) ──▶ metrics.py
    search: the named scenario at each grid size ──▶ power per size ──▶ the smallest size reaching it
    document (canonical JSON, own sha256) ──▶ simulation.json, simulation.html, simulation.md, figures

The document is built once and nothing edits it afterwards; the reports are views of it.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from planrunner.engines.streams import DRAW_BLOCK, GENERATOR
from planrunner.errors import PlanError
from planrunner.execute.pool import Execution
from planrunner.execute.signals import stopping_on_termination
from planrunner.pipeline.run import utc_now, utc_stamp
from planrunner.plan.schema import Plan
from planrunner.record.build import to_json
from planrunner.record.canonical import self_hash
from planrunner.simulate.metrics import analysis_metrics, share
from planrunner.simulate.run import (
    AnalysisOutcome,
    DatasetOutcome,
    Progress,
    SimulationTask,
    WorkerPool,
    alpha_of,
    check_memory,
    run_scenario,
    used_datasets,
)
from planrunner.simulate.truth import true_value

FORMAT = "planrunner.simulation/1"
HASH_FIELD = "simulation_sha256"
CAUTION = (
    "Simulated operating characteristics (power, type I error, coverage, bias) hold only under the "
    "data-generating models assumed in the scenarios file; data that depart from them can behave "
    "differently. They inform a plan; they do not justify one on their own. Sample sizes and claims "
    "rest with qualified statisticians and with the regulations, guidance and procedures that govern "
    "them locally."
)
STREAMS = (
    "data set i of a scenario: numpy SeedSequence(entropy=simulation seed, spawn_key=(K, i)) with K the "
    "first 8 bytes of SHA-256(scenario label) read as a big-endian integer (the label is the scenario's "
    "name, or 'NAME n=SIZE' in the sample-size search), one PCG64 generator per data set; each analysis "
    "draws from its plan stream with (K, i) appended to its spawn key, in blocks of "
    f"{DRAW_BLOCK} resamples ({GENERATOR})"
)
SEARCH_RULE = (
    "the smallest size of the grid whose estimated power (the share of data sets meeting the analysis's "
    "decision rule, or rejecting its null when it has no rule) is at least the target; the 95% "
    "Clopper–Pearson lower bound of that share is reported beside it, and the smallest size whose "
    "lower bound reaches the target"
)


@dataclass(frozen=True)
class ModelData:
    """The data maker of a scenario: every dataset the analyses read, generated from one generator
    in the plan's order of datasets (simulate/generate.py)."""

    models: Mapping[str, Any]  # dataset name -> its DatasetModel
    plan: Plan
    used: tuple[str, ...]

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        from planrunner.simulate.generate import generate

        return {name: generate(self.models[name], self.plan.datasets[name], rng) for name in self.used}


@dataclass(frozen=True)
class SimulationOutcome:
    folder: Path
    document: dict


def simulate_plan(plan_path: str | Path, scenarios_path: str | Path, *, out: str | Path | None = None,
                  execution: Execution | None = None, progress: Callable[[str], Progress] | None = None,
                  command: list[str] | None = None, clock: Callable[[], dt.datetime] = utc_now,
                  lock: str | Path | None = None, refuse_deviations: bool = False,
                  params: dict[str, str] | None = None, replicates: int | None = None,
                  batch: int | None = None) -> SimulationOutcome:
    """Simulate every scenario (and the search) and write a new folder. ``progress(label)`` gives
    the progress hook of each scenario's data sets. ``replicates`` replaces every scenario's number
    of data sets (a quick look; the document says so). ``batch``: data sets whose engines share
    passes (``SimulationTask.batch``; 0 runs them one at a time; None: a whole chunk, except on
    threads, where batches measured slower, one at a time); it never changes a number. An
    interrupt leaves nothing behind: the folder is written only when every number is in (trail/store.py)."""
    from planrunner.pipeline.check import load_plan
    from planrunner.simulate.scenarios import load_scenarios
    from planrunner.trail.files import lock_for_run

    started = clock()
    loaded, values = load_plan(plan_path, params, require_values=False)
    # simulated data have no files: the lock is compared for the plan only
    lock_entry = lock_for_run(loaded, {}, lock, refuse_deviations=refuse_deviations)
    scenarios = load_scenarios(Path(scenarios_path), loaded.plan)
    if replicates is not None:
        if replicates < 1:
            raise PlanError(f"--replicates must be at least 1, got {replicates}", where="--replicates",
                            hint="give the number of data sets of every scenario, e.g. --replicates 100")
        scenarios = replace(scenarios, scenarios=tuple(replace(s, replicates=replicates)
                                                       for s in scenarios.scenarios))
    execution = execution or Execution()
    if batch is None and execution.executor == "threads":
        batch = 0  # batched passes on 2 threads measured 0.88 to 1.09 of one at a time (README: Simulation speed)
    plan = loaded.plan
    with stopping_on_termination(), WorkerPool(execution) as pool:
        results = [_scenario_entry(plan, scenarios.seed, s, execution, pool, progress, batch)
                   for s in scenarios.scenarios]
        search = None if scenarios.search is None else _search(plan, scenarios, execution, pool, progress, batch)
    finished = clock()
    body: dict[str, Any] = {
        "format": FORMAT,
        "title": scenarios.title,
        "started_utc": utc_stamp(started),
        "finished_utc": utc_stamp(finished),
        "command": list(command or ["planrunner", "simulate", str(plan_path), "--scenarios", str(scenarios_path)]),
        "plan": {"id": plan.plan, "title": plan.title, "file": loaded.file.name, "sha256": loaded.sha256,
                 "lock": lock_entry, "parameters": dict(values)},
        "scenarios_file": {"file": Path(scenarios_path).name, "sha256": scenarios.sha256,
                           "title": scenarios.title, "description": scenarios.description, "text": scenarios.text,
                           # None: every scenario ran the data sets the file gives it
                           "replicates_replaced_by": replicates},
        "seed": {"simulation": scenarios.seed, "plan": plan.seed, "derivation": STREAMS},
        "environment": _environment(),
        "execution": execution.describe(),
        "scenarios": results,
        "search": search,
        "caution": CAUTION,
    }
    digest = self_hash(body, HASH_FIELD)
    # as simulation.json holds it (keys sorted), so that the reports are views of the file itself
    document = json.loads(to_json({**body, HASH_FIELD: digest}))
    root = Path(out) if out is not None else loaded.folder / "simulations"
    name = f"{plan.plan}-simulation-{started.strftime('%Y%m%dT%H%M%SZ')}-{digest[:8]}"
    return SimulationOutcome(write_simulation(root, name, document), document)


def _environment() -> dict[str, Any]:
    from planrunner.record.build import environment

    return environment()


def _scenario_entry(plan: Plan, seed: int, scenario: Any, execution: Execution, pool: WorkerPool,
                    progress: Callable[[str], Progress] | None, batch: int | None) -> dict[str, Any]:
    outcomes = _run(plan, seed, scenario.name, scenario, scenario.replicates, execution, pool, progress, batch)
    return {"name": scenario.name, "description": scenario.description, "replicates": scenario.replicates,
            "changes": dict(scenario.changes), "group_sizes": group_sizes(scenario),
            "analyses": [analysis_entry(plan, k, a, outcomes, scenario.datasets)
                         for k, a in enumerate(plan.analyses)]}


def _run(plan: Plan, seed: int, label: str, scenario: Any, replicates: int, execution: Execution,
         pool: WorkerPool, progress: Callable[[str], Progress] | None, batch: int | None) -> list[DatasetOutcome]:
    from planrunner.pipeline.check import available_memory

    used = used_datasets(plan)
    task = SimulationTask(plan, seed, label, ModelData(dict(scenario.datasets), plan, used), used, batch)
    check_memory(task, execution.workers, available_memory())
    hook = progress(label) if progress is not None else None
    return run_scenario(task, replicates, execution=execution, progress=hook,
                        pool=pool if execution.executor != "serial" else None)


def group_sizes(scenario: Any) -> dict[str, dict[str, int]]:
    out = {}
    for name, model in scenario.datasets.items():
        groups = model.rows.groups
        out[name] = dict(groups.sizes) if groups is not None else {"rows": int(model.rows.count or 0)}
    return out


def in_family(plan: Plan, analysis_id: str) -> bool:
    return any(analysis_id in family.family for family in plan.multiplicity)


def analysis_entry(plan: Plan, k: int, analysis: Any, outcomes: list[DatasetOutcome],
                   models: Mapping[str, Any]) -> dict[str, Any]:
    mine: list[AnalysisOutcome] = [o.analyses[k] for o in outcomes]
    return {"id": analysis.id, "title": analysis.title, "role": analysis.role, "method": analysis.method,
            "statistic": analysis.statistic,
            "decision": None if getattr(analysis, "decision", None) is None else analysis.decision.rule,
            **analysis_metrics(mine, [o.index for o in outcomes], alpha_of(analysis, plan),
                               true_value(analysis, plan, models), in_family(plan, analysis.id))}


def _search(plan: Plan, scenarios: Any, execution: Execution, pool: WorkerPool,
            progress: Callable[[str], Progress] | None, batch: int | None) -> dict[str, Any]:
    """The named scenario at each size of the grid; the analysis alone when it is in no
    multiplicity family (its numbers do not depend on the others), else the whole plan."""
    search = scenarios.search
    base = scenarios.scenario(search.scenario)
    k = next(i for i, a in enumerate(plan.analyses) if a.id == search.analysis)
    analysis = plan.analyses[k]
    alone = not in_family(plan, analysis.id)
    searched = plan.model_copy(update={"analyses": [analysis], "multiplicity": []}) if alone else plan
    index = 0 if alone else k
    by_decision = getattr(analysis, "decision", None) is not None
    points = []
    for n in search.sizes:
        outcomes = _run(searched, scenarios.seed, f"{base.name} n={n}", base.with_group_sizes(n), base.replicates,
                        execution, pool, progress, batch)
        mine = [o.analyses[index] for o in outcomes]
        hits = [o.verdict == "met" for o in mine if o.verdict is not None] if by_decision else \
            [bool(o.rejected) for o in mine if o.failure is None and o.rejected is not None]
        power = share(sum(hits), len(hits))
        points.append({"size": n, "power": power, "failed": sum(o.failure is not None for o in mine)})
    reached = [p["size"] for p in points if p["power"]["rate"] is not None and p["power"]["rate"] >= search.power]
    surely = [p["size"] for p in points if p["power"]["interval"] is not None
              and p["power"]["interval"][0] >= search.power]
    return {"scenario": base.name, "analysis": analysis.id, "target": search.power, "replicates": base.replicates,
            "power_is": "the share of data sets whose verdict is met" if by_decision
            else "the share of data sets that reject the null at alpha",
            "rule": SEARCH_RULE, "points": points,
            "smallest_size": min(reached) if reached else None,
            "smallest_size_lower_bound": min(surely) if surely else None}


def write_simulation(root: Path, name: str, document: dict) -> Path:
    """simulation.json, simulation.html, simulation.md and its figures as a new folder (never
    over an existing one: trail/store.py)."""
    from planrunner.simulate.report import render_simulation
    from planrunner.trail.store import write_new_folder

    return write_new_folder(root, name, {"simulation.json": to_json(document), **render_simulation(document)})

