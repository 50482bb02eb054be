"""The self-check cases: published examples and exact identities, each with its source.

These cases ship inside the package so that `planrunner selfcheck` can show, on the installation
at hand, that the engines reproduce values from outside planrunner. Case ids and sources are those of
docs/VALIDATION.md (E&T = Efron & Tibshirani 1993, An Introduction to the Bootstrap;
H&W = Hollander & Wolfe 1973; B&H = Benjamini & Hochberg 1995). Each case is a pure computation;
planrunner.audit.verbs runs them, adds one case that goes through a whole plan, and writes the report.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.jackknife import jackknife
from planrunner.engines.multiplicity import adjust
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

SELFCHECK_SEED = 20261201

# Source: E&T Table 3.1 (law school, 15 schools: LSAT, GPA); published, confirmed
LAW_LSAT = [576, 635, 558, 578, 666, 580, 555, 661, 651, 605, 653, 575, 545, 572, 594]
LAW_GPA = [3.39, 3.30, 2.81, 3.03, 3.44, 3.07, 3.00, 3.43, 3.36, 3.13, 3.12, 2.74, 2.76, 2.88, 2.96]
# Source: E&T Table 2.1 (mouse survival, days); published, confirmed
MOUSE_TREATMENT = [94, 197, 16, 38, 99, 141, 23]
MOUSE_CONTROL = [52, 104, 146, 10, 51, 30, 40, 27, 46]
# Source: H&W (1973) p. 69f, permeability; published, confirmed
PERM_X = [0.80, 0.83, 1.89, 1.04, 1.45, 1.38, 1.91, 1.64, 0.73, 1.46]
PERM_Y = [1.15, 0.88, 0.90, 0.74, 1.21]
# Source: B&H (1995) §4, 15 p-values; published, confirmed
BH95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719,
        0.6528, 0.7590, 1.000]
# Source: statsmodels multipletests on BH95 (V-BH95, rounded to 10 decimals)
BH95_HOLM = [.0015, .0056, .0247, .114, .2211, .278, .278, .278, .3213, 1, 1, 1, 1, 1, 1]
BH95_BH = [.0015, .003, .0095, .035625, .0603, .0638571429, .0638571429, .0645, .0765, .486, .5811818182,
           .714875, .7532307692, .8132142857, 1]


@dataclass(frozen=True)
class Case:
    id: str
    quantity: str
    source: str
    expected: float
    tolerance: float  # absolute
    compute: Callable[[], float]


def _law() -> tuple[np.ndarray, ...]:
    return (np.column_stack([np.asarray(LAW_LSAT, float), np.asarray(LAW_GPA, float)]),)


def _mouse() -> tuple[np.ndarray, ...]:
    return np.asarray(MOUSE_TREATMENT, float), np.asarray(MOUSE_CONTROL, float)


def _perm(samples: Sequence[np.ndarray], alternative: str, exact: str = "auto", resamples: int = 100_000):
    return permutation_test(samples, get_statistic("mean_difference"),
                            PermutationOptions(resamples=resamples, alternative=alternative, exact=exact),
                            stream=stream_for(SELFCHECK_SEED, "selfcheck-permutation"))


def _null_variance(result) -> float:
    """Variance of an exact null: its listed values, or the DP support weighted by arrangement counts."""
    null = np.asarray(result.null)
    weights = None if result.null_weights is None else np.asarray(result.null_weights)
    mean = np.average(null, weights=weights)
    return float(np.average((null - mean) ** 2, weights=weights))


def _boot_se(samples: Sequence[np.ndarray], statistic: str, case: str) -> float:
    result = bootstrap(samples, get_statistic(statistic), BootstrapOptions(2000, 0.9, ("percentile",)),
                       stream=stream_for(SELFCHECK_SEED, case))
    assert result.standard_error is not None, "a bootstrap of finite data has a standard error"
    return float(result.standard_error)


def doubled_p_sd_ratio(seeds: int = 400, resamples: int = 2000) -> float:
    """Spread of the doubled two-sided Monte Carlo p over independent streams, divided by the stated s.d.

    Mouse data, mean difference; exact p₁ = 1613/11440 (E&T Table 2.1 data), so the stated s.d. of the
    doubled p is 2·sqrt(p₁(1 − p₁)/m). The ratio is 1 up to the sampling error of an s.d. from
    ``seeds`` values (relative s.d. about 1/sqrt(2·seeds) = 3.5% at 400).
    """
    p_values: list[float] = []
    stated: list[float] = []
    for seed in range(seeds):
        result = permutation_test(_mouse(), get_statistic("mean_difference"),
                                  PermutationOptions(resamples=resamples, alternative="two-sided", exact="never"),
                                  stream=stream_for(SELFCHECK_SEED, f"selfcheck-doubled-sd-{seed}"))
        p_values.append(result.p_value)
        assert result.monte_carlo_se is not None, "a Monte Carlo p-value has a standard error"
        stated.append(result.monte_carlo_se)
    return float(np.std(p_values, ddof=1) / np.mean(stated))


def _max_abs(a: Sequence[float], b: Sequence[float]) -> float:
    return float(np.max(np.abs(np.asarray(a, float) - np.asarray(b, float))))


CASES: tuple[Case, ...] = (
    Case("V-LAW-JACK r", "Pearson r of LSAT and GPA", "E&T Table 3.1; V-LAW-JACK, exact",
         0.776374491289407, 1e-12, lambda: jackknife(_law(), get_statistic("correlation")).estimate),
    Case("V-LAW-JACK se", "jackknife SE of r", "V-LAW-JACK, exact (E&T §11.2 gives .142)",
         0.14251861860227, 1e-12, lambda: jackknife(_law(), get_statistic("correlation")).standard_error),
    Case("V-LAW-JACK bias", "jackknife bias of r", "V-LAW-JACK, exact",
         -0.00647362304592, 1e-12, lambda: jackknife(_law(), get_statistic("correlation")).bias),
    Case("V-IDENTITY mean se", "jackknife SE of the mean = s/sqrt(n), mouse treatment", "identity 2; V-MOUSE-BOOT",
         25.235489533, 1e-8, lambda: jackknife(_mouse()[:1], get_statistic("mean")).standard_error),
    Case("V-IDENTITY mean bias", "jackknife bias of the mean = 0, mouse treatment", "identity 3, exact",
         0.0, 1e-10, lambda: jackknife(_mouse()[:1], get_statistic("mean")).bias),
    Case("V-IDENTITY two-sample se", "two-sample jackknife SE of the mean difference = sqrt(s1²/n1 + s2²/n2)",
         "identity 6; V-MOUSE-PERM", 28.936067137, 1e-8,
         lambda: jackknife(_mouse(), get_statistic("mean_difference")).standard_error),
    Case("V-MOUSE-PERM greater", "exact permutation p, mean difference, treatment greater",
         "V-MOUSE-PERM, exact 1613/11440", 1613 / 11440, 1e-12, lambda: _perm(_mouse(), "greater").p_value),
    Case("V-MOUSE-PERM two-sided", "exact permutation p, two-sided as 2·min(p_greater, p_less)",
         "V-MOUSE-PERM, exact (scipy two-sided 0.2819930070)", 3226 / 11440, 1e-12,
         lambda: _perm(_mouse(), "two-sided").p_value),
    Case("V-MOUSE-PERM arrangements", "number of arrangements C(16, 7)", "identity 18, exact",
         11440, 0.0, lambda: _perm(_mouse(), "greater").arrangements),
    Case("V-MOUSE-PERM null variance", "variance of the exact null = S²(1/7 + 1/9)", "identity 16; V-MOUSE-PERM",
         759.8010582, 1e-6, lambda: _null_variance(_perm(_mouse(), "greater"))),
    Case("V-PERMEABILITY greater", "exact permutation p, mean difference, x greater",
         "H&W p. 69f data; V-PERMEABILITY, exact 191/3003", 191 / 3003, 1e-12,
         lambda: _perm((np.asarray(PERM_X), np.asarray(PERM_Y)), "greater").p_value),
    Case("V-FLOOR", "Monte Carlo p with no arrangement as extreme = 1/(m+1), m = 999", "identity 13, exact",
         1 / 1000, 1e-15, lambda: _perm((np.arange(30.0) + 100, np.arange(30.0)), "greater", "never", 999).p_value),
    Case("V-BH95 holm", "largest |Holm adjusted p − reference| over 15 p-values",
         "B&H 1995 p-values; statsmodels multipletests (V-BH95)", 0.0, 1e-10,
         lambda: _max_abs(adjust(BH95, "holm"), BH95_HOLM)),
    Case("V-BH95 bh", "largest |BH adjusted p − reference| over 15 p-values (published p(4) = .035625, p(5) = .0603)",
         "B&H 1995; statsmodels multipletests (V-BH95)", 0.0, 1e-10,
         lambda: _max_abs(adjust(BH95, "benjamini-hochberg"), BH95_BH)),
    # Monte Carlo cases: the tolerance is 4 Monte Carlo s.d. at B = 2000 (V-TOL)
    Case("V-MOUSE-BOOT median se", "bootstrap SE of the median, treatment, B = 2000 (ideal 37.83)",
         "E&T Table 2.2; V-MOUSE-BOOT, ±4 MC s.d.", 37.8346743939, 2.12,
         lambda: _boot_se(_mouse()[:1], "median", "selfcheck-mouse-median")),
    Case("V-MOUSE-STRATA se", "two-sample bootstrap SE of the mean difference, B = 2000 (ideal 26.908)",
         "E&T §8.3 (26.85 at B = 1400); V-MOUSE-STRATA, ±4 MC s.d.", 26.908107910089, 1.7,
         lambda: _boot_se(_mouse(), "mean_difference", "selfcheck-mouse-difference")),
    Case("MC-DOUBLED sd", "s.d. of the doubled two-sided Monte Carlo p over 400 streams ÷ stated s.d., m = 2000",
         "identity: Var(2·p₁) = 4·p₁(1 − p₁)/m (binomial); ±10% (about 3 s.d. of an s.d. from 400 values)", 1.0, 0.1,
         doubled_p_sd_ratio),
    Case("V-LAW-BOOT se", "bootstrap SE of r, B = 2000", "E&T ch. 6 (.132); V-LAW-BOOT, ±4 MC s.d.",
         0.1338, 0.0103, lambda: _boot_se(_law(), "correlation", "selfcheck-law")),
)


def run_case(case: Case) -> dict:
    """The case's expected and obtained values and whether they agree within its tolerance."""
    try:
        obtained = float(case.compute())
        error = None
    except Exception as exc:  # a failing case is reported, never hidden
        obtained, error = math.nan, f"{type(exc).__name__}: {exc}"
    passed = error is None and math.isfinite(obtained) and abs(obtained - case.expected) <= case.tolerance
    return {"id": case.id, "quantity": case.quantity, "source": case.source, "expected": case.expected,
            "obtained": obtained if math.isfinite(obtained) else None, "tolerance": case.tolerance,
            "difference": abs(obtained - case.expected) if math.isfinite(obtained) else None,
            "passed": bool(passed), "error": error}
