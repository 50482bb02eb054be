"""Counts beyond what a float or a JSON integer holds reach the record, the methods paragraph and the
report as true numbers, never as a crash or a silently rescaled figure."""

from __future__ import annotations

import itertools
import json
import math

import numpy as np
import pytest
from conftest import fixed_clock, two_group_plan
from scipy import special, stats
from test_permutation_plans import BINARY, analysis, binary_csv, run

from planrunner.pipeline.run import run_plan
from planrunner.record.methods import readable_count
from planrunner.record.permutation import exact_count
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
    # the size is the exact number of arrangements, identity 18: C(1200, 600), written as its digits
    assert dist["size"] == str(math.comb(1200, 600)) and entry["details"]["counts_exact"]
    # group a's events are hypergeometric: C(138, k) C(1062, 600 − k) arrangements give k events
    # (identity 17), so the count at or below the observed 60 is that sum, exactly
    less = sum(math.comb(138, k) * math.comb(1062, 600 - k) for k in range(0, 61))
    assert entry["details"]["count_less_equal"] == str(less)
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


def test_arrangement_counts_stay_exact_while_json_can_write_them():
    c = math.comb(3000, 1500)  # about 10^901: an exact int in the record
    assert exact_count(c) == str(c)  # digits: past 2**53 - 1 a JSON reader might round it
    big = math.factorial(2000)
    text = exact_count(big)
    assert isinstance(text, str) and text.endswith("e+5735")


def test_a_boolean_stratum_is_named_as_the_data_checks_name_it(write_plan, tmp_path):
    """One rule for design labels: a boolean stratum reads true/false in the record, as in the checks
    and in groups.compare (it once read True/False there)."""
    rows = "".join(f"{g},{s},{v}\n" for g, s, v in [
        ("a", "true", 1.0), ("a", "false", 2.0), ("a", "true", 3.5), ("a", "false", 4.0),
        ("b", "true", 2.5), ("b", "false", 3.0), ("b", "true", 5.0), ("b", "false", 6.5)])
    plan = write_plan("""
plan: strata-words
title: Boolean strata
seed: 3
datasets:
  d:
    file: data.csv
    columns:
      g: {type: category}
      s: {type: boolean}
      y: {type: number}
analyses:
  - id: shift
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    strata: s
    statistic: mean_difference
    method: permutation
    resamples: 50
""", {"data.csv": "g,s,y\n" + rows})
    entry = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record["analyses"][0]
    assert entry["n"]["strata"] == {"a": {"false": 2, "true": 2}, "b": {"false": 2, "true": 2}}
    # exact, by listing the C(4, 2)² = 36 within-stratum arrangements here (doubled two-sided rule)
    strata = {"true": [1.0, 3.5, 2.5, 5.0], "false": [2.0, 4.0, 3.0, 6.5]}  # a's two rows first
    observed = np.mean([1.0, 3.5, 2.0, 4.0]) - np.mean([2.5, 5.0, 3.0, 6.5])
    null = []
    for first in itertools.combinations(range(4), 2):
        for second in itertools.combinations(range(4), 2):
            a = [strata["true"][i] for i in first] + [strata["false"][i] for i in second]
            b = [strata["true"][i] for i in range(4) if i not in first] + \
                [strata["false"][i] for i in range(4) if i not in second]
            null.append(np.mean(a) - np.mean(b))
    null = np.array(null)
    greater, less = np.mean(null >= observed - 1e-12), np.mean(null <= observed + 1e-12)
    assert entry["exact"] and entry["p_value"] == pytest.approx(min(1.0, 2 * min(greater, less)), rel=1e-12)


# --- whole numbers past 2**53 - 1: what every JSON reader keeps exact ----------------------------------
# V-IJSON: RFC 7493 (I-JSON), section 2.2: integers outside [-(2**53) + 1, 2**53 - 1] are not
# interoperable; JavaScript's Number.MAX_SAFE_INTEGER is 2**53 - 1 (ECMA-262, 21.1.2.6).

def strict_reader(text: str) -> object:
    """A JSON reader that holds every number as an IEEE double, as JavaScript, jq and spreadsheets do."""
    return json.loads(text, parse_int=float)


