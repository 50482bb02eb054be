"""Batched engines (engines/batched.py, simulate/batching.py): many simulated data sets share engine
passes, each from its own stream, and every number is bit-identical to the one-at-a-time path
(compared with == and np.array_equal, never with a tolerance), on every executor and batch size;
a pass holds at most its budget of draws."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
from conftest import fixed_clock

from planrunner.engines import batched, permutation, schemes
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.statistics import STATISTICS, bind, get_statistic
from planrunner.engines.streams import Stream
from planrunner.execute.pool import Execution
from planrunner.pipeline.check import load_plan
from planrunner.simulate import batching, run
from planrunner.simulate.run import SimulationTask, WorkerPool, run_scenario, used_datasets
from planrunner.simulate.simulation import simulate_plan

STREAMS = [Stream(20261203, (7, d)) for d in range(7)]


def _two_groups(rng: np.random.Generator, n1: int, n2: int, binary: bool) -> tuple[np.ndarray, np.ndarray]:
    if binary:
        return rng.integers(0, 2, n1).astype(float), rng.integers(0, 2, n2).astype(float)
    return rng.normal(0.3, 1.0, n1), rng.normal(0.0, 1.0, n2)


@pytest.mark.parametrize("count", [1, 2, 7])
@pytest.mark.parametrize("n1,n2,strata,binary", [(100, 100, False, False), (9, 13, False, False),
                                                 (20, 20, True, False), (30, 25, False, True)])
def test_batched_label_shuffle_nulls_are_each_data_sets_own(count, n1, n2, strata, binary):
    """Row d of the batched null is permutation._random_range of data set d, bit for bit, for any
    pass size (one row a pass to all rows in one pass)."""
    rng = np.random.default_rng(count * 1000 + n1)
    statistic = get_statistic("risk_difference" if binary else "mean_difference")
    data = [_two_groups(rng, n1, n2, binary) for _ in range(count)]
    codes = (np.arange(n1) % 3, np.arange(n2) % 3) if strata else None  # the same strata in every data set
    options = PermutationOptions(resamples=1234, alternative="two-sided", exact="never")
    laid = [permutation.monte_carlo_mean_difference(d, statistic, options, codes) for d in data]
    assert all(found is not None for found in laid)
    values = np.stack([found[0] for found in laid])  # type: ignore[index]
    blocks = laid[0][1]  # type: ignore[index]
    resamples = options.resamples  # crosses a draw block
    own = [permutation._random_range(permutation._pool(d, codes), statistic, STREAMS[k], 10 ** 9, True, 0, resamples)
           for k, d in enumerate(data)]
    for budget in (batched.BATCH_ELEMENTS, 7 * (n1 + n2) + 1):  # all in one pass; 7 rows a pass
        nulls = batched.mean_difference_nulls(values, blocks, STREAMS[:count], resamples, batch_elements=budget)
        assert all(np.array_equal(nulls[k], own[k]) for k in range(count)), budget


@pytest.mark.parametrize("count", [1, 2, 7])
@pytest.mark.parametrize("name,groups,strata", [("mean_difference", 2, False), ("mean", 1, False),
                                                ("sd", 1, True), ("risk_ratio", 2, False),
                                                ("trimmed_mean", 1, False)])
def test_batched_cells_bootstrap_replicates_are_each_data_sets_own(count, name, groups, strata):
    """Row d of the batched replicates is schemes.cells_range of data set d, bit for bit (numpy's
    pairwise sums of one row are the same in a pass of one data set and of seven)."""
    rng = np.random.default_rng(count + len(name))
    statistic = get_statistic(name)
    if statistic.parameter is not None:
        statistic = bind(statistic, 0.1)  # registered unbound: a trimming proportion of 0.1
    sizes = (40, 35)[:groups]
    make = (lambda n: rng.integers(1, 4, n).astype(float)) if name == "risk_ratio" else (lambda n: rng.normal(size=n))
    data = [tuple(make(n) for n in sizes) for _ in range(count)]
    codes = tuple(np.arange(n) % 2 for n in sizes) if strata else None
    lays = [schemes.layout(d, codes) for d in data]
    stacked = [np.stack([lay.groups[g] for lay in lays]) for g in range(groups)]
    resamples = 1100
    own = [schemes.cells_range(lay, statistic, STREAMS[k], batched.BATCH_ELEMENTS, None, 0, 0, resamples)
           for k, lay in enumerate(lays)]
    for budget in (batched.BATCH_ELEMENTS, 7 * sum(sizes) + 3):
        replicates = batched.cells_replicates(stacked, lays[0], statistic, STREAMS[:count], resamples,
                                              batch_elements=budget)
        assert all(np.array_equal(replicates[k], own[k]) for k in range(count)), budget


def _batched_statistics() -> list[str]:
    """Every registered statistic the cells bootstrap batches (one column, no fast path, no model)."""
    out = []
    for name, statistic in STATISTICS.items():
        if statistic.parameter is not None:
            statistic = bind(statistic, 0.25)
        if (statistic.columns == 1 and statistic.samples in (1, 2) and statistic.form != "model"
                and not schemes.fast_path_applies(statistic, None)):
            out.append(name)
    return out


def test_every_batched_bootstrap_statistic_reduces_each_row_alone():
    """Every statistic the batch carries gives each data set's own replicates, bit for bit, in passes
    that split data sets and resamples anywhere (0/1 data, so that proportions, risks and odds apply)."""
    names = _batched_statistics()
    assert {"mean", "mean_difference", "proportion", "sd", "risk_difference", "odds_ratio",
            "hodges_lehmann", "t_welch"} <= set(names)
    rng = np.random.default_rng(21)
    for name in names:
        statistic = STATISTICS[name] if STATISTICS[name].parameter is None else bind(STATISTICS[name], 0.25)
        sizes = (14, 14)[:statistic.samples]  # equal: signed_rank pairs them
        data = [tuple(rng.integers(0, 2, n).astype(float) for n in sizes) for _ in range(3)]
        lays = [schemes.layout(d, None) for d in data]
        stacked = [np.stack([lay.groups[g] for lay in lays]) for g in range(len(sizes))]
        replicates = batched.cells_replicates(stacked, lays[0], statistic, STREAMS[:3], 60,
                                              batch_elements=7 * sum(sizes))
        for k, lay in enumerate(lays):
            own = schemes.cells_range(lay, statistic, STREAMS[k], batched.BATCH_ELEMENTS, None, 0, 0, 60)
            assert np.array_equal(replicates[k], own, equal_nan=True), name


def test_passes_cover_every_resample_once_in_order():
    for datasets, resamples, rows in [(1, 999, 512), (7, 999, 512), (50, 99, 1000), (3, 10, 1), (4, 5, 7)]:
        passes = list(batched.pass_segments(datasets, resamples, rows))
        assert all(sum(stop - start for _, start, stop in pieces) <= rows for pieces in passes)
        flat = [(d, r) for pieces in passes for d, start, stop in pieces for r in range(start, stop)]
        assert flat == [(d, r) for d in range(datasets) for r in range(resamples)]


def test_a_pass_never_holds_more_draws_than_its_budget(monkeypatch):
    """data sets × resamples × n are never held at once: every pass's uniform rows fit the budget."""
    seen: list[tuple[int, int]] = []
    original = batched._read_pass

    def spy(readers, pieces, buffer):
        seen.append(buffer.shape)
        return original(readers, pieces, buffer)

    monkeypatch.setattr(batched, "_read_pass", spy)
    rng = np.random.default_rng(3)
    data = [(rng.normal(size=50), rng.normal(size=50)) for _ in range(7)]
    statistic = get_statistic("mean_difference")
    options = PermutationOptions(resamples=999, alternative="two-sided")
    values = np.stack([permutation.monte_carlo_mean_difference(d, statistic, options)[0]  # type: ignore[index]
                       for d in data])
    lays = [schemes.layout(d, None) for d in data]
    stacked = [np.stack([lay.groups[g] for lay in lays]) for g in range(2)]
    budget = 5_000  # 50 rows of 100 draws
    blocks = permutation._pool(data[0], None).blocks
    batched.mean_difference_nulls(values, blocks, STREAMS, 999, batch_elements=budget)
    batched.cells_replicates(stacked, lays[0], statistic, STREAMS, 999, batch_elements=budget)
    assert len(seen) > 2 * 7 * 999 // 50 - 2  # many passes, each within the budget
    assert max(rows * width for rows, width in seen) <= budget


