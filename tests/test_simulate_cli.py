"""`planrunner simulate` end to end: the folder it writes, the same numbers on every executor, the
search, an interrupt that leaves nothing, and bad input with one located message."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from conftest import fixed_clock

from planrunner.cli import simulate as cli_simulate
from planrunner.cli.main import main
from planrunner.execute.pool import Execution
from planrunner.record.canonical import self_hash
from planrunner.simulate.simulation import HASH_FIELD, simulate_plan

PLAN = """\
plan: cli-sim
title: Simulated liner comparison
seed: 99
defaults: {resamples: 199}
datasets:
  shipments:
    file: data/shipments.csv
    columns:
      shipment: {type: text}
      liner: {type: category, levels: [standard, foam]}
      minutes: {type: number, min: 0}
      excursion: {type: boolean}
analyses:
  - {id: primary, data: shipments, outcome: minutes, groups: {by: liner, compare: [foam, standard]},
     statistic: median_difference, method: bootstrap, intervals: [percentile], role: primary,
     decision: {rule: below-limit, limit: 0}}
  - {id: excursions, data: shipments, outcome: excursion, groups: {by: liner, compare: [foam, standard]},
     statistic: mean_difference, method: permutation, role: secondary}
"""

SCENARIOS = """\
scenarios_for: cli-sim
title: Liner scenarios
seed: 4
datasets:
  shipments:
    rows:
      groups: {column: liner, sizes: {standard: 15, foam: 15}}
    columns:
      minutes:
        model: {family: lognormal, meanlog: 3.0, sdlog: 0.5}
        by_group: {foam: {meanlog: 2.5}}
      excursion: {model: {family: bernoulli, p: 0.5}, by_group: {foam: {p: 0.3}}}
scenarios:
  - name: no-difference
    replicates: 6
    change: {shipments.columns.minutes.by_group.foam.meanlog: 3.0}
  - name: shorter
    replicates: 6
search:
  scenario: shorter
  analysis: primary
  power: 0.5
  sizes: [5, 15]
