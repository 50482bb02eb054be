"""Sign-flip, cluster, association and residual-permutation (ter Braak within strata, Freedman–Lane
of whole clusters) draws go through the executors' resample ranges: serial,
threads, processes and dask give the same record, bit for bit."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from conftest import fixed_clock

from planrunner.execute.pool import Execution
from planrunner.pipeline.run import run_plan

DATA = Path(__file__).resolve().parents[1] / "plans" / "ward-hygiene" / "data"
# informational fields: when, who, how it ran; everything else must agree bit for bit
NOT_COMPARED = {"started_utc", "finished_utc", "execution", "record_sha256"}

# the ward-hygiene demo's designs, every test drawn at random (exact: never) so that every
# analysis is cut into ranges; fast paths and plain computations both appear
PLAN = """\
plan: ranges-of-every-permutation-design
title: Every permutation design on the executors
seed: 20261203
defaults: {resamples: 2500, confidence: 0.95, alternative: two-sided}
datasets:
  sessions:
    file: data/sessions.csv
    columns:
      ward: {type: text}
      arm: {type: category, levels: [dispenser, usual]}
      period: {type: category, levels: [before, after]}
      session: {type: text}
      compliance: {type: number}
    rows_where: "period == 'after'"
  wards:
    file: data/wards.csv
    columns:
      ward: {type: text}
      arm: {type: category, levels: [dispenser, usual]}
      period: {type: category, levels: [before, after]}
      compliance: {type: number}
      staff_per_bed: {type: number}
      beds: {type: integer}
  wards_after:
    file: data/wards.csv
    columns:
      ward: {type: text}
      arm: {type: category, levels: [dispenser, usual]}
      period: {type: category, levels: [before, after]}
      compliance: {type: number}
      staff_per_bed: {type: number}
      beds: {type: integer}
    rows_where: "period == 'after'"
analyses:
  - {id: clusters-mean, data: sessions, outcome: compliance, groups: {by: arm, compare: [dispenser, usual]},
     clusters: ward, statistic: mean_difference, method: permutation, exact: never}
  - {id: clusters-median, data: sessions, outcome: compliance, groups: {by: arm, compare: [dispenser, usual]},
     role: secondary, clusters: ward, statistic: median_difference, method: permutation, exact: never}
  - {id: pairs-signed-rank, data: wards, outcome: compliance, groups: {by: period, compare: [after, before]},
     role: secondary, pairs: ward, statistic: signed_rank, method: permutation, exact: never}
  - {id: pairs-median, data: wards, outcome: compliance, groups: {by: period, compare: [after, before]},
     role: secondary, pairs: ward, statistic: median_difference, method: permutation, exact: never}
  - {id: freedman-lane, data: wards_after, outcome: compliance, predictor: staff_per_bed,
     role: secondary, covariates: [beds], statistic: slope, method: permutation, exact: never}
  - {id: shuffled-outcome, data: wards_after, outcome: compliance, predictor: staff_per_bed, statistic: spearman,
     role: secondary, method: permutation, exact: never}
  - {id: ter-braak-strata, data: wards, outcome: compliance, groups: {by: arm, compare: [dispenser, usual]},
     role: secondary, strata: period, covariates: [beds], statistic: adjusted_mean_difference, method: permutation,
     covariate_permutation: ter-braak}
  - {id: freedman-lane-clusters, data: wards, outcome: compliance, groups: {by: arm, compare: [dispenser, usual]},
     role: secondary, clusters: ward, covariates: [staff_per_bed], statistic: adjusted_mean_difference,
     method: permutation, exact: never}
"""


@pytest.fixture
def plan(tmp_path: Path) -> Path:
    shutil.copytree(DATA, tmp_path / "data")
    (tmp_path / "plan.yaml").write_text(PLAN, encoding="utf-8")
    return tmp_path / "plan.yaml"


def _compare(reference: object, other: object, path: str = "") -> None:
    if isinstance(reference, dict):
        assert isinstance(other, dict) and reference.keys() == other.keys(), path
        for key in reference:
            if path == "" and key in NOT_COMPARED:
                continue
            _compare(reference[key], other[key], f"{path}.{key}")
    elif isinstance(reference, list):
        assert isinstance(other, list) and len(reference) == len(other), path
        for i, (a, b) in enumerate(zip(reference, other)):
            _compare(a, b, f"{path}[{i}]")
    else:
        assert reference == other, f"{path}: {reference!r} != {other!r}"


def test_permutation_designs_identical_serial_threads_processes_and_dask(plan: Path, tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    executions = [Execution(), Execution("threads", 2), Execution("processes", 2), Execution("dask", 2)]
    records = [run_plan(plan, out=tmp_path / f"out-{e.executor}", clock=fixed_clock, execution=e).record
               for e in executions]
    analyses = records[0]["analyses"]
    # every analysis drew its 2500 resamples (none enumerated), so every one was cut into ranges
    assert [a["exact"] for a in analyses] == [False] * 8 and {a["resamples"] for a in analyses} == {2500}
    assert [a["details"]["computation"] for a in analyses] == ["Monte Carlo"] * 8
    for other, execution in zip(records[1:], executions[1:]):
        assert other["execution"]["executor"] == execution.executor
        _compare(records[0], other)
