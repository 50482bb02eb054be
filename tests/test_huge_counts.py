"""Counts beyond what a float or a JSON integer holds reach the record, the methods paragraph and the
report as true numbers, never as a crash or a silently rescaled figure."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import special, stats
from test_permutation_plans import BINARY, analysis, binary_csv, run

from planrunner.pipeline.run import run_plan
from planrunner.record.methods import readable_count
from planrunner.record.permutation import arrangements_count
from planrunner.report.digits import count


def test_exact_null_beyond_the_float_range_is_recorded_as_shares(write_plan, tmp_path):
    table = [[60, 540], [78, 522]]  # C(1200, 600) ≈ 10^359 arrangements: the DP counts are rescaled
    result, record = run(write_plan, tmp_path, BINARY, binary_csv(table),
                         analysis("rd", "risk_difference", more="    alternative: less\n    resamples: 50\n"))
    entry = result["rd"]
    assert entry["details"]["computation"] == "dynamic programming"
    assert entry["p_value"] == pytest.approx(stats.fisher_exact(table, alternative="less").pvalue,  # scipy reference
                                             rel=1e-9)
    dist = entry["distribution"]
    assert dist["histogram"]["counts_are"] == "probability"
    assert sum(dist["histogram"]["counts"]) == pytest.approx(1.0, abs=1e-12)  # shares of all arrangements
    log10_total = special.gammaln(1201) / math.log(10) - 2 * special.gammaln(601) / math.log(10)  # log10 C(1200, 600)
    size = dist["size"]
    assert isinstance(size, str)
    mantissa, exponent = size.split("e+")
    assert math.log10(float(mantissa)) + int(exponent) == pytest.approx(log10_total, abs=1e-9)
    # the null mean of the difference in proportions is 0 under label exchangeability (identity)
    assert dist["mean"] == pytest.approx(0.0, abs=1e-12)
    # its s.d.: the hypergeometric s.d. of group a's events, over n_a and n_b (scipy reference)
    hyper = stats.hypergeom(1200, 138, 600)
    assert dist["sd"] == pytest.approx(hyper.std() * (1 / 600 + 1 / 600), rel=1e-9)
    methods = (tmp_path / "out").rglob("report.md")
    text = next(methods).read_text(encoding="utf-8")
    assert "× 10^359" in text or "× 10^358" in text or "× 10^360" in text


def test_association_record_at_thousands_of_rows_writes_its_arrangement_count(write_plan, tmp_path):
    rng = np.random.default_rng(3)
    n = 2000  # n! has 5736 digits: more than Python writes as the text of an int
    x = rng.normal(size=n)
    y = x + rng.normal(size=n)
    csv = "x,y\n" + "".join(f"{a:.6f},{b:.6f}\n" for a, b in zip(x, y))
    plan = write_plan("""
plan: big-n
title: Spearman at n = 2000
seed: 5
datasets:
  d:
    file: data.csv
    columns:
      x: {type: number}
      y: {type: number}
analyses:
  - id: rho
    data: d
    outcome: y
    predictor: x
    statistic: spearman
    method: permutation
    resamples: 99
""", {"data.csv": csv})
    outcome = run_plan(plan, out=tmp_path / "out", clock=fixed_clock)
    entry = outcome.record["analyses"][0]
    written = json.loads(next((tmp_path / "out").rglob("record.json")).read_text(encoding="utf-8"))
    arrangements = written["analyses"][0]["details"]["arrangements"]
    mantissa, exponent = arrangements.split("e+")
    assert math.log10(float(mantissa)) + int(exponent) == pytest.approx(  # log10 2000! from lgamma
        special.gammaln(n + 1) / math.log(10), abs=1e-9)
    xs, ys = (np.array([float(f"{v:.6f}") for v in column]) for column in (x, y))  # the values as written
    assert entry["estimate"] == pytest.approx(stats.spearmanr(xs, ys).statistic, abs=1e-12)  # scipy reference
    assert "1 arrangement" not in next((tmp_path / "out").rglob("report.md")).read_text(encoding="utf-8")


@pytest.mark.parametrize("value, shown", [
    (11440, "11,440"),  # C(16, 7)
    (10**20, "1.00 × 10^20"),
    ("3.162277660168e+66", "3.16 × 10^66"),
])
def test_counts_print_readably_at_any_size(value, shown):
    assert readable_count(value) == shown
    assert count(value) == shown


def test_arrangement_counts_stay_exact_integers_while_json_can_write_them():
    c = math.comb(3000, 1500)  # about 10^901: an exact int in the record
    assert arrangements_count(c) == c
    big = math.factorial(2000)
    text = arrangements_count(big)
    assert isinstance(text, str) and text.endswith("e+5735")