PLAN = """\
plan: batched-simulation
title: Batched and one-at-a-time simulation
seed: 31
defaults: {resamples: 199}
datasets:
  trial:
    file: trial.csv
    columns:
      arm: {type: category, levels: [a, b]}
      site: {type: category, levels: [s1, s2]}
      y: {type: number}
      hit: {type: boolean}
analyses:
  - {id: perm, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, role: primary,
     statistic: mean_difference, method: permutation, alternative: greater, decision: {rule: superiority}}
  - {id: perm-strata, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, strata: site, role: secondary,
     statistic: mean_difference, method: permutation, resamples: 1001}
  - {id: perm-hit, data: trial, outcome: hit, groups: {by: arm, compare: [a, b]}, role: secondary,
     statistic: risk_difference, method: permutation, exact: never}
  - {id: perm-median, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, role: secondary,
     statistic: median_difference, method: permutation}
  - {id: boot, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, role: secondary,
     statistic: mean_difference, method: bootstrap, intervals: [percentile, bca]}
  - {id: boot-strata, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, strata: site, role: secondary,
     statistic: mean_difference, method: bootstrap, intervals: [percentile]}
  - {id: boot-t, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, role: secondary,
     statistic: mean_difference, method: bootstrap, intervals: [studentized]}
multiplicity:
  - {family: [perm, perm-strata], method: holm}
"""


