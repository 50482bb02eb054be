"""The simulation runner: tables from generated columns (the readers' own derive, rows_where and
sets steps), failures kept with their message, and the same numbers on every executor."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from planrunner.data.columns import table_from_columns
from planrunner.errors import DataError
from planrunner.execute.pool import Execution
from planrunner.pipeline.check import load_plan
from planrunner.simulate.metrics import analysis_metrics
from planrunner.simulate.run import SimulationTask, WorkerPool, chunks, run_scenario, used_datasets

PLAN = """\
plan: runner-checks
title: Simulation runner checks
seed: 11
defaults: {resamples: 199}
datasets:
  trial:
    file: trial.csv
    columns:
      arm: {type: category, levels: [a, b]}
      site: {type: category, levels: [s1, s2]}
      y: {type: number, min: 0}
      z: {type: number}
    derive:
      log_y: {expression: "log(y)", type: number}
    rows_where: "y < 50"
    sets:
      small: "log_y < 3"
analyses:
  - {id: boot, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, statistic: median_difference,
     method: bootstrap, intervals: [percentile, bca], role: primary, decision: {rule: below-limit, limit: 0}}
  - {id: perm, data: trial, outcome: y, groups: {by: arm, compare: [a, b]}, strata: site, role: secondary,
     statistic: mean_difference, method: permutation}
  - {id: perm-z, data: trial, outcome: z, groups: {by: arm, compare: [a, b]}, strata: site, role: secondary,
     statistic: mean_difference, method: permutation}
  - {id: jack, data: trial, outcome: log_y, groups: {by: arm, compare: [a, b]}, set: small, role: secondary,
     statistic: mean_difference, method: jackknife}
multiplicity:
  - {family: [perm, perm-z], method: max-t}
"""


class Shipments:
    def __init__(self, n: int, shift: float = 0.0, empty: bool = False):
        self.n, self.shift, self.empty = n, shift, empty

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        n = self.n
        arm = np.array(["a"] * n + ["b"] * n, dtype=object)
        if self.empty:
            arm[:] = "b"
        y = np.exp(rng.normal(2.0, 0.8, 2 * n))
        y[:n] *= np.exp(self.shift)
        return {"trial": {"arm": arm, "site": np.array(["s1", "s2"], dtype=object)[rng.integers(0, 2, 2 * n)],
                          "y": y, "z": rng.normal(0.0, 1.0, 2 * n)}}


@pytest.fixture
def plan(tmp_path: Path):
    path = tmp_path / "plan.yaml"
    path.write_text(PLAN, encoding="utf-8")
    return load_plan(path)[0].plan


def test_a_table_from_columns_passes_through_derive_rows_where_and_sets(plan):
    spec = plan.datasets["trial"]
    y = np.array([1.0, 60.0, np.e ** 3.5, 2.0])
    table = table_from_columns("trial", spec, {"arm": np.array(["a", "b", "a", "b"], dtype=object),
                                               "site": np.array(["s1"] * 4, dtype=object), "y": y,
                                               "z": np.zeros(4)}, source="simulated trial")
    assert table.rows_read == 4 and table.rows_used == 3  # the row of 60 is filtered by rows_where
    assert table.excluded[0].reason == "rows_where: y < 50" and table.excluded[0].lines == (3,)
    assert np.allclose(table.columns["log_y"], np.log([1.0, np.e ** 3.5, 2.0]))
    assert table.sets[0].name == "small" and table.sets[0].rows.tolist() == [True, False, True]


def test_a_column_outside_its_declaration_is_refused_with_its_rows(plan):
    spec = plan.datasets["trial"]
    with pytest.raises(DataError) as caught:
        table_from_columns("trial", spec, {"arm": np.array(["a", "c"], dtype=object),
                                           "site": np.array(["s1", "s1"], dtype=object),
                                           "y": np.array([1.0, -2.0]), "z": np.zeros(2)}, source="simulated trial")
    text = str(caught.value)
    assert "column 'arm'" in text and "'c' on line(s) 3" in text
    assert "column 'y'" in text and "'-2.0' on line(s) 3" in text


def test_a_data_set_an_analysis_cannot_use_is_counted_with_its_message(plan):
    task = SimulationTask(plan, 3, "empty", Shipments(6, empty=True), used_datasets(plan))
    outcomes = run_scenario(task, 2)
    first = [o.analyses[0] for o in outcomes]
    metrics = analysis_metrics(first, [0, 1], 0.05, {"value": None, "reason": "none"}, False)
    assert metrics["failed"]["count"] == 2 and metrics["ran"] == 0
    reason = metrics["failed"]["reasons"][0]
    assert reason["datasets"] == 2 and reason["first"] == [0, 1]
    assert "simulated trial (empty)" in reason["message"] and "'a'" in reason["message"]


def test_chunks_cover_every_data_set_once():
    for total, workers in [(1, 1), (7, 2), (1000, 2), (1001, 8)]:
        ranges = chunks(total, workers)
        assert [i for a, b in ranges for i in range(a, b)] == list(range(total))


def test_every_executor_gives_the_same_outcomes(plan):
    task = SimulationTask(plan, 5, "foam", Shipments(10, shift=-0.5), used_datasets(plan))
    serial = run_scenario(task, 5)
    assert all(a.failure is None for o in serial for a in o.analyses)
    assert serial[0].analyses[1].adjusted_p_value is not None  # the max-t family ran
    for execution in (Execution("threads", 2), Execution("processes", 2),
                      Execution("dask", 2, local_processes=False)):
        with WorkerPool(execution) as pool:
            assert run_scenario(task, 5, execution=execution, pool=pool) == serial, execution.executor


def test_data_sets_differ_and_repeat(plan):
    task = SimulationTask(plan, 5, "foam", Shipments(10), used_datasets(plan))
    first, again = run_scenario(task, 3), run_scenario(task, 3)
    assert first == again
    estimates = [o.analyses[1].estimate for o in first]
    assert len(set(estimates)) == 3


class AlignedOnly(Shipments):
    """Shipments that refuse to draw unless the array they carry is aligned where they run."""

    def __init__(self, n: int, carried: np.ndarray):
        super().__init__(n)
        self.carried = carried

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        if not self.carried.flags.aligned:
            raise DataError(f"the task's array arrived unaligned (address mod 8 = {self.carried.ctypes.data % 8})")
        return super().__call__(rng)


def test_a_simulation_task_reaches_a_dask_worker_as_pickled_bytes(plan):
    """The dask path sends the task as pickled bytes, unpickled once per worker (execute/rangework), so
    an array it carries gets an aligned buffer of its own, whatever the framework did to the message;
    the same task run in place keeps its unaligned array and fails."""
    unaligned = np.frombuffer(bytearray(8 * 11), dtype=np.float64, count=10, offset=3)
    assert not unaligned.flags.aligned
    task = SimulationTask(plan, 5, "foam", AlignedOnly(10, unaligned), used_datasets(plan))
    assert "unaligned" in (run_scenario(task, 1)[0].analyses[0].failure or "")
    execution = Execution("dask", 1, local_processes=False)
    with WorkerPool(execution) as pool:
        outcomes = run_scenario(task, 2, execution=execution, pool=pool)
    assert [a.failure for o in outcomes for a in o.analyses] == [None] * 2 * len(plan.analyses)
