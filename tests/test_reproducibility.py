"""Numbers depend only on the seed and the analysis id: not on batch size, order, or other analyses."""

from __future__ import annotations

import numpy as np
from conftest import csv_of_groups, fixed_clock

from planrunner.pipeline.run import run_plan

# Source: E&T Table 2.1 (mouse survival, published, confirmed)
TREATMENT = [94, 197, 16, 38, 99, 141, 23]
CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]

ANALYSES = {
    "boot": """
  - id: boot
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: median_difference
    method: bootstrap
    resamples: 2500
""",
    "perm": """
  - id: perm
    role: secondary
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: permutation
    exact: never
    resamples: 2500
""",
    "extra": """
  - id: extra
    role: secondary
    data: mice
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: bootstrap
    resamples: 1500
""",
}
HEADER = """
plan: repro
title: Reproducibility check
seed: 424242
datasets:
  mice:
    file: mice.csv
    columns:
      group: {type: category}
      days: {type: number}
analyses:
"""


def run(write_plan, tmp_path, order, name):
    plan = write_plan(HEADER + "".join(ANALYSES[k] for k in order),
                      {"mice.csv": csv_of_groups("days", {"treatment": TREATMENT, "control": CONTROL})},
                      name=f"{name}.yaml")
    record = run_plan(plan, out=tmp_path / f"out-{name}", clock=fixed_clock).record
    return {a["id"]: a for a in record["analyses"]}


def comparable(entry):
    return {k: entry[k] for k in ("estimate", "standard_error", "bias", "intervals", "p_value",
                                  "distribution", "details")}


def test_order_and_added_analyses_change_nothing(write_plan, tmp_path):
    a = run(write_plan, tmp_path, ["boot", "perm"], "a")
    b = run(write_plan, tmp_path, ["perm", "extra", "boot"], "b")
    for key in ("boot", "perm"):
        assert comparable(a[key]) == comparable(b[key])


def test_memory_batch_size_changes_nothing(write_plan, tmp_path, monkeypatch):
    reference = run(write_plan, tmp_path, ["boot", "perm"], "ref")
    # the same jobs through the engines with a tiny memory batch (17 elements per batch)
    import planrunner.execute.executors as execute
    import planrunner.execute.permutation as permrun

    real_bootstrap, real_permutation = execute.bootstrap, permrun.permutation_test
    monkeypatch.setattr(execute, "bootstrap", lambda *a, **k: real_bootstrap(*a, batch_elements=17, **k))
    monkeypatch.setattr(permrun, "permutation_test", lambda *a, **k: real_permutation(*a, batch_elements=17, **k))
    small = run(write_plan, tmp_path, ["boot", "perm"], "small")
    for key in ("boot", "perm"):
        assert comparable(reference[key]) == comparable(small[key])


def test_different_seed_changes_numbers(write_plan, tmp_path):
    a = run(write_plan, tmp_path, ["boot"], "s1")
    plan = write_plan((HEADER + ANALYSES["boot"]).replace("seed: 424242", "seed: 424243"),
                      {"mice.csv": csv_of_groups("days", {"treatment": TREATMENT, "control": CONTROL})},
                      name="s2.yaml")
    b = {x["id"]: x for x in run_plan(plan, out=tmp_path / "out-s2", clock=fixed_clock).record["analyses"]}
    assert a["boot"]["estimate"] == b["boot"]["estimate"]
    assert a["boot"]["standard_error"] != b["boot"]["standard_error"]
    assert not np.isclose(a["boot"]["standard_error"], 0)
