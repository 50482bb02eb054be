"""What every permutation-type test shares: its options, the exact-or-Monte-Carlo choice, the tie
tolerance and the step from a null distribution to a result.

Four engines test a null of exchangeability: :mod:`~planrunner.engines.permutation` (labels
shuffled, within strata), :mod:`~planrunner.engines.signflip` (labels swapped within pairs),
:mod:`~planrunner.engines.clusters` (labels shuffled between whole clusters) and
:mod:`~planrunner.engines.association` (outcome shuffled against a predictor; Freedman–Lane, ter Braak). Each
keeps only what is its own: its arrangement space (how many arrangements, how to list them, an
exact shortcut if any) and its Monte Carlo draw, a picklable range task that the executors may
spread over workers (:mod:`~planrunner.engines.blocks`). Everything else is here, written once:

1. :class:`PermutationOptions` checks the options (each with its own message) when it is made;
2. :func:`choose_computation` picks enumeration, dynamic programming or Monte Carlo by one rule;
3. :func:`tie_tolerance` is the one tolerance rule, ``2**-43 · max(|t|, scale)``, each engine naming
   its scale;
4. :func:`check_null` refuses a null with values the statistic cannot take, and
   :func:`permutation_result` turns the null into p-values (:mod:`~planrunner.engines.pvalues`)
   and a :class:`~planrunner.engines.results.PermutationResult`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from planrunner.engines.blocks import map_resamples
from planrunner.engines.exactdist import EXACT_FROM
from planrunner.engines.precision import PrecisionOutcome, TestPrecision, draw_sequentially
from planrunner.engines.pvalues import TWO_SIDED_RULES, summarize
from planrunner.engines.results import EngineWarning, PermutationResult, frozen_array
from planrunner.engines.statistics import Statistic
from planrunner.engines.teststats import INFINITE_ALLOWED
from planrunner.errors import EngineError

__all__ = ["ALTERNATIVES", "ENUMERATION_LIMIT", "EXACT_CHOICES", "INTERVAL_CHOICES", "TIE_TOLERANCE",
           "ComputedNull", "PermutationOptions", "check_null", "choose_computation", "observed_value",
           "permutation_result", "power_of_ten_text", "tie_tolerance", "unscaled"]

ALTERNATIVES = ("greater", "less", "two-sided")
EXACT_CHOICES = ("auto", "always", "never")
INTERVAL_CHOICES = ("shift",)
ENUMERATION_LIMIT = 5_000_000  # most arrangements listed one by one (exact: always)
# Relative; values this close to t count as ties. 2**-43 ≈ 1.1e-13 is 512 units in the last place of
# the largest magnitude involved: above the rounding of sums of many thousands of values, yet below
# the differences data make on a common offset up to about 10**7 times their resolution (a tolerance
# of 1e-10 · max|x| counted every arrangement as a tie for readings such as 1e7 + 0.0031; at 10**9 the
# doubles themselves hold such readings only to 1.2e-7, and nearby null values count as ties).
TIE_TOLERANCE = 2.0 ** -43
ENUMERATION = "enumeration"
DYNAMIC_PROGRAMMING = "dynamic programming"
MONTE_CARLO = "Monte Carlo"


def _one_of(what: str, value: Any, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise EngineError(f"unknown {what} {value!r}", hint=f"use one of {', '.join(allowed)}")


@dataclass(frozen=True)
class PermutationOptions:
    """The options of a permutation-type test, built once by ``compile`` (each default is here).

    ``exact``: "auto" is exact when the arrangements are at most ``resamples`` or an exact shortcut
    (dynamic programming) applies, else Monte Carlo; "always" is exact (at most
    :data:`ENUMERATION_LIMIT` arrangements listed, or the shortcut); "never" draws ``resamples``
    random arrangements. ``two_sided`` is the two-sided rule of :mod:`~planrunner.engines.pvalues`.
    ``alpha`` (optional) turns on the warnings about the smallest attainable p-value and the Monte
    Carlo interval. ``intervals`` and ``confidence`` ask for the shift interval (two groups).
    """

    resamples: int
    alternative: str
    exact: str = "auto"
    two_sided: str = "doubled"
    alpha: float | None = None
    intervals: tuple[str, ...] = ()
    confidence: float | None = None
    # resamples chosen to a decision risk (engines.precision): drawn block by block up to
    # precision.max_resamples (``resamples`` then equals it, the bound for exact: auto)
    precision: TestPrecision | None = None

    def __post_init__(self) -> None:
        _one_of("alternative", self.alternative, ALTERNATIVES)
        _one_of("exact choice", self.exact, EXACT_CHOICES)
        _one_of("two-sided rule", self.two_sided, TWO_SIDED_RULES)
        if isinstance(self.resamples, bool) or not isinstance(self.resamples, int) or self.resamples < 1:
            raise EngineError(f"resamples must be a whole number of at least 1, got {self.resamples!r}",
                              hint="use 9999 or more")
        for name in ("alpha", "confidence"):
            level = getattr(self, name)
            if level is not None and not 0.0 < level < 1.0:
                raise EngineError(f"{name} must lie strictly between 0 and 1, got {level!r}")
        for method in self.intervals:
            _one_of("interval method", method, INTERVAL_CHOICES)
        if self.intervals and self.confidence is None:
            raise EngineError("an interval needs a confidence level", hint="give confidence, e.g. 0.95")

    def settings(self) -> dict[str, Any]:
        """The options as the record states them (its ``settings``)."""
        out = {"resamples": self.resamples, "alternative": self.alternative, "exact": self.exact,
               "two_sided": self.two_sided, "alpha": self.alpha, "intervals": list(self.intervals),
               "confidence": self.confidence}
        if self.precision is not None:
            out["precision"] = {"decision_risk": self.precision.risk,
                                "max_resamples": self.precision.max_resamples,
                                "levels": list(self.precision.all_levels())}
        return out


def tie_tolerance(observed: float, scale: float) -> float:
    """Null values within this distance of the observed value count as equal to it: values equal in
    exact arithmetic may differ in the last bits. ``scale`` is the size of the numbers the statistic
    is computed from (each engine names it)."""
    return TIE_TOLERANCE * max(abs(observed), scale)


def choose_computation(arrangements: int, options: PermutationOptions, *, shortcut: bool,
                       shortcut_first: bool = False, space: str = "arrangements",
                       statistic: str = "", why: str | None = None, fix: str | None = None) -> str:
    """Enumeration, dynamic programming or Monte Carlo, by one rule for every engine.

    ``shortcut``: an exact null by dynamic programming is available; ``shortcut_first``: it costs
    less than listing the arrangements, so it is used even where enumeration would be. ``space``
    names the arrangements in the error message ("sign patterns", "pairings", ...); ``why`` says why
    no shortcut applies (default: none applies to ``statistic``) and ``fix`` replaces the hint.
    """
    if options.exact == "always" and arrangements > ENUMERATION_LIMIT and not shortcut:
        why = why or f"no exact shortcut applies to {statistic!r} on these data"
        raise EngineError(
            f"exact enumeration asked for, but there are {arrangements:,} {space} "
            f"(the limit is {ENUMERATION_LIMIT:,}) and {why}",
            hint=fix or "use exact: never (Monte Carlo) or exact: auto")
    if options.exact == "never":
        return MONTE_CARLO
    if shortcut and shortcut_first:
        return DYNAMIC_PROGRAMMING
    if arrangements <= (options.resamples if options.exact == "auto" else ENUMERATION_LIMIT):
        return ENUMERATION
    return DYNAMIC_PROGRAMMING if shortcut else MONTE_CARLO


def observed_value(statistic: Statistic, *arrays: np.ndarray) -> float:
    """The statistic on the data as observed; refused when it is not finite."""
    with np.errstate(invalid="ignore", divide="ignore"):  # reported just below
        observed = float(statistic.compute(*arrays))
    if not math.isfinite(observed):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    return observed


def check_null(null: np.ndarray, statistic: Statistic, space: str = "arrangement(s)") -> None:
    """Refuse a null holding NaN, −∞, or +∞ for a statistic that cannot be infinite: its p-values
    would count values that mean nothing."""
    bad = np.isnan(null) | ((null == np.inf) & (statistic.name not in INFINITE_ALLOWED)) | (null == -np.inf)
    if bad.any():
        censored = statistic.outcome == "censored"
        raise EngineError(
            f"the statistic {statistic.name!r} is not finite for {int(bad.sum())} {space}"
            + (" (a Kaplan–Meier quantile not reached, or a curve read beyond a group's follow-up)"
               if censored else ""),
            hint="use logrank for a test of censored outcomes" if censored else
            "the permutation test cannot be used with this statistic on these data")


def all_ties(null: np.ndarray, observed: float, tolerance: float) -> bool:
    """Every arrangement gives the observed value (the null carries no information)."""
    return bool(np.all(np.abs(null - observed) <= tolerance))


@dataclass(frozen=True)
class ComputedNull:
    """A null distribution as an engine computed it: values (the support, with ``weights`` the
    number of arrangements at each, from dynamic programming; else one arrangement or draw each)."""

    values: np.ndarray
    computation: str  # ENUMERATION | DYNAMIC_PROGRAMMING | MONTE_CARLO
    arrangements: int
    weights: np.ndarray | None = None  # times 2**weight_exponent arrangements (see exactdist)
    weight_exponent: int = 0
    # the same weights as exact Python integers (an object array), where they pass 2**53 and the
    # exact programme was affordable; the counts and p-values are then taken from them
    exact_weights: np.ndarray | None = None
    precision: PrecisionOutcome | None = None  # Monte Carlo drawn to a decision risk

    @property
    def exact(self) -> bool:
        return self.computation != MONTE_CARLO


@dataclass(frozen=True)
class Judge:
    """What counts as extreme, known before drawing: the observed value, the centre of the null
    and the tie tolerance (a function of the values drawn, since one engine scales it by them).
    The same comparisons as :func:`~planrunner.engines.pvalues.summarize`."""

    observed: float
    centre: float
    tolerance: Any  # Callable[[np.ndarray], float]

    def counts(self, values: np.ndarray) -> dict[str, int]:
        tol = float(self.tolerance(values))
        return {"greater": int(np.count_nonzero(values >= self.observed - tol)),
                "less": int(np.count_nonzero(values <= self.observed + tol)),
                "absolute": int(np.count_nonzero(np.abs(values - self.centre)
                                                 >= abs(self.observed - self.centre) - tol))}


def monte_carlo_null(task: Any, options: PermutationOptions, arrangements: int, judge: Judge | None) -> ComputedNull:
    """The Monte Carlo null: ``options.resamples`` draws, or (with ``options.precision``) blocks of
    draws until the sequential test decides (``engines.precision``). ``task`` is the engine's range
    task; ranges may run on other workers (``engines.blocks``), with the same numbers."""
    if options.precision is None:
        return ComputedNull(map_resamples(task, options.resamples), MONTE_CARLO, arrangements)
    if judge is None:
        raise EngineError("this test cannot draw its resamples to a decision risk", hint="give resamples instead")
    values, outcome = draw_sequentially(task, options.precision, alternative=options.alternative,
                                        two_sided=options.two_sided, counts=judge.counts)
    return ComputedNull(values, MONTE_CARLO, arrangements, precision=outcome)


def exact_precision(options: PermutationOptions, computation: str) -> PrecisionOutcome | None:
    """The precision entry of a test asked for a decision risk but computed exactly: no draws."""
    if options.precision is None or computation == MONTE_CARLO:
        return None
    return PrecisionOutcome(rule="none needed: the null was computed exactly", parameters={
        "decision_risk": options.precision.risk, "max_resamples": options.precision.max_resamples},
        resamples_used=0, stopped_because=f"exact ({computation})")


@dataclass(frozen=True)
class Description:
    """What the record says about an engine's scheme (words only; the numbers are elsewhere)."""

    n: tuple[int, ...]
    scheme: str
    conventions: Mapping[str, str]
    design: Mapping[str, object] = field(default_factory=dict)


