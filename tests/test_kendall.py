"""Kendall's tau-b by Knight's counting: equal to scipy and to the pairwise definition, fast at large n."""

from __future__ import annotations

import time

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.engines import teststats
from planrunner.engines.statistics import get_statistic
from planrunner.pipeline.run import run_plan

KENDALL = get_statistic("kendall")


@pytest.mark.parametrize("n", [2, 3, 8, 31, 64, 65, 200])
def test_tau_b_equals_scipy_on_random_data_with_ties(n: int) -> None:
    rng = np.random.default_rng(n)
    for levels in (2, 5, 1000):
        x = rng.integers(0, levels, n).astype(float)
        y = rng.integers(0, 4, n).astype(float) + 0.5 * x
        if np.ptp(x) == 0 or np.ptp(y) == 0:
            continue
        got = KENDALL.compute(np.stack([x, y]))
        assert got == pytest.approx(stats.kendalltau(x, y).statistic, abs=1e-13)  # scipy reference (tau-b)


def test_counting_equals_the_pairwise_definition_bit_for_bit_in_batches() -> None:
    rng = np.random.default_rng(11)
    xy = rng.integers(0, 6, size=(5, 4, 2, 37)).astype(float)
    xy[0, 0, 0] = 3.0  # a constant column: 0/0, nan in both
    counted, pairwise = teststats._kendall(xy), teststats._kendall_pairs(xy)
    assert np.array_equal(counted, pairwise, equal_nan=True)
    assert np.isnan(counted[0, 0])


def test_association_test_with_kendall_at_n_in_the_thousands(write_plan, tmp_path) -> None:
    rng = np.random.default_rng(2)
    n = 1500
    x = rng.integers(0, 40, n)
    y = x + rng.integers(0, 60, n)
    csv = "x,y\n" + "".join(f"{a},{b}\n" for a, b in zip(x, y))
    plan = write_plan("""
plan: kendall-large
title: Kendall at n = 1500
seed: 5
datasets:
  d:
    file: data.csv
    columns:
      x: {type: number}
      y: {type: number}
analyses:
  - id: tau
    data: d
    outcome: y
    predictor: x
    statistic: kendall
    method: permutation
    resamples: 199
""", {"data.csv": csv})
    started = time.perf_counter()
    entry = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record["analyses"][0]
    assert time.perf_counter() - started < 30  # the pairwise O(n²) form needed about 1.1 million pairs per arrangement
    assert entry["estimate"] == pytest.approx(stats.kendalltau(x, y).statistic, abs=1e-13)  # scipy reference
    assert entry["p_value"] == pytest.approx(2 / 200)  # identity 13, doubled: no shuffle reaches a strong tau
