"""The scenarios file of `planrunner simulate`: reading, checks against the plan, changes, sizes."""

from __future__ import annotations

import re
import textwrap
from pathlib import Path

import pytest

from planrunner.errors import PlanError
from planrunner.plan.load import read_plan
from planrunner.simulate.scenarios import load_scenarios

ROOT = Path(__file__).resolve().parent.parent
PLAN = textwrap.dedent("""\
    plan: sim-check
    title: Simulation checks
    seed: 1
    datasets:
      trial:
        file: trial.csv
        columns:
          unit: {type: text}
          arm: {type: category, levels: [control, active]}
          site: {type: category, levels: [a, b, c]}
          centre: {type: text}
          pair: {type: integer}
          score: {type: number}
          level: {type: number, min: 0}
          hits: {type: integer, min: 0}
          flag: {type: boolean}
          time: {type: number, min: 0}
          seen: {type: boolean}
          when: {type: date}
    analyses:
      - {id: primary, data: trial, outcome: score, groups: {by: arm, compare: [active, control]},
         statistic: mean_difference, method: permutation}
      - {id: flags, role: secondary, data: trial, outcome: flag, groups: {by: arm, compare: [active, control]},
         statistic: mean_difference, method: permutation}
    """)
GOOD = textwrap.dedent("""\
    scenarios_for: sim-check
    title: Checks
    seed: 7
    datasets:
      trial:
        rows:
          groups: {column: arm, sizes: {control: 30, active: 30}}
          strata: {column: site, shares: {a: 0.5, b: 0.25, c: 0.25}}
        columns:
          score: {model: {family: normal, mean: 10, sd: 2}, by_group: {active: {mean: 11}}}
          flag: {model: {family: bernoulli, p: 0.3}}
    scenarios:
      - name: no-difference
        replicates: 200
        change: {trial.columns.score.by_group.active.mean: 10}
      - name: shift
        replicates: 200
    """)


@pytest.fixture()
def plan(tmp_path):
    path = tmp_path / "plan.yaml"
    path.write_text(PLAN, encoding="utf-8")
    return read_plan(path).plan


def _load(tmp_path, plan, text):
    path = tmp_path / "scenarios.yaml"
    path.write_text(text, encoding="utf-8")
    return load_scenarios(path, plan)


def _problems(tmp_path, plan, text) -> list[str]:
    with pytest.raises(PlanError) as info:
        _load(tmp_path, plan, text)
    return info.value.problems


def test_a_good_file_reads_with_each_scenarios_changes_applied(tmp_path, plan):
    file = _load(tmp_path, plan, GOOD)
    assert (file.plan_id, file.seed, [s.name for s in file.scenarios]) == ("sim-check", 7, ["no-difference", "shift"])
    null, shift = file.scenarios
    assert null.datasets["trial"].columns["score"].by_group == {"active": {"mean": 10}}
    assert shift.datasets["trial"].columns["score"].by_group == {"active": {"mean": 11}}
    assert null.replicates == 200 and len(file.sha256) == 64


def test_with_group_sizes_sets_every_group(tmp_path, plan):
    scenario = _load(tmp_path, plan, GOOD).scenarios[1].with_group_sizes(45)
    assert scenario.datasets["trial"].rows.groups.sizes == {"control": 45, "active": 45}
    assert scenario.datasets["trial"].columns["score"].by_group == {"active": {"mean": 11}}


def test_every_problem_is_located_and_reported_at_once(tmp_path, plan):
    bad = GOOD.replace("scenarios_for: sim-check", "scenarios_for: sim-chek") \
              .replace("sizes: {control: 30, active: 30}", "sizes: {control: 30, activ: 30}") \
              .replace("sd: 2}", "sd: -2}") \
              .replace("p: 0.3}", "p: 1.3}") \
              .replace("trial.columns.score.by_group.active.mean", "trial.columns.scor.by_group.active.mean")
    problems = _problems(tmp_path, plan, bad)
    text = "\n".join(problems)
    assert re.search(r"scenarios\.yaml:1:16: scenarios_for: this file was written for plan 'sim-chek'", text)
    assert re.search(r":7:50: datasets\.trial\.rows\.groups\.sizes\.activ: 'activ' is not a declared level of "
                     r"'arm' \(did you mean 'active'\?\)", text)
    assert re.search(r":10:53: datasets\.trial\.columns\.score\.model\.sd: sd must be more than 0", text)
    assert re.search(r":11:44: datasets\.trial\.columns\.flag\.model\.p: p is a probability", text)
    assert re.search(r":15:14: .*the change names 'scor', .*did you mean 'score'", text)
    assert len(problems) == 5, text
