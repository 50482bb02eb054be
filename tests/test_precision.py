"""Resamples chosen to a stated precision (issue: precision instead of a fixed resamples): Gandy's
sequential Monte Carlo test with bounded resampling risk for permutation tests, Andrews &
Buchinsky's three-step choice of B for the bootstrap; blocks of 1000 from the analysis's stream,
so the same on every executor and re-run by verify."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.engines import precision as prec
from planrunner.engines.blocks import bind
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import DRAW_BLOCK, UniformRows, stream_for
from planrunner.execute.pool import Execution
from planrunner.pipeline.run import run_plan


def _uniform_range(stream, start: int, stop: int) -> np.ndarray:
    return UniformRows(stream, 1, start).take(stop - start)[:, 0]


def _bernoulli_run(p: float, seed: int, target: prec.TestPrecision):
    """The sequential rule on draws whose exceedance probability is exactly p: values uniform on
    [0, 1), the observed value 1 − p, alternative greater (P(U ≥ 1 − p) = p)."""
    task = bind(_uniform_range, stream_for(seed, "bernoulli"))
    observed = 1.0 - p

    def counts(values: np.ndarray) -> dict[str, int]:
        return {"greater": int(np.count_nonzero(values >= observed)), "less": 0, "absolute": 0}
    return prec.draw_sequentially(task, target, alternative="greater", two_sided="doubled", counts=counts)[1]


def test_disagreement_rate_over_seeds_is_within_the_bound() -> None:
    """The stated simulation: 300 seeds at each of p = 0.9α and p = 1.15α (α = 0.05), the hardest
    region, with ε = 0.05. A wrong decision happens with probability at most ε each (Gandy 2009,
    Theorem 1); the count of wrong decisions is then at most binomial(300, 0.05), whose 0.999
    quantile is the bound asserted."""
    target = prec.TestPrecision(risk=0.05, max_resamples=200_000, alpha=0.05)
    bound = stats.binom.ppf(0.999, 300, 0.05)  # scipy reference: 27
    for p, truth in ((0.045, "rejected"), (0.0575, "not rejected")):
        wrong = unresolved = 0
        for seed in range(300):
            decision = _bernoulli_run(p, seed, target).decisions[0]["decision"]
            wrong += decision not in (truth, "unresolved")
            unresolved += decision == "unresolved"
        assert wrong <= bound, (p, wrong)
        assert unresolved <= 30  # the rule decides almost always within 200,000 draws here


def test_p_near_one_half_stops_after_one_block_and_near_alpha_uses_many() -> None:
    target = prec.TestPrecision(risk=0.001, max_resamples=100_000, alpha=0.05)
    far = _bernoulli_run(0.5, 1, target)
    assert far.resamples_used == DRAW_BLOCK and far.decisions[0]["decision"] == "not rejected"
    near = [_bernoulli_run(0.052, seed, target).resamples_used for seed in range(5)]
    assert min(near) >= 10 * DRAW_BLOCK  # a p this close to alpha needs tens of thousands of draws


def test_boundaries_hold_the_risk_at_alpha() -> None:
    """Under p = α the chance of crossing each boundary, by the exact law of the binomial walk
    (computed here independently, draw by draw over the looks), stays below ε."""
    level, risk, looks = 0.05, 0.01, 30
    upper, lower = prec.boundaries(level, risk, looks)
    mass = np.zeros(looks * DRAW_BLOCK + 1)
    mass[0] = 1.0
    hit_upper = hit_lower = 0.0
    for look in range(1, looks + 1):
        step = stats.binom.pmf(np.arange(DRAW_BLOCK + 1), DRAW_BLOCK, level)  # scipy reference
        mass = np.convolve(mass, step)[:mass.size]
        hit_upper += mass[upper[look - 1]:].sum()
        mass[upper[look - 1]:] = 0.0
        hit_lower += mass[:lower[look - 1] + 1].sum() if lower[look - 1] >= 0 else 0.0
        mass[:max(lower[look - 1] + 1, 0)] = 0.0
    assert hit_upper <= risk and hit_lower <= risk
    assert hit_upper > risk / 4 and hit_lower > risk / 4  # the budget is spent, not wasted


def _rank_data(shift: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.normal(shift, 1.0, 12).round(3), rng.normal(0.0, 1.0, 12).round(3)


@pytest.mark.parametrize("shift", [0.0, 0.5, 0.8, 1.2, 2.0])
def test_sequential_decisions_agree_with_the_exact_mann_whitney_decision(shift: float) -> None:
    x, y = _rank_data(shift, 7)
    exact = stats.mannwhitneyu(x, y, alternative="two-sided", method="exact").pvalue  # scipy reference
    options = PermutationOptions(resamples=100_000, alternative="two-sided", exact="never", alpha=0.05,
                                 precision=prec.TestPrecision(risk=0.001, max_resamples=100_000, alpha=0.05))
    result = permutation_test([x, y], get_statistic("rank_sum"), options, stream=stream_for(5, f"s{shift}"))
    decision = result.precision.decisions[0]["decision"]
    if abs(exact - 0.05) > 0.01:
        assert decision == ("rejected" if exact <= 0.05 else "not rejected"), (exact, decision)
    assert result.resamples == result.precision.resamples_used and result.resamples % DRAW_BLOCK == 0


def test_a_stopped_run_holds_exactly_the_first_blocks_of_a_longer_one() -> None:
    x, y = _rank_data(0.9, 3)
    statistic, stream = get_statistic("mean_difference"), stream_for(9, "prefix")
    sequential = permutation_test([x, y], statistic, PermutationOptions(
        resamples=50_000, alternative="greater", exact="never", alpha=0.05,
        precision=prec.TestPrecision(risk=0.001, max_resamples=50_000, alpha=0.05)), stream=stream)
    m = sequential.resamples
    fixed = permutation_test([x, y], statistic, PermutationOptions(resamples=m + 3000, alternative="greater",
                                                                   exact="never"), stream=stream)
    assert np.array_equal(sequential.null, fixed.null[:m])


def test_family_levels_follow_the_adjustment() -> None:
    assert prec.family_levels("bonferroni", 4, 0.05) == (0.0125,)
    assert prec.family_levels("holm", 3, 0.06) == pytest.approx((0.06, 0.03, 0.02))
    assert prec.family_levels("benjamini-hochberg", 2, 0.05) == pytest.approx((0.025, 0.05))


def _kurtosis(values: np.ndarray) -> float:
    return float(stats.kurtosis(values, fisher=False, bias=True))  # scipy reference: m4 / m2²


def test_bootstrap_resamples_match_the_andrews_buchinsky_formula() -> None:
    rng = np.random.default_rng(12)
    data = rng.lognormal(0.0, 0.8, 40)  # skewed: the replicates' kurtosis differs from 3
    statistic, stream = get_statistic("mean"), stream_for(4, "ab")
    r = 0.02
    options = BootstrapOptions(resamples=40_000, confidence=0.95, intervals=("percentile",),
                               precision=prec.BootstrapPrecision(max_resamples=40_000, se_relative=r))
    result = bootstrap([data], statistic, options, stream=stream)
    # step 1 of Andrews & Buchinsky (2000): B1 = ω/2 with ω = 1/r² here, in whole blocks
    b1 = math.ceil(1.0 / (2 * r * r) / DRAW_BLOCK) * DRAW_BLOCK
    first = bootstrap([data], statistic, BootstrapOptions(resamples=b1, confidence=0.95, intervals=("percentile",)),
                      stream=stream)
    # step 2: B2 = ω (2 + γ₂) / 4, γ₂ the excess kurtosis of the B1 replicates; step 3: max(B1, B2)
    b2 = (_kurtosis(np.asarray(first.distribution)) - 1.0) / (4 * r * r)
    expected = math.ceil(max(b1, b2) / DRAW_BLOCK) * DRAW_BLOCK
    assert result.resamples == result.precision.resamples_used == expected
    assert result.precision.stopped_because == "target reached"
    assert result.precision.achieved["se_relative"] <= r
    # the result is the fixed-B bootstrap with that B (its first B1 draws those of the first stage)
    fixed = bootstrap([data], statistic, BootstrapOptions(resamples=expected, confidence=0.95,
                                                         intervals=("percentile",)), stream=stream)
    assert np.array_equal(result.distribution, fixed.distribution)


def test_bootstrap_se_reaches_the_stated_accuracy_over_seeds() -> None:
    """The stated accuracy: over 40 seeds the spread of the SE, relative to its mean, is at most
    the target (blocks of 1000 round B up, so it is usually smaller); 40 values estimate an s.d. to
    about ±11%, hence the factor 1.3."""
    rng = np.random.default_rng(2)
    data = rng.exponential(1.0, 30)
    r = 0.03
    ses = []
    for seed in range(40):
        options = BootstrapOptions(resamples=20_000, confidence=0.95, intervals=("percentile",),
                                   precision=prec.BootstrapPrecision(max_resamples=20_000, se_relative=r))
        ses.append(bootstrap([data], get_statistic("mean"), options, stream=stream_for(seed, "se")).standard_error)
    assert np.std(ses, ddof=1) / np.mean(ses) <= 1.3 * r


PLAN = """
plan: precise
title: Resamples to a stated precision
seed: 17
defaults:
  precision: {{decision_risk: 0.001, max_resamples: 30000}}