"""

# informational fields: when, how and by which command it ran, and the hash over them
NOT_COMPARED = {"started_utc", "finished_utc", "execution", "command", HASH_FIELD}


@pytest.fixture
def files(tmp_path: Path) -> tuple[Path, Path]:
    plan, scenarios = tmp_path / "plan.yaml", tmp_path / "scenarios.yaml"
    plan.write_text(PLAN, encoding="utf-8")
    scenarios.write_text(SCENARIOS, encoding="utf-8")
    return plan, scenarios


def test_simulate_writes_a_hashed_document_and_both_reports(files, tmp_path, capsys):
    plan, scenarios = files
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--out", str(tmp_path / "out")]) == 0
    printed = capsys.readouterr().out
    folder = Path(printed.strip().splitlines()[-1].removeprefix("simulation written to "))
    assert sorted(p.name for p in folder.iterdir()) == ["figures", "simulation.html", "simulation.json",
                                                       "simulation.md"]
    document = json.loads((folder / "simulation.json").read_text(encoding="utf-8"))
    assert document[HASH_FIELD] == self_hash(document, HASH_FIELD)
    assert document["plan"]["lock"] is None and document["scenarios_file"]["file"] == "scenarios.yaml"
    primary = document["scenarios"][1]["analyses"][0]
    assert primary["datasets"] == 6 and primary["failed"]["count"] == 0
    # lognormal medians exp(2.5) − exp(3.0): the true value of a median difference (truth.py)
    assert primary["true_value"]["value"] == pytest.approx(2.718281828459045 ** 2.5 - 2.718281828459045 ** 3.0)
    assert primary["intervals"][0]["coverage"]["of"] == 6
    assert sum(v["count"] for v in primary["verdicts"].values()) == 6
    search = document["search"]
    assert [p["size"] for p in search["points"]] == [5, 15]
    # the stated rule: the smallest size whose point estimate (and, apart, whose lower bound) reaches the target
    rates = {p["size"]: p["power"] for p in search["points"]}
    assert all(p["power"]["of"] == 6 for p in search["points"])
    assert search["smallest_size"] == min((n for n, p in rates.items() if p["rate"] >= 0.5), default=None)
    assert search["smallest_size_lower_bound"] == min((n for n, p in rates.items() if p["interval"][0] >= 0.5),
                                                      default=None)
    html = (folder / "simulation.html").read_text(encoding="utf-8")
    assert "Caution." in html and "<svg" in html and "regulations" in html
    assert (folder / "figures" / "power.svg").read_text(encoding="utf-8").startswith("<?xml")
    # the reports are views of the document: drawn again, the same bytes (byte-stable SVG)
    from planrunner.simulate.report import render_simulation
    again = render_simulation(document)
    assert again["simulation.html"] == html
    assert again["figures/coverage.svg"] == (folder / "figures" / "coverage.svg").read_text(encoding="utf-8")


def compared(document: dict) -> dict:
    return {k: v for k, v in document.items() if k not in NOT_COMPARED}


def test_every_executor_writes_the_same_numbers(files, tmp_path):
    """serial and threads here; processes and dask give the runner's same outcomes
    (test_simulate_run::test_every_executor_gives_the_same_outcomes), from which the document is made"""
    plan, scenarios = files
    documents = [simulate_plan(plan, scenarios, out=tmp_path / execution.executor, execution=execution,
                               clock=fixed_clock).document
                 for execution in (Execution(), Execution("threads", 2))]
    assert compared(documents[1]) == compared(documents[0])
    assert documents[1]["execution"]["executor"] == "threads"


def test_an_interrupt_leaves_no_folder(files, tmp_path, monkeypatch, capsys):
    plan, scenarios = files

    class Interrupting(cli_simulate.DatasetsBar):
        def for_scenario(self, label):
            def hook(done, total):
                if done:
                    raise KeyboardInterrupt
            return hook

    monkeypatch.setattr(cli_simulate, "DatasetsBar", Interrupting)
    out = tmp_path / "out"
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--out", str(out)]) == 130
    assert "interrupted; nothing was written" in capsys.readouterr().err
    assert not out.exists() or not any(out.iterdir())


@pytest.mark.parametrize(("edit", "expected"), [
    (lambda plan, scenarios: scenarios.unlink(), "scenarios.yaml"),
    (lambda plan, scenarios: scenarios.write_text(SCENARIOS.replace("scenarios_for: cli-sim", "scenarios_for: other"),
                                                  encoding="utf-8"), "scenarios.yaml:1:"),
    (lambda plan, scenarios: scenarios.write_text(SCENARIOS.replace("      minutes:\n", "      minuets:\n"),
                                                  encoding="utf-8"), "scenarios.yaml:"),
])
def test_bad_input_gets_one_located_message(files, capsys, edit, expected):
    plan, scenarios = files
    edit(plan, scenarios)
    assert main(["simulate", str(plan), "--scenarios", str(scenarios)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("planrunner: ") and expected in err and "Traceback" not in err


def test_the_scenarios_file_is_required(files, capsys):
    plan, _ = files
    assert main(["simulate", str(plan)]) == 2
    assert "--scenarios" in capsys.readouterr().err


def test_the_demo_scenarios_file_fits_the_demo_plan():
    from planrunner.pipeline.check import load_plan
    from planrunner.simulate.scenarios import load_scenarios

    demo = Path(__file__).resolve().parents[1] / "plans" / "liner-trial"
    loaded = load_plan(demo / "plan.yaml")[0]
    scenarios = load_scenarios(demo / "scenarios.yaml", loaded.plan)
    assert [s.name for s in scenarios.scenarios] == ["no-difference", "foam-shortens"]
    assert scenarios.search is not None and scenarios.search.analysis == "primary"


def test_a_scenario_that_would_not_fit_in_memory_is_refused_before_computing(files, tmp_path, monkeypatch, capsys):
    from planrunner.pipeline import check as pipeline_check

    plan, scenarios = files
    monkeypatch.setattr(pipeline_check, "available_memory", lambda: 1000)
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "resources" in err and "memory" in err and "analysis 'primary'" in err
    assert not (tmp_path / "out").exists()


def test_replicates_from_the_command_line_replace_every_scenario_s_and_are_recorded(files, tmp_path, capsys):
    plan, scenarios = files
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--out", str(tmp_path / "out"),
                 "--replicates", "2", "--quiet"]) == 0
    folder = Path(capsys.readouterr().out.strip())
    document = json.loads((folder / "simulation.json").read_text(encoding="utf-8"))
    assert document["scenarios_file"]["replicates_replaced_by"] == 2
    assert [s["replicates"] for s in document["scenarios"]] == [2, 2]
    assert all(p["power"]["of"] == 2 for p in document["search"]["points"])
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--replicates", "0"]) == 2
    assert "--replicates: --replicates must be at least 1" in capsys.readouterr().err


def test_the_lock_is_checked_as_a_run_checks_it(files, tmp_path, capsys):
    plan, scenarios = files
    assert main(["lock", str(plan), "--operator", "A. Tester"]) == 0
    plan.write_text(PLAN.replace("defaults: {resamples: 199}", "defaults: {resamples: 99}"), encoding="utf-8")
    capsys.readouterr()
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--out", str(tmp_path / "out"),
                 "--replicates", "1", "--quiet"]) == 0
    folder = Path(capsys.readouterr().out.strip())
    lock = json.loads((folder / "simulation.json").read_text(encoding="utf-8"))["plan"]["lock"]
    assert [d["path"] for d in lock["deviations"]] == ["defaults.resamples"]
    assert "1 deviation(s) from the locked plan" in (folder / "simulation.md").read_text(encoding="utf-8")
    assert main(["simulate", str(plan), "--scenarios", str(scenarios), "--refuse-deviations"]) == 2
    assert "defaults.resamples: locked 199, now 99" in capsys.readouterr().err
