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
          tries: {type: integer, min: 0, max: 10}
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


def test_effects_per_level_of_strata_read(tmp_path, plan):
    text = GOOD.replace("mean: 11}}}", "mean: 11}}, covariates: {site: {b: 1.5}, arm: {active: 0.5}}}")
    score = _load(tmp_path, plan, text).scenarios[1].datasets["trial"].columns["score"]
    assert score.covariates == {"site": {"b": 1.5}, "arm": {"active": 0.5}}


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


FULL = textwrap.dedent("""\
    scenarios_for: sim-check
    title: Checks
    seed: 7
    datasets:
      trial:
        rows:
          groups: {column: arm, sizes: {control: 30, active: 30}}
          clusters: {column: centre, count: 5, icc: 0.1}
        columns:
          score: {model: {family: normal, mean: 10, sd: 2}, by_group: {active: {mean: 11}}}
          flag: {model: {family: bernoulli, p: 0.3}}
          level: {model: {family: lognormal, meanlog: 1, sdlog: 0.5}, covariates: {score: 0.1}}
          hits: {model: {family: poisson, mean: 2}}
          time:
            model: {family: weibull, shape: 1.2, scale: 100}
            icc: 0
            censoring: {family: uniform, low: 10, high: 300}
            event: seen
    scenarios:
      - name: no-difference
        replicates: 200
        change: {trial.columns.score.by_group.active.mean: 10}
      - name: shift
        replicates: 200
    search: {scenario: shift, analysis: primary, power: 0.8, sizes: [20, 40]}
    """)
PAIRS = GOOD.replace("      strata: {column: site, shares: {a: 0.5, b: 0.25, c: 0.25}}\n",
                     "      pairs: {column: pair, correlation: 0.5}\n")