datasets:
  d:
    file: data.csv
    columns:
      g: {{type: category}}
      y: {{type: number}}
      w: {{type: number}}
analyses:
  - id: shift
    data: d
    outcome: y
    groups: {{by: g, compare: [a, b]}}
    statistic: t_welch
    method: permutation
    exact: never
  - id: other
    role: secondary
    data: d
    outcome: w
    groups: {{by: g, compare: [a, b]}}
    statistic: median_difference
    method: permutation
    exact: never
  - id: spread
    role: secondary
    data: d
    outcome: y
    groups: {{by: g, compare: [a, b]}}
    statistic: mean_difference
    method: bootstrap
    intervals: [percentile]
    precision: {{se_relative: 0.02, interval_end_sd: 0.02, max_resamples: 20000}}
{family}"""


def _plan(write_plan, family: str = "") -> object:
    rng = np.random.default_rng(6)
    rows = ["g,y,w"] + [f"a,{v:.4f},{w:.4f}" for v, w in zip(rng.normal(0.6, 1, 25), rng.normal(0.2, 1, 25))] \
        + [f"b,{v:.4f},{w:.4f}" for v, w in zip(rng.normal(0, 1, 25), rng.normal(0, 1, 25))]
    return write_plan(PLAN.format(family=family), {"data.csv": "\n".join(rows) + "\n"})


def _numbers(record: dict) -> list:
    return [(a["id"], a["p_value"], a["standard_error"], a["resamples"], a["precision"], a["intervals"])
            for a in record["analyses"]]


def test_plan_records_the_rule_serially_and_on_two_workers_alike_and_verify_reproduces(write_plan, tmp_path,
                                                                                       capsys) -> None:
    from planrunner.cli import main as cli

    plan = _plan(write_plan, "multiplicity:\n  - family: [shift, other]\n    method: holm\n")
    serial = run_plan(plan, out=tmp_path / "serial", clock=fixed_clock).record
    workers = run_plan(plan, out=tmp_path / "two", clock=fixed_clock, execution=Execution("processes", 2)).record
    assert _numbers(serial) == _numbers(workers)
    by_id = {a["id"]: a for a in serial["analyses"]}
    test = by_id["shift"]["precision"]
    assert test["rule"].startswith("sequential Monte Carlo test") and test["resamples_used"] % 1000 == 0
    assert [d["level"] for d in test["decisions"]] == pytest.approx([0.025, 0.05])  # Holm over two: α/2, α
    assert test["stopped_because"] in ("decided", "max_resamples")
    assert by_id["shift"]["resamples"] == test["resamples_used"]
    boot = by_id["spread"]["precision"]
    assert boot["rule"].startswith("three-step") and boot["resamples_used"] == by_id["spread"]["resamples"]
    assert "Gandy 2009" in serial["methods_text"] and "Andrews and Buchinsky (2000)" in serial["methods_text"]
    report = next((tmp_path / "serial").rglob("report.md")).read_text(encoding="utf-8")
    assert "Resamples chosen to a precision" in report and "target 0.02" in report
    import jsonschema

    from planrunner.record.schemas import record_schema
    jsonschema.validate(json.loads(next((tmp_path / "serial").rglob("record.json")).read_text(encoding="utf-8")),
                        record_schema())
    folder = next(p for p in (tmp_path / "serial").iterdir() if p.is_dir())
    capsys.readouterr()
    assert cli.main(["verify", str(folder)]) == 0
    assert "verify: PASSED" in capsys.readouterr().out


def test_a_test_stopped_at_the_maximum_says_unresolved(monkeypatch) -> None:
    target = prec.TestPrecision(risk=0.001, max_resamples=2000, alpha=0.05)
    outcome = _bernoulli_run(0.05, 3, target)  # p exactly alpha: two blocks never decide
    assert outcome.stopped_because == "max_resamples" and outcome.decisions[0]["decision"] == "unresolved"
    from planrunner.record.fields import precision_fields
    from planrunner.report.labels import precision_line
    line = precision_line({"precision": precision_fields(outcome)})
    assert line is not None and line.startswith("unresolved at alpha 0.05")
    from planrunner.report.labels import unresolved
    assert unresolved({"precision": precision_fields(outcome)}) and not unresolved({"precision": None})