class Trial:
    def __init__(self, n: int):
        self.n = n

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        n = self.n
        arm = np.array(["a"] * n + ["b"] * n, dtype=object)
        site = np.array(["s1", "s2"], dtype=object)[np.arange(2 * n) % 2]  # the same strata: one shape
        return {"trial": {"arm": arm, "site": site, "y": rng.normal(0.0, 1.0, 2 * n) + 0.4 * (arm == "a"),
                          "hit": rng.random(2 * n) < 0.4}}


@pytest.fixture
def task(tmp_path: Path) -> SimulationTask:
    path = tmp_path / "plan.yaml"
    path.write_text(PLAN, encoding="utf-8")
    plan = load_plan(path)[0].plan
    return SimulationTask(plan, 8, "shift", Trial(12), used_datasets(plan), batch=0)


def test_every_batch_size_gives_the_one_at_a_time_outcomes(task, monkeypatch):
    answered: list[str] = []
    original = batching._answers

    def counting(shape, member, range_task, total):
        found = original(shape, member, range_task, total)
        if found:
            answered.append(member.job.analysis_id)
        return found

    monkeypatch.setattr(batching, "_answers", counting)
    alone = run_scenario(task, 9)
    assert not answered  # batch 0: today's path, no batch at all
    assert all(a.failure is None for o in alone for a in o.analyses)
    for size in (1, 2, 7, None):
        answered.clear()
        assert run_scenario(dataclasses.replace(task, batch=size), 9) == alone, size
        # every data set's batchable tests were answered from a batch; the rest ran as before
        assert sorted(set(answered)) == ["boot", "boot-strata", "perm", "perm-hit", "perm-strata"]
        assert len(answered) == 5 * 9


