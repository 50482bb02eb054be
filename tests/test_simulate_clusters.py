"""`planrunner simulate` with the cluster effects of gamma, binomial and Weibull columns and with clusters
nested in strata, end to end from a plan and a scenarios file: the plan's stratified cluster bootstrap
and cluster permutation test run on every data set, the true values carry the cluster laws, and the numbers
are the same serially and on worker processes (each cluster effect from a stream of its own)."""

from __future__ import annotations

import pytest

from planrunner.cli.main import main
from planrunner.execute.pool import Execution
from planrunner.simulate.simulation import simulate_plan

PLAN = """\
plan: cluster-sim
title: Clustered depots
seed: 5
defaults: {resamples: 99}
datasets:
  depots:
    file: depots.csv
    columns:
      liner: {type: category, levels: [standard, foam]}
      region: {type: category, levels: [coast, inland]}
      site: {type: text}
      minutes: {type: number, min: 0}
      spoiled: {type: integer, min: 0, max: 8}
      days: {type: number, min: 0}
      failed: {type: boolean}
analyses:
  - {id: minutes, data: depots, outcome: minutes, groups: {by: liner, compare: [foam, standard]},
     strata: region, clusters: site, statistic: mean_difference, method: bootstrap, intervals: [percentile],
     role: primary}
  - {id: spoiled, data: depots, outcome: spoiled, groups: {by: liner, compare: [foam, standard]},
     clusters: site, statistic: mean_difference, method: permutation, role: secondary}
  - {id: days, data: depots, outcome: days, event: failed, groups: {by: liner, compare: [foam, standard]},
     statistic: logrank, method: permutation, role: secondary}
"""

SCENARIOS = """\
scenarios_for: cluster-sim
title: Depots sharing their conditions
seed: 8
datasets:
  depots:
    rows:
      groups: {column: liner, sizes: {standard: 40, foam: 40}}
      strata: {column: region, shares: {coast: 0.6, inland: 0.4}}
      clusters: {column: site, count: 5, icc: 0.2, frailty: 0.5}
    columns:
      minutes: {model: {family: gamma, shape: 2.0, scale: 30.0}, by_group: {foam: {scale: 24.0}},
                covariates: {region: {inland: 0.1}}}
      spoiled: {model: {family: binomial, size: 8, p: 0.25}, by_group: {foam: {p: 0.2}}}
      days:
        model: {family: weibull, shape: 1.4, scale: 60.0}
        censoring: {family: uniform, low: 20, high: 120}
        event: failed
scenarios:
  - {name: shared, replicates: 4}
"""


@pytest.fixture
def files(tmp_path):
    (tmp_path / "plan.yaml").write_text(PLAN, encoding="utf-8")
    (tmp_path / "scenarios.yaml").write_text(SCENARIOS, encoding="utf-8")
    return tmp_path


def test_clustered_families_and_clusters_in_strata_run_the_same_on_every_executor(files):
    serial = simulate_plan(files / "plan.yaml", files / "scenarios.yaml", out=files / "serial").document
    analyses = serial["scenarios"][0]["analyses"]
    assert [a["failed"]["count"] for a in analyses] == [0, 0, 0]
    # the gamma column has covariates (no closed form); the binomial mean keeps size·p under the beta
    # cluster probabilities: 8·0.2 − 8·0.25
    spoiled = analyses[1]["true_value"]
    assert spoiled["value"] == pytest.approx(8 * 0.2 - 8 * 0.25, rel=1e-12) and "beta-binomial" in spoiled["formula"]
    assert analyses[0]["true_value"]["value"] is None
    workers = simulate_plan(files / "plan.yaml", files / "scenarios.yaml", out=files / "processes",
                            execution=Execution("processes", 2)).document
    assert workers["scenarios"] == serial["scenarios"]


def test_the_cli_refuses_a_frailty_on_a_gamma_column_at_its_line(files, capsys):
    text = SCENARIOS.replace("by_group: {foam: {scale: 24.0}},", "by_group: {foam: {scale: 24.0}}, frailty: 0.3,")
    (files / "scenarios.yaml").write_text(text, encoding="utf-8")
    code = main(["simulate", str(files / "plan.yaml"), "--scenarios", str(files / "scenarios.yaml"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    line = text[:text.index("frailty: 0.3")].count("\n") + 1
    assert f"scenarios.yaml:{line}:" in err and "a gamma column's cluster effect is its icc" in err, err