@pytest.mark.parametrize("n", [
    2**53 - 2, 2**53 - 1,  # the largest every reader keeps: JSON integers
    2**53, 2**53 + 1,  # 2**53 + 1 reads as 2**53 in a double: digits
    10**300, math.comb(1200, 600),  # beyond any 64-bit integer, within the float range
    10**3999 + 7,  # 4000 digits: the longest exact count written
], ids=["2^53-2", "2^53-1", "2^53", "2^53+1", "10^300", "C(1200,600)", "4000-digits"])
def test_a_count_reads_back_exactly_in_python_and_in_a_reader_of_doubles(n):
    from planrunner.record.permutation import JSON_EXACT, count_value
    from planrunner.record.schemas import record_schema

    written = exact_count(n)
    assert isinstance(written, int) == (n <= 2**53 - 1) and JSON_EXACT == 2**53 - 1
    text = json.dumps({"arrangements": written})
    assert count_value(json.loads(text)["arrangements"]) == n  # Python's json: exact
    strict = strict_reader(text)["arrangements"]
    assert int(strict) == n  # a reader of doubles: exact too (a double, or the string of digits)
    # what writing it as a JSON integer would have given that reader: 2**53 + 1 becomes 2**53, 10**300 a
    # neighbouring double, C(1200, 600) infinity (identity: doubles hold every integer up to 2**53 only)
    as_double = strict_reader(json.dumps(n))
    assert (math.isfinite(as_double) and int(as_double) == n) == (n <= 2**53)
    jsonschema = pytest.importorskip("jsonschema")
    count_schema = record_schema()["properties"]["analyses"]["items"]["properties"]["details"]["properties"]
    jsonschema.Draft202012Validator(count_schema["arrangements"]).validate(written)
    with pytest.raises(jsonschema.ValidationError):  # a JSON integer past 2**53 - 1 is not what records write
        jsonschema.Draft202012Validator(count_schema["arrangements"]).validate(2**53)


def test_more_than_4000_digits_is_scientific_text_and_not_taken_for_an_exact_count():
    from planrunner.record.permutation import count_value

    text = exact_count(10**4000 * 3)
    mantissa, exponent = str(text).split("e+")
    assert exponent == "4000" and float(mantissa) == pytest.approx(3.0, rel=1e-11)  # 13 digits through log10
    assert count_value(text) is None


def test_verify_accepts_a_record_written_with_json_integers_past_2_53(write_plan, tmp_path):
    """A record written before counts became digits held C(60, 30) as a JSON integer: the re-run's
    digits are the same whole number, and verify says so instead of failing."""
    from planrunner.audit.verbs import SAME_WHOLE_NUMBER, verify_record
    from planrunner.record.canonical import RECORD_HASH_FIELD, record_sha256

    rows = "".join(f"{'a' if i % 2 else 'b'},{(i * 37) % 23 / 7:.4f}\n" for i in range(60))
    plan = write_plan(*two_group_plan("permutation", 99, rows, seed=4))
    folder = run_plan(plan, out=tmp_path / "runs", clock=fixed_clock, history=False).folder
    file = folder / "record.json"
    record = json.loads(file.read_text(encoding="utf-8"))
    assert record["analyses"][0]["details"]["arrangements"] == str(math.comb(60, 30))  # identity 18
    record["analyses"][0]["details"]["arrangements"] = math.comb(60, 30)  # as records wrote it before
    record[RECORD_HASH_FIELD] = record_sha256(record)
    file.chmod(0o644)
    file.unlink()
    file.write_text(json.dumps(record, indent=2), encoding="utf-8")
    report = verify_record(folder)
    assert report.passed and [(d.path, d.rule) for d in report.differences] == [
        ("analyses[0].details.arrangements", SAME_WHOLE_NUMBER)]
    record["analyses"][0]["details"]["arrangements"] = math.comb(60, 30) + 1  # another number: a difference
    record[RECORD_HASH_FIELD] = record_sha256(record)
    file.unlink()
    file.write_text(json.dumps(record, indent=2), encoding="utf-8")
    assert not verify_record(folder).passed


def test_verify_weighs_integers_past_the_float_range_without_overflow():
    from planrunner.audit.verbs import Basis, _judge

    judged = _judge("analyses[0].details.count", 10**400, 10**400 + 1, {"analyses": []},
                    Basis(same_environment=False, reference_draws=True))
    assert not judged.within and judged.difference == 1.0 and judged.rule == "counts must be equal"
