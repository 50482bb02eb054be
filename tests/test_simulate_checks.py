"""Simulated operating characteristics against outside values (docs/VALIDATION.md: the simulation cases).

Each check runs the plan's own analyses on data sets drawn in the test (the runner of
planrunner/simulate/run.py, as `planrunner simulate` runs them) and compares the simulated share
with the outside value within 4 Monte Carlo standard deviations of a binomial share,
4·sqrt(π(1 − π)/R) with π the outside value and R the data sets (V-TOL). Replicates and resamples
are few so that the suite stays fast; the tolerances follow from them.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from planrunner.pipeline.check import load_plan
from planrunner.simulate.metrics import analysis_metrics, share
from planrunner.simulate.run import SimulationTask, alpha_of, run_scenario, used_datasets

PLAN = """\
plan: simulated-checks
title: Outside checks of simulated operating characteristics
seed: 20261203
datasets:
  trial:
    file: trial.csv
    columns:
      arm: {type: category, levels: [a, b]}
      y: {type: %s}
analyses:
  - id: test
    data: trial
    outcome: y
    %s
"""


class TwoGroups:
    """Data maker: n rows per arm, y drawn by `draw(rng, arm index, n)`."""

    def __init__(self, n: int, kind: str, first: float, second: float):
        self.n, self.kind, self.first, self.second = n, kind, first, second

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        n = self.n
        if self.kind == "normal":
            y = np.concatenate([rng.normal(self.first, 1.0, n), rng.normal(self.second, 1.0, n)])
        elif self.kind == "exponential":
            y = np.concatenate([rng.exponential(self.first, n), rng.exponential(self.second, n)])
        else:  # bernoulli
            y = np.concatenate([rng.random(n) < self.first, rng.random(n) < self.second])
        return {"trial": {"arm": np.array(["a"] * n + ["b"] * n, dtype=object), "y": y}}


class OneGroup:
    def __init__(self, n: int, mean: float):
        self.n, self.mean = n, mean

    def __call__(self, rng: np.random.Generator) -> dict[str, dict[str, np.ndarray]]:
        return {"trial": {"arm": np.array(["a"] * self.n, dtype=object), "y": rng.normal(self.mean, 2.0, self.n)}}


def simulate(tmp_path: Path, column: str, analysis: str, make, replicates: int):
    path = tmp_path / "plan.yaml"
    path.write_text(PLAN % (column, analysis), encoding="utf-8")
    plan = load_plan(path)[0].plan
    outcomes = run_scenario(SimulationTask(plan, 7, "check", make, used_datasets(plan)), replicates)
    return plan, [o.analyses[0] for o in outcomes]


def within_mc(simulated: float, expected: float, replicates: int) -> bool:
    return abs(simulated - expected) <= 4.0 * math.sqrt(expected * (1.0 - expected) / replicates)  # V-TOL


def test_power_of_a_permutation_test_matches_the_noncentral_t(tmp_path: Path):
    """V-SIM-POWER: normal data, n = 20 per group, effect d = 0.8, two-sided α = 0.05."""
    from statsmodels.stats.power import TTestIndPower

    expected = TTestIndPower().power(effect_size=0.8, nobs1=20, alpha=0.05, ratio=1.0)  # statsmodels reference
    replicates = 200
    plan, found = simulate(tmp_path, "number", "groups: {by: arm, compare: [a, b]}\n    statistic: mean_difference\n"
                           "    method: permutation\n    resamples: 199", TwoGroups(20, "normal", 0.8, 0.0), replicates)
    rate = sum(bool(o.rejected) for o in found) / replicates
    assert 0.6 < expected < 0.75
    assert within_mc(rate, expected, replicates), (rate, expected)


def test_type_i_error_of_a_permutation_test_is_alpha(tmp_path: Path):
    """V-SIM-LEVEL: under an exchangeable null (skewed data, equal groups) a Monte Carlo permutation test with
    (B + 1)·α whole rejects with probability exactly α (identity 3 of the permutation p-value)."""
    replicates = 400
    plan, found = simulate(tmp_path, "number", "groups: {by: arm, compare: [a, b]}\n    statistic: mean_difference\n"
                           "    method: permutation\n    resamples: 99", TwoGroups(12, "exponential", 3.0, 3.0),
                           replicates)
    alpha = alpha_of(plan.analyses[0], plan)
    rate = sum(bool(o.rejected) for o in found) / replicates
    assert alpha == 0.05
    assert within_mc(rate, alpha, replicates), rate


def test_coverage_of_the_percentile_interval_for_a_normal_mean(tmp_path: Path):
    """V-SIM-COVERAGE: percentile interval of a normal mean, n = 200, nominal 95%."""
    replicates = 200
    plan, found = simulate(tmp_path, "number", "statistic: mean\n    method: bootstrap\n    resamples: 399\n"
                           "    intervals: [percentile]", OneGroup(200, 10.0), replicates)
    metrics = analysis_metrics(found, list(range(replicates)), 0.05, {"value": 10.0, "formula": "mean"}, False)
    coverage = metrics["intervals"][0]["coverage"]
    assert coverage["of"] == replicates
    assert within_mc(coverage["rate"], 0.95, replicates), coverage


def fisher_power(n: int, first: float, second: float, alpha: float) -> float:
    """The exact power of the one-sided Fisher test: every table weighted by its binomial probability."""
    from scipy import stats

    power = 0.0
    for x in range(n + 1):
        for y in range(n + 1):
            p = stats.fisher_exact([[x, n - x], [y, n - y]], alternative="greater").pvalue  # scipy reference
            if p <= alpha:
                power += stats.binom.pmf(x, n, first) * stats.binom.pmf(y, n, second)
    return float(power)


def test_binomial_power_equals_the_exact_power_of_fisher_s_test(tmp_path: Path):
    """V-SIM-FISHER: the exact permutation test of a difference in proportions, one-sided, is Fisher's exact
    test (the difference grows with the first group's successes for fixed margins), so its simulated
    power is the enumerated power of scipy's fisher_exact over every 2 × 2 table."""
    expected = fisher_power(8, 0.8, 0.3, 0.05)
    replicates = 300
    plan, found = simulate(tmp_path, "boolean", "groups: {by: arm, compare: [a, b]}\n    statistic: mean_difference\n"
                           "    method: permutation\n    exact: always\n    alternative: greater",
                           TwoGroups(8, "bernoulli", 0.8, 0.3), replicates)
    rate = sum(bool(o.rejected) for o in found if o.failure is None) / replicates
    assert all(o.failure is None for o in found)
    assert 0.3 < expected < 0.8
    assert within_mc(rate, expected, replicates), (rate, expected)


@pytest.mark.parametrize(("count", "total"), [(0, 20), (7, 20), (20, 20), (51, 1000)])
def test_shares_carry_the_exact_clopper_pearson_interval(count: int, total: int):
    """V-SIM-CP: the Monte Carlo interval of a share is scipy's exact binomial interval."""
    from scipy import stats

    ci = stats.binomtest(count, total).proportion_ci(confidence_level=0.95, method="exact")  # scipy reference
    found = share(count, total)
    assert found["rate"] == count / total
    assert found["interval"] == pytest.approx([ci.low, ci.high], abs=1e-12)