def test_batched_outcomes_are_the_same_on_threads_and_processes(task, monkeypatch):
    alone = run_scenario(task, 7)
    batched_task = dataclasses.replace(task, batch=3)
    answered: list[bool] = []
    original = batching._answers
    monkeypatch.setattr(batching, "_answers", lambda *args: answered.append(original(*args)) or answered[-1])
    for execution in (Execution("threads", 2), Execution("processes", 2)):
        with WorkerPool(execution) as pool:
            assert run_scenario(batched_task, 7, execution=execution, pool=pool) == alone, execution.executor
    # on threads each thread's engines were answered by its own batches (worker processes count apart)
    assert answered == [True] * 5 * 7


def test_a_batch_closes_before_what_it_holds_exceeds_the_budget(task, monkeypatch):
    held = run.held_elements(run.compile_dataset(task, 0))
    assert held == 199 * 6 + 1001 + 7 * 24  # the jobs' resamples and observations (12 rows per arm)
    monkeypatch.setattr(run, "BATCH_ELEMENTS", 3 * held)
    sizes = [len(batch) for batch in run.batches(dataclasses.replace(task, batch=None), 0, 8)]
    assert sizes == [3, 3, 2]
    monkeypatch.setattr(run, "BATCH_ELEMENTS", 1)
    assert [len(b) for b in run.batches(dataclasses.replace(task, batch=None), 0, 3)] == [1, 1, 1]


SCENARIOS = """\
scenarios_for: batched-simulation
title: Batched scenarios
seed: 17
datasets:
  trial:
    rows:
      groups: {column: arm, sizes: {a: 10, b: 10}}
      strata: {column: site, shares: {s1: 0.5, s2: 0.5}}
    columns:
      y: {model: {family: normal, mean: 0, sd: 1}, by_group: {a: {mean: 0.5}}}
      hit: {model: {family: bernoulli, p: 0.4}}
scenarios:
  - name: shifted
    replicates: 5
"""


def test_simulation_json_is_the_same_with_and_without_batches(tmp_path):
    plan, scenarios = tmp_path / "plan.yaml", tmp_path / "scenarios.yaml"
    plan.write_text(PLAN, encoding="utf-8")
    scenarios.write_text(SCENARIOS, encoding="utf-8")
    documents = [simulate_plan(plan, scenarios, out=tmp_path / f"batch-{size}", clock=fixed_clock,
                               batch=size).document for size in (0, 2, None)]
    assert documents[1] == documents[0] and documents[2] == documents[0]  # hash and all


def test_the_memory_check_leaves_room_for_what_a_batch_holds(task):
    """A scenario that fits one data set at a time is refused when its batch's 16 MB would not fit."""
    from planrunner.compile.limits import LIMIT_SHARE, estimate_run_bytes
    from planrunner.errors import DataError

    need = estimate_run_bytes(run.compile_jobs(task.plan, run.simulated_tables(task, 0)))
    available = int(need / LIMIT_SHARE) + 1024
    run.check_memory(task, 1, available)  # batch 0: one data set at a time fits
    with pytest.raises(DataError, match="memory"):
        run.check_memory(dataclasses.replace(task, batch=None), 1, available)
    run.check_memory(dataclasses.replace(task, batch=None), 1, available + 8 * batched.BATCH_ELEMENTS)


def test_simulate_runs_threads_one_data_set_at_a_time(tmp_path, monkeypatch):
    """Batches measured slower on threads (README: Simulation speed): there the default is batch 0."""
    plan, scenarios = tmp_path / "plan.yaml", tmp_path / "scenarios.yaml"
    plan.write_text(PLAN, encoding="utf-8")
    scenarios.write_text(SCENARIOS, encoding="utf-8")
    made: list[int | None] = []
    original = run.run_scenario

    def spy(task, *args, **kwargs):
        made.append(task.batch)
        return original(task, *args, **kwargs)

    monkeypatch.setattr("planrunner.simulate.simulation.run_scenario", spy)
    simulate_plan(plan, scenarios, out=tmp_path / "threads", execution=Execution("threads", 2), clock=fixed_clock)
    simulate_plan(plan, scenarios, out=tmp_path / "serial", clock=fixed_clock)
    assert made == [0, None]