def permutation_result(null: ComputedNull, observed: float, options: PermutationOptions, *, tolerance: float,
                       about: Description, centre: float = 0.0,
                       warnings: tuple[EngineWarning, ...] = ()) -> PermutationResult:
    """p-values of ``observed`` against ``null`` and the result that carries them (the p-value
    warnings first, then the engine's own ``warnings``)."""
    exact_counts = null.exact_weights is not None
    pv = summarize(null.values, observed, exact=null.exact, alternative=options.alternative,
                   two_sided=options.two_sided, tolerance=tolerance, center=centre,
                   weights=null.exact_weights if exact_counts else null.weights,
                   alpha=options.alpha, arrangements=null.arrangements)
    resamples = int(null.values.shape[0]) if null.weights is None else null.arrangements
    if null.exact and min(pv.count_greater, pv.count_less) <= 0:
        # the observed arrangement is one of the arrangements, so both counts hold at least its own
        raise EngineError(f"the observed value {observed!r} lies outside its own exact null distribution "
                          "(its weight is below what the computation can hold, or rounding separated it)",
                          hint="use exact: never (Monte Carlo), whose p-value cannot be 0")
    scale = 0 if exact_counts else null.weight_exponent  # exact integers need no scaling back
    return PermutationResult(
        observed=observed, p_value=pv.p_value, alternative=options.alternative, two_sided_rule=options.two_sided,
        exact=null.exact, arrangements=null.arrangements, resamples=resamples,
        count_greater=unscaled(pv.count_greater, scale), count_less=unscaled(pv.count_less, scale),
        null=frozen_array(null.values), tolerance=tolerance, n=about.n,
        scheme=about.scheme, warnings=pv.warnings + tuple(warnings), conventions=dict(about.conventions),
        p_greater=pv.p_greater, p_less=pv.p_less, count_absolute=unscaled(pv.count_absolute, scale), centre=centre,
        monte_carlo_se=pv.monte_carlo_se, p_interval=pv.p_interval, smallest_p=pv.smallest_p,
        null_weights=None if null.weights is None else frozen_array(null.weights),
        null_weight_exponent=null.weight_exponent,
        null_exact_weights=None if null.exact_weights is None else tuple(int(c) for c in null.exact_weights),
        counts_exact=null.weights is None or exact_counts or null.arrangements <= EXACT_FROM,
        computation=null.computation, design=dict(about.design),
        precision=null.precision or exact_precision(options, null.computation))


def unscaled(count: float | int, exponent: int) -> float | int | str:
    """A DP count held as ``count · 2**exponent``: a float while one holds it, else the same number
    as decimal text in scientific notation (13 significant digits, from its logarithm)."""
    if exponent == 0 or isinstance(count, int):
        return count
    try:
        return math.ldexp(count, exponent)
    except OverflowError:
        return power_of_ten_text(math.log10(count) + exponent * math.log10(2.0))


def power_of_ten_text(power: float) -> str:
    """``10**power`` as decimal text in scientific notation, 13 significant digits: a count too large
    for a float (or for Python to write as int text), e.g. '1.660842939376e+1202'."""
    whole = math.floor(power)
    return f"{10.0 ** (power - whole):.12f}e+{whole}"