# (base, text replaced, its replacement, text on the line the message points at, expected message part)
CASES = [
    (FULL, "title: Checks", "title: &t Checks", "title:", "YAML anchors (&...) are not allowed"),
    (FULL, "seed: 7\n", "seed: 7\nseed: 8\n", "seed: 8", "duplicate key 'seed'"),
    (FULL, "mean: 10, sd: 2", "meen: 10, sd: 2", "meen", "unknown key 'meen' (did you mean 'mean'?)"),
    (FULL, "family: normal", "family: normall", "normall", "'normall' is not allowed; one of: normal"),
    (FULL, "{family: poisson, mean: 2}", "{family: poisson}", "poisson", "a poisson model needs mean"),
    (FULL, "{family: poisson, mean: 2}", "{family: poisson, mean: 2, sd: 1}", "poisson",
     "a poisson model takes no sd"),
    (FULL, "by_group: {active:", "by_group: {activ:", "by_group: {activ",
     "'activ' is not a group of rows.groups (did you mean 'active'?)"),
    (FULL, "{active: {mean: 11}}", "{active: {meen: 11}}", "meen", "takes no meen (did you mean 'mean'?)"),
    (FULL, "covariates: {score: 0.1}", "covariates: {scor: 0.1}", "covariates: {scor",
     "'scor' is not a modelled column of the dataset (did you mean 'score'?)"),
    (FULL, "by_group: {active: {mean: 11}}}", "by_group: {active: {mean: 11}}, covariates: {level: 1}}", "level: 1",
     "the covariates go round in a circle"),
    (FULL, "        event: seen\n", "", "censoring:", "censoring needs the event column it fills"),
    (FULL, "low: 10, high: 300", "low: 10, hihg: 300", "hihg", "unknown key 'hihg' (did you mean 'high'?)"),
    (FULL, "low: 10, high: 300", "low: 10, high: 300, rate: 1", "rate", "uniform censoring takes no rate"),
    (FULL, "low: 10, high: 300", "low: 10", "censoring:", "uniform censoring needs high"),
    (FULL, "low: 10, high: 300", "low: 300, high: 10", "high: 10", "high (10) must be above low (300)"),
    (FULL, "event: seen", "event: unit", "event: unit", "column 'unit' is of type text, which cannot hold an event "
     "indicator"),
    (FULL, "{family: bernoulli, p: 0.3}}", "{family: bernoulli, p: 0.3}, censoring: {family: exponential, rate: 1}}",
     "censoring", "censoring cuts a positive time"),
    (FULL, "count: 5, icc: 0.1", "count: 5, icc: 1.0", "icc: 1.0", "icc must lie in [0, 1)"),
    (FULL, "        icc: 0\n", "", "weibull", "rows.clusters gives an icc, but a weibull time's cluster effect is a "
     "shared gamma frailty (give frailty: VARIANCE"),
    (FULL, "        icc: 0\n", "        icc: 0.2\n", "icc: 0.2", "a weibull time's cluster effect is a shared gamma "
     "frailty, not an icc"),
    (FULL, "        icc: 0\n", "        frailty: 25\n", "frailty: 25", "frailty (the gamma frailty's variance) must "
     "lie in [0, 20] (got 25)"),
    (FULL, "by_group: {active: {mean: 11}}}", "by_group: {active: {mean: 11}}, frailty: 0.5}", "frailty",
     "frailty is the shared gamma frailty of exponential and weibull times; a normal column's cluster effect "
     "is its icc"),
    (FULL, "count: 5, icc: 0.1", "count: 5", "clusters:", "clusters need the strength of their effect"),
    (FULL, "count: 5, icc: 0.1", "count: 5, icc: 0.1, frailty: -1", "frailty: -1",
     "frailty (the gamma frailty's variance) must lie in [0, 20] (got -1)"),
    (GOOD, "{family: bernoulli, p: 0.3}}", "{family: bernoulli, p: 0.3}, frailty: 0.2}", "frailty",
     "frailty applies only with rows.clusters"),
    (GOOD, "      strata:", "      clusters: {column: centre, count: 2, icc: 0.1}\n      strata:", "strata:",
     "stratum 'c' gets none of the 2 clusters of a group (clusters lie within one stratum; 2 × 0.25 rounds to 0) "
     "(give at least 4 clusters per group, or a larger share)"),
    (PAIRS, "      pairs:", "      clusters: {column: centre, count: 5, icc: 0.1}\n      pairs:", "pairs:",
     "pairs and clusters together are not modelled: a cluster lies within one group, a pair has a row in each"),
    (FULL, "family: lognormal, meanlog: 1, sdlog: 0.5", "family: normal, mean: 1, sd: 0.5", "level:",
     "a normal model can give values below column 'level''s declared min 0"),
    (FULL, "      hits:", "      tries: {model: {family: binomial, size: 3, p: 0.2}, icc: 0,\n"
     "              by_group: {active: {size: 30}}}\n      hits:", "tries:",
     "a binomial model can give values above column 'tries''s declared max 10"),
    (FULL, "      hits:", "      site: {model: {family: bernoulli, p: 0.5}}\n      hits:", "site:",
     "a bernoulli model cannot fill column 'site' of type category"),
    (FULL, "      hits:", "      scores: {model: {family: normal, mean: 0, sd: 1}}\n      hits:", "scores:",
     "the plan's dataset declares no column 'scores' (did you mean 'score'?)"),
    (FULL, "      hits:", "      arm: {model: {family: bernoulli, p: 0.5}}\n      hits:", "arm: {model",
     "column 'arm' is filled from rows.groups"),
    (FULL, "      flag: {model: {family: bernoulli, p: 0.3}}\n", "", "columns:",
     "analysis 'flags' uses column 'flag' (outcome), which has no model"),
    (FULL, "search: {scenario: shift,", "search: {scenario: shfit,", "search:", "no scenario is named 'shfit' (did "
     "you mean 'shift'?)"),
    (FULL, "analysis: primary", "analysis: primery", "search:", "the plan has no analysis 'primery'"),
    (FULL, "sizes: [20, 40]", "sizes: [3, 40]", "search:", "3 rows per group cannot fill the 5 clusters"),
    (FULL, "  - name: no-difference", "  - name: shift", "name: shift\n    replicates: 200\nsearch",
     "scenario name 'shift' is used twice"),
    (FULL, "replicates: 200\n    change", "replicates: 0\n    change", "replicates: 0", "must be at least 1"),
    (FULL, "replicates: 200\n    change", "replicates: 1000000\n    change", "replicates: 1000000",
     "must be at most 100000"),
    (FULL, "trial.columns.score.by_group.active.mean: 10", "trial.columns.score.model.mean.x: 1", "change:",
     "'trial.columns.score.model.mean' is a value, so 'x' cannot be below it"),
    (FULL, "trial.columns.score.by_group.active.mean: 10", "trial.columns.score.model.sd: -1", "change:",
     "in scenario 'no-difference', datasets.trial.columns.score.model.sd: sd must be more than 0"),
    (FULL, "column: centre", "column: site", "column: site", "column 'site' is of type category, which cannot hold "
     "cluster identifiers"),
    (FULL, "      clusters:", "      count: 60\n      clusters:", "count: 60", "give either count (rows in all) or "
     "groups"),
    (GOOD, "c: 0.25}", "c: 0.15}", "strata:", "the shares add up to 0.9, not 1"),
    (GOOD, "mean: 11}}}", "mean: 11}}, covariates: {flag: x}}", "covariates",
     "datasets.trial.columns.score.covariates.flag: must be a number (got 'x')"),
    (GOOD, "mean: 11}}}", "mean: 11}}, covariates: {site: {b: x}}}", "covariates",
     "datasets.trial.columns.score.covariates.site.b: must be a number (got 'x')"),
    (GOOD, "active.mean: 10}", "active.mean: ten}", "change:",
     "in scenario 'no-difference', datasets.trial.columns.score.by_group.active.mean: must be a number"),
    (GOOD, "mean: 11}}}", "mean: 11}}, covariates: {site: {d: 1}}}", "covariates", "'d' is not a level of rows.strata"),
    (GOOD, "mean: 11}}}", "mean: 11}}, covariates: {flag: {a: 1}}}", "covariates",
     "effects per level apply to the column of rows.groups or rows.strata, not 'flag'"),
    (GOOD, "{control: 30, active: 30}", "{control: 600000, active: 600000}", "groups:",
     "1,200,000 rows in all, more than a simulated data set may have (1,000,000)"),
    (GOOD, "  trial:\n", "  trail:\n", "trail:", "the plan has no dataset 'trail' (did you mean 'trial'?)"),
    (PAIRS, "active: 30}", "active: 31}", "pairs:", "pairs need exactly two groups of the same size"),
    (PAIRS, "correlation: 0.5", "correlation: 1", "correlation: 1", "correlation must lie in (-1, 1)"),
]


