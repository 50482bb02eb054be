"""What the tool says about a run is what ran: the methods paragraph, labels and messages."""

from __future__ import annotations

import math

import numpy as np

from planrunner.pipeline.run import run_plan
from planrunner.record.methods import methods_text, readable_count

from conftest import fixed_clock

PLAN = """
plan: honest-text
title: Labels and sentences
seed: 7
datasets:
  d:
    file: data.csv
    columns:
      g: {{type: category}}
      y: {{type: number}}
analyses:
{analyses}
"""


def run(write_plan, tmp_path, groups: dict[str, list[float]], analyses: str) -> dict:
    csv = "\n".join(["g,y"] + [f"{g},{v:g}" for g, vs in groups.items() for v in vs]) + "\n"
    plan = write_plan(PLAN.format(analyses=analyses), {"data.csv": csv})
    return run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record


def test_readable_count_is_exact_at_any_size() -> None:
    assert readable_count(11440) == "11,440"  # identity 18: C(16, 7)
    assert readable_count(str(math.comb(230, 115))) == "9.07 × 10^67"  # math.comb(230, 115) = 9.068...e67
    assert readable_count(10**999) == "1.00 × 10^999"


def test_methods_paragraph_states_the_dynamic_programming_it_used(write_plan, tmp_path) -> None:
    rng = np.random.default_rng(3)
    groups = {"a": list(rng.integers(0, 20, 115)), "b": list(rng.integers(0, 20, 115))}
    record = run(write_plan, tmp_path, groups, """
  - id: big
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: permutation
    resamples: 999
""")
    entry = record["analyses"][0]
    assert entry["details"]["computation"] == "dynamic programming"
    text = methods_text(record)
    assert "dynamic programming" in text and "9.07 × 10^67 arrangements" in text  # math.comb(230, 115)
    assert "complete enumeration" not in text and "906" not in text  # no 68-digit number
