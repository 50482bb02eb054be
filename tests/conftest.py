"""Shared helpers: write a plan and its data into a temporary folder and run it."""

from __future__ import annotations

import datetime as dt
import os
import textwrap
from pathlib import Path

import pytest
from hypothesis import settings

# The property tests draw the same examples on every run, so that the suite that gates a landing
# cannot pass on one machine and fail on another by the luck of the draw; set
# PLANRUNNER_HYPOTHESIS=explore to search new examples (and add any failure found as an @example).
settings.register_profile("planrunner-fixed", derandomize=True, database=None)
settings.register_profile("planrunner-explore")
settings.load_profile("planrunner-explore" if os.environ.get("PLANRUNNER_HYPOTHESIS") == "explore"
                      else "planrunner-fixed")

FIXED_TIME = dt.datetime(2026, 12, 1, 9, 30, tzinfo=dt.UTC)


def fixed_clock() -> dt.datetime:
    return FIXED_TIME


@pytest.fixture
def write_plan(tmp_path: Path):
    """write_plan(plan_text, {"data.csv": csv_text}) -> path of plan.yaml in a fresh folder."""
    def write(plan_text: str, files: dict[str, str] | None = None, name: str = "plan.yaml") -> Path:
        for filename, text in (files or {}).items():
            target = tmp_path / filename
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
        plan = tmp_path / name
        plan.write_text(textwrap.dedent(plan_text).lstrip(), encoding="utf-8")
        return plan
    return write


def two_group_plan(method: str, resamples: int, rows: str = "a,1\na,2\na,4\na,7\nb,3\nb,5\nb,6\nb,9\n",
                   seed: int = 1) -> tuple[str, dict[str, str]]:
    """A plan of one analysis, the mean difference of y between groups a and b of d.csv (invented
    rows "g,y" lines), and its data: write_plan(*two_group_plan("permutation", 199))."""
    plan = f"""
        plan: two-groups
        title: Two groups
        seed: {seed}
        datasets:
          d: {{file: d.csv, columns: {{g: {{type: category, levels: [a, b]}}, y: {{type: number}}}}}}
        analyses:
          - id: diff
            data: d
            outcome: y
            groups: {{by: g, compare: [a, b]}}
            statistic: mean_difference
            method: {method}
            resamples: {resamples}
        """
    return plan, {"d.csv": "g,y\n" + rows}


def csv_of_groups(column: str, groups: dict[str, list[float]]) -> str:
    """A two-column CSV: group,<column>."""
    lines = [f"group,{column}"] + [f"{g},{v}" for g, values in groups.items() for v in values]
    return "\n".join(lines) + "\n"