@pytest.mark.parametrize(("base", "old", "new", "line_text", "expected"), CASES,
                         ids=[f"{i}-{c[4][:30]}" for i, c in enumerate(CASES)])
def test_each_problem_gets_one_located_message(tmp_path, plan, base, old, new, line_text, expected):
    assert old in base
    text = base.replace(old, new, 1)
    line = text[:text.index(line_text)].count("\n") + 1
    with pytest.raises(PlanError) as info:
        _load(tmp_path, plan, text)
    messages = info.value.problems or [str(info.value)]
    found = [m for m in messages if expected in m]
    assert found, "\n".join(messages)
    assert re.search(rf"scenarios\.yaml:{line}:\d+: ", found[0]), found[0]
    assert len(messages) == 1 or "trail" in text, "\n".join(messages)


def test_a_frailty_alone_in_rows_clusters_leaves_every_icc_column_to_say_its_own(tmp_path, plan):
    """rows.clusters with only a frailty: the weibull time takes it; each column of an icc family is
    named once, at its family, until it gives its own icc (0 for none)."""
    text = FULL.replace("count: 5, icc: 0.1", "count: 5, frailty: 0.5").replace("        icc: 0\n", "")
    problems = _problems(tmp_path, plan, text)
    named = sorted(re.search(r"columns\.(\w+)\.model\.family: rows\.clusters gives a frailty", m).group(1)
                   for m in problems)
    assert named == ["flag", "hits", "level", "score"], problems
    for column in named:
        text = text.replace(f"      {column}: {{model:", f"      {column}: {{icc: 0, model:")
    time = _load(tmp_path, plan, text).scenarios[0].datasets["trial"]
    assert time.rows.clusters.frailty == 0.5 and time.rows.clusters.icc is None


