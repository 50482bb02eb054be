"""Analysis sets (`sets:` on a dataset, `set:` on an analysis): data/sets.py.

The check value is an identity: an analysis of a set gives exactly the numbers of the same analysis
run on a file that holds only the set's rows (same analysis id, so the same stream), and the
jackknife of a mean equals the textbook standard error s/√n of the set's rows.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from planrunner.errors import DataError
from planrunner.pipeline.run import run_plan

ROWS = [  # patient, arm, adherence, deviation, change
    (1, "new", 0.95, "no", 4.1), (2, "new", 0.60, "no", 1.2), (3, "new", 0.88, "yes", 6.3),
    (4, "new", 0.91, "no", 3.4), (5, "new", 0.99, "no", 5.0), (6, "new", 0.85, "no", 2.2),
    (7, "old", 0.97, "no", 0.4), (8, "old", 0.40, "no", -1.1), (9, "old", 0.83, "no", 1.9),
    (10, "old", 0.92, "yes", 0.8), (11, "old", 0.89, "no", 1.1), (12, "old", 0.81, "no", -0.3),
]
HEADER = "patient,arm,adherence,deviation,change\n"
DATASET = """    columns:
      patient: {{type: integer}}
      arm: {{type: category, levels: [new, old]}}
      adherence: {{type: number, min: 0, max: 1}}
      deviation: {{type: boolean}}
      change: {{type: number}}
{extra}"""
PLAN = """plan: sets
title: Analysis sets
seed: 99
datasets:
  trial:
    file: {file}
{dataset}analyses:
  - id: difference
    data: trial{set}
    outcome: change
    groups: {{by: arm, compare: [new, old]}}
    statistic: mean_difference
    method: bootstrap
    resamples: 499
  - id: new-arm-mean
    role: secondary
    data: trial{set}
    outcome: change
    statistic: mean
    method: jackknife
"""
PER_PROTOCOL = "adherence >= 0.8 and not deviation"


def write(folder: Path, rows, name: str, *, sets: bool) -> Path:
    (folder / f"{name}.csv").write_text(HEADER + "".join(",".join(map(str, r)) + "\n" for r in rows))
    extra = (f'    sets:\n      full: "patient > 0"\n      per_protocol: "{PER_PROTOCOL}"\n' if sets else "")
    plan = folder / f"{name}.yaml"
    plan.write_text(PLAN.format(file=f"{name}.csv", dataset=DATASET.format(extra=extra),
                                set="\n    set: per_protocol" if sets else ""))
    return plan


def per_protocol_rows():
    return [r for r in ROWS if r[2] >= 0.8 and r[3] == "no"]


def test_a_set_gives_the_numbers_of_its_rows_alone(tmp_path: Path):
    with_set = run_plan(write(tmp_path, ROWS, "all", sets=True), out=tmp_path / "a", history=False).record
    alone = run_plan(write(tmp_path, per_protocol_rows(), "pp", sets=False), out=tmp_path / "b", history=False).record
    for ours, theirs in zip(with_set["analyses"], alone["analyses"]):
        assert ours["set"] == "per_protocol" and "set" not in theirs
        for key in ("estimate", "standard_error", "intervals", "n"):
            assert ours[key] == theirs[key], key
    # identity: the jackknife standard error of a mean is s/sqrt(n) (Efron & Tibshirani 1993, eq. 11.5)
    changes = np.array([r[4] for r in per_protocol_rows()])
    jackknife = with_set["analyses"][1]
    assert jackknife["estimate"] == pytest.approx(changes.mean(), rel=1e-15)
    assert jackknife["standard_error"] == pytest.approx(changes.std(ddof=1) / math.sqrt(changes.size), rel=1e-12)


def test_the_record_lists_each_sets_rows_and_exclusions(tmp_path: Path):
    record = run_plan(write(tmp_path, ROWS, "all", sets=True), out=tmp_path / "a", history=False).record
    (dataset,) = record["datasets"]
    assert dataset["rows_used"] == 12
    sets = {s["name"]: s for s in dataset["sets"]}
    assert sets["full"]["rows"] == 12 and sets["full"]["excluded"]["rows"] == 0
    pp = sets["per_protocol"]
    assert pp["condition"] == PER_PROTOCOL and pp["rows"] == 8
    # patients 2, 3, 8, 10 leave the per-protocol set: file lines 3, 4, 9, 11
    assert pp["excluded"] == {"reason": f"not ({PER_PROTOCOL})", "rows": 4, "first_lines": [3, 4, 9, 11]}
    # the analysis's descriptive table counts the set's rows and, per group, the rows the set left out
    table = {row["group"]: row for row in record["analyses"][0]["descriptives"]["rows"]}
    assert (table["new"]["n"], table["new"]["excluded"], table["old"]["n"], table["old"]["excluded"]) == (4, 2, 4, 2)


def test_a_sets_condition_with_no_value_names_the_lines(tmp_path: Path):
    plan = write(tmp_path, ROWS, "all", sets=True)
    plan.write_text(plan.read_text().replace(f'per_protocol: "{PER_PROTOCOL}"',
                                             'per_protocol: "log(change) > 0"'))
    with pytest.raises(DataError) as info:
        run_plan(plan, out=tmp_path / "a", history=False)
    assert info.value.where == "datasets.trial.sets.per_protocol"
    assert "line(s) 9, 13 of all.csv" in info.value.message  # change -1.1 and -0.3
