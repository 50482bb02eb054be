"""Monte Carlo error of permutation p-values: the stated s.d. is the s.d. of the reported p."""

from __future__ import annotations

import math

import numpy as np
import pytest

from planrunner.audit.selfcheck import CASES, doubled_p_sd_ratio, run_case
from planrunner.engines.pvalues import monte_carlo_sd, summarize


def _null(rng: np.random.Generator, m: int) -> np.ndarray:
    return rng.normal(size=m)


def test_doubled_sd_is_twice_the_binomial_sd_of_the_smaller_side() -> None:
    rng = np.random.default_rng(5)
    null = _null(rng, 999)
    pv = summarize(null, 0.9, exact=False, alternative="two-sided", two_sided="doubled", tolerance=1e-12,
                   arrangements=10**9)
    p1 = min(pv.p_greater, pv.p_less)
    # identity: the doubled p is 2·p₁, and p₁ is a binomial proportion over m draws
    assert pv.monte_carlo_se == pytest.approx(2 * math.sqrt(p1 * (1 - p1) / 999), rel=1e-12)
    assert pv.monte_carlo_se != pytest.approx(math.sqrt(pv.p_value * (1 - pv.p_value) / 999), rel=0.05)


@pytest.mark.parametrize("alternative", ["greater", "less"])
def test_one_sided_sd_is_the_binomial_sd(alternative: str) -> None:
    null = _null(np.random.default_rng(6), 500)
    pv = summarize(null, 0.3, exact=False, alternative=alternative, two_sided="doubled", tolerance=1e-12,
                   arrangements=10**9)
    assert pv.monte_carlo_se == pytest.approx(math.sqrt(pv.p_value * (1 - pv.p_value) / 500), rel=1e-12)  # binomial


def test_absolute_rule_sd_is_the_binomial_sd_of_its_own_proportion() -> None:
    null = _null(np.random.default_rng(7), 800)
    pv = summarize(null, 1.1, exact=False, alternative="two-sided", two_sided="absolute", tolerance=1e-12,
                   arrangements=10**9)
    assert pv.monte_carlo_se == pytest.approx(math.sqrt(pv.p_value * (1 - pv.p_value) / 800), rel=1e-12)  # binomial


def test_doubled_interval_is_twice_the_clopper_pearson_interval_of_the_smaller_count() -> None:
    from scipy import stats
    null = _null(np.random.default_rng(8), 1000)
    pv = summarize(null, -1.2, exact=False, alternative="two-sided", two_sided="doubled", tolerance=1e-12,
                   arrangements=10**9)
    b = int(min(pv.count_greater, pv.count_less))
    # scipy reference: BinomTestResult.proportion_ci(method="exact") is the Clopper–Pearson interval
    ci = stats.binomtest(b, 1000).proportion_ci(confidence_level=0.99, method="exact")
    assert pv.p_interval == pytest.approx((2 * ci.low, 2 * ci.high), rel=1e-9)


def test_monte_carlo_sd_needs_the_absolute_p() -> None:
    with pytest.raises(ValueError):
        monte_carlo_sd(0.2, 0.8, 100, alternative="two-sided", two_sided="absolute")


def test_selfcheck_case_simulated_spread_of_the_doubled_p_matches_the_stated_sd() -> None:
    # identity: Var(2·p₁) = 4·p₁(1 − p₁)/m; within 10% over 400 streams (about 3 s.d. of an s.d.)
    case = next(c for c in CASES if c.id == "MC-DOUBLED sd")
    outcome = run_case(case)
    assert outcome["passed"], outcome
    assert case.compute is doubled_p_sd_ratio and outcome["obtained"] == pytest.approx(1.0, abs=0.1)
