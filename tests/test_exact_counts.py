"""Exact integer counts of dynamic-programming nulls (issue: counts were stored as floats such as
3.16e66): past 2**53 the record holds each count as the string of its decimal digits, so that
count / arrangements can be re-derived exactly, and below 2**53 nothing changes."""

from __future__ import annotations

import itertools
import json
import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats
from test_permutation_plans import PAIRED, TWO_GROUPS, analysis, groups_csv, paired, pairs_csv, run

from planrunner.engines import exactdist, permcore, permutation, signflip
from planrunner.record.schemas import record_schema


def test_exact_programme_equals_brute_force_enumeration() -> None:
    rng = np.random.default_rng(11)
    for _ in range(40):  # random strata of small integer scores, negatives and ties included
        strata = [(rng.integers(-3, 7, int(rng.integers(1, 9))), 0) for _ in range(int(rng.integers(1, 4)))]
        strata = [(s, int(rng.integers(0, s.size + 1))) for s, _ in strata]
        offset, counts = exactdist.exact_sum_distribution(strata)
        brute: dict[int, int] = {}  # every arrangement listed: the product of each stratum's subsets
        for picks in itertools.product(*[itertools.combinations(range(s.size), k) for s, k in strata]):
            total = sum(int(s[list(p)].sum()) for (s, _), p in zip(strata, picks))
            brute[total] = brute.get(total, 0) + 1
        assert {offset + j: c for j, c in enumerate(counts) if c} == brute
    scores = rng.integers(0, 6, 14)
    counts = exactdist.exact_subset_sums_any_size(scores)
    brute = [0] * (int(scores.sum()) + 1)
    for mask in range(2 ** scores.size):  # all 2^14 sign patterns
        brute[sum(int(a) for i, a in enumerate(scores) if mask >> i & 1)] += 1
    assert counts == brute


def test_the_residue_primes_are_primes_and_cover_the_bound() -> None:
    primes = exactdist.moduli(math.comb(1200, 600))
    assert all(2 ** 62 < p < 2 ** 63 for p in primes) and math.prod(primes) > math.comb(1200, 600)
    assert all(pow(3, p - 1, p) == 1 and pow(5, p - 1, p) == 1 for p in primes)  # Fermat, as a cross-check


def _gaussian_binomial(n1: int, n2: int) -> list[int]:
    """Coefficients of the q-binomial [n1 + n2 choose n1]_q: the number of n1-subsets of the ranks
    1..n1+n2 whose rank sum is n1(n1+1)/2 + u, for u = 0, 1, ... (Mann & Whitney 1947), from the
    product ∏ (1 − q^(n2+i)) / (1 − q^i), in exact integer polynomial arithmetic."""
    poly = [1]
    for i in range(1, n1 + 1):
        grown = poly + [0] * (n2 + i)
        for j in range(len(poly)):  # times (1 − q^(n2+i))
            grown[j + n2 + i] -= poly[j]
        for j in range(i, len(grown)):  # divided by (1 − q^i): prefix sums with stride i
            grown[j] += grown[j - i]
        poly = grown[:n1 * n2 + 1]
    return poly


def test_rank_sum_counts_past_two_to_the_53_are_exact_digits(write_plan, tmp_path) -> None:
    rng = np.random.default_rng(5)
    values = rng.permutation(np.arange(60)) * 0.5 + 0.25  # 60 distinct values, so ranks without ties
    a, b = list(values[:30]), list(values[30:])
    arrangements = math.comb(60, 30)  # identity 18: about 1.18e17 > 2**53
    result, record = run(write_plan, tmp_path, TWO_GROUPS, groups_csv({"a": a, "b": b}),
                         analysis("w", "rank_sum", more="    alternative: greater\n    resamples: 999\n"))
    entry = result["w"]
    assert entry["details"]["computation"] == "dynamic programming" and entry["details"]["counts_exact"]
    ranks = stats.rankdata(np.concatenate([a, b]))[:30]
    u = int(ranks.sum()) - 30 * 31 // 2
    expected = sum(_gaussian_binomial(30, 30)[u:])  # closed form, Mann & Whitney (1947)
    written = json.loads(next((tmp_path / "out").rglob("record.json")).read_text(encoding="utf-8"))
    count = written["analyses"][0]["details"]["count_greater_equal"]
    assert count == str(expected) and expected > 2 ** 53  # exact digits, not 1.23e16
    assert entry["p_value"] == float(Fraction(int(count), arrangements))  # re-derived exactly
    # scipy's exact Mann–Whitney p-value agrees (scipy reference, computed in floating point)
    assert entry["p_value"] == pytest.approx(
        stats.mannwhitneyu(a, b, alternative="greater", method="exact").pvalue, rel=1e-12)
    assert written["analyses"][0]["distribution"]["size"] == str(arrangements)
    import jsonschema
    jsonschema.validate(written, record_schema())