def test_every_cluster_effect_problem_is_reported_at_once(tmp_path, plan):
    text = FULL.replace("by_group: {active: {mean: 11}}}", "by_group: {active: {mean: 11}}, frailty: 0.5}") \
               .replace("        icc: 0\n", "        icc: 0.3\n") \
               .replace("{family: poisson, mean: 2}}", "{family: poisson, mean: 2}, icc: 1.5}")
    problems = "\n".join(_problems(tmp_path, plan, text))
    assert re.search(r":10:\d+: datasets\.trial\.columns\.score\.frailty: frailty is the shared gamma", problems)
    assert re.search(r":13:\d+: datasets\.trial\.columns\.hits\.icc: icc must lie in \[0, 1\) \(got 1\.5\)", problems)
    assert re.search(r":16:\d+: datasets\.trial\.columns\.time\.icc: a weibull time's cluster effect", problems)
    assert problems.count("scenarios.yaml:") == 3, problems


def test_the_full_base_reads(tmp_path, plan):
    file = _load(tmp_path, plan, FULL)
    assert file.search is not None and file.search.sizes == [20, 40]
    assert file.scenario("shift").with_group_sizes(20).datasets["trial"].rows.clusters.count == 5
    assert _load(tmp_path, plan, PAIRS).scenarios[0].datasets["trial"].rows.pairs.correlation == 0.5


def test_a_change_may_add_a_group_level_override_and_new_keys_are_checked(tmp_path, plan):
    text = FULL.replace("trial.columns.score.by_group.active.mean: 10",
                        "trial.columns.hits.by_group.active.mean: 3, trial.columns.flag.by_group.active: {p: 0.5}")
    shift = _load(tmp_path, plan, text).scenario("no-difference").datasets["trial"]
    assert shift.columns["hits"].by_group == {"active": {"mean": 3}}
    assert shift.columns["flag"].by_group == {"active": {"p": 0.5}}
    text = FULL.replace("trial.columns.score.by_group.active.mean: 10", "trial.columns.hits.by_group.active.sd: 3")
    assert any("a poisson model takes no sd" in m and ":22:" in m for m in _problems(tmp_path, plan, text))


def test_the_file_must_be_a_mapping_and_not_empty(tmp_path, plan):
    with pytest.raises(PlanError, match="a scenarios file must be a mapping"):
        _load(tmp_path, plan, "- a\n- b\n")
    with pytest.raises(PlanError, match="scenarios file not found"):
        load_scenarios(tmp_path / "missing.yaml", plan)
    (tmp_path / "latin1.yaml").write_bytes("title: caf\xe9\n".encode("latin-1"))
    with pytest.raises(PlanError, match=r"latin1\.yaml:1: the scenarios file is not UTF-8 text"):
        load_scenarios(tmp_path / "latin1.yaml", plan)
    (tmp_path / "huge.yaml").write_text("# " + "x" * 1_000_001, encoding="utf-8")
    with pytest.raises(PlanError, match="the scenarios file is larger than 1000000 bytes"):
        load_scenarios(tmp_path / "huge.yaml", plan)


def test_the_demo_scenarios_file_reads_against_its_plan():
    plan = read_plan(ROOT / "plans" / "liner-trial" / "plan.yaml").plan
    file = load_scenarios(ROOT / "plans" / "liner-trial" / "scenarios.yaml", plan)
    assert [s.name for s in file.scenarios] == ["no-difference", "foam-shortens"]
    null = file.scenario("no-difference").datasets["shipments"].columns["minutes_above_8c"]
    assert null.by_group["foam"]["meanlog"] == null.model.meanlog  # the null: the liners alike
    assert file.search is not None and file.search.analysis == "primary"