def test_sign_flip_counts_past_two_to_the_53_are_binomial_sums(write_plan, tmp_path) -> None:
    rng = np.random.default_rng(9)
    d = rng.choice([-1, 1], size=60, p=[0.35, 0.65])  # differences ±1: 2^60 sign patterns
    result, _ = run(write_plan, tmp_path, PAIRED, pairs_csv(list(d + 5), [5] * 60),
                    paired("flip", "mean_difference", "    alternative: greater\n    resamples: 999\n"))
    entry = result["flip"]
    assert entry["details"]["computation"] == "dynamic programming" and entry["details"]["counts_exact"]
    # the mean difference rises with the number K of positive signs, K ~ Binomial(60, 1/2): the
    # count at or above the observed K is a sum of binomial coefficients
    positives = int((d > 0).sum())
    expected = sum(math.comb(60, k) for k in range(positives, 61))
    assert entry["details"]["count_greater_equal"] == (expected if expected <= 2 ** 53 else str(expected))
    assert entry["p_value"] == float(Fraction(expected, 2 ** 60))


def test_below_two_to_the_53_the_float_counts_were_exact_and_stay(write_plan, tmp_path, monkeypatch) -> None:
    """Forcing the exact programme where the float one is already exact changes no number."""
    csv = groups_csv({"a": [3, 5, 5, 8, 9, 9, 12, 14], "b": [1, 2, 4, 4, 6, 7, 7, 10]})
    body = (analysis("g", "mean_difference", more="    alternative: greater\n    resamples: 99\n")
            + analysis("t", "mean_difference", more="    resamples: 99\n    two_sided: absolute\n")
            + analysis("r", "rank_sum", more="    resamples: 99\n"))
    plain, _ = run(write_plan, tmp_path / "plain", TWO_GROUPS, csv, body)
    for module in (permutation, signflip, permcore):
        monkeypatch.setattr(module, "EXACT_FROM", 0)
    forced, _ = run(write_plan, tmp_path / "forced", TWO_GROUPS, csv, body)
    for aid in ("g", "t", "r"):
        assert plain[aid]["details"]["computation"] == "dynamic programming"
        for key in ("count_greater_equal", "count_less_equal", "count_absolute", "p_greater", "p_less"):
            assert forced[aid]["details"][key] == plain[aid]["details"][key]
        assert forced[aid]["p_value"] == plain[aid]["p_value"]
        assert forced[aid]["distribution"]["size"] == plain[aid]["distribution"]["size"] == math.comb(16, 8)


def test_beyond_the_exact_bound_the_record_says_the_counts_are_not_exact(write_plan, tmp_path,
                                                                         monkeypatch) -> None:
    monkeypatch.setattr(exactdist, "EXACT_WORK_LIMIT", 0)
    rng = np.random.default_rng(3)
    groups = {"a": list(rng.integers(0, 20, 115)), "b": list(rng.integers(0, 20, 115))}
    result, _ = run(write_plan, tmp_path, TWO_GROUPS, groups_csv(groups),
                    analysis("big", "mean_difference", more="    resamples: 999\n"))
    details = result["big"]["details"]
    assert details["counts_exact"] is False
    mantissa, exponent = details["count_greater_equal"].split("e+")  # 13 significant digits, as text
    assert len(mantissa.replace(".", "")) == 13 and int(exponent) > 15
