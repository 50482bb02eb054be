"""Frozen result types shared by the engines.

Results hold numbers only (no formatting). They keep what each number came from (the resample
distribution, the counts behind a p-value, the quantile levels behind an interval) so that the
record can be re-derived by hand. Arrays inside are read-only. Because numpy arrays have no
single truth value, the array-carrying results compare by identity (``eq=False``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = [
    "BootstrapResult",
    "EngineWarning",
    "Interval",
    "JackknifeResult",
    "ModelBootstrapResult",
    "NullTest",
    "PermutationResult",
    "ShiftedTest",
    "frozen_array",
]


def frozen_array(values: np.ndarray) -> np.ndarray:
    """A read-only float copy (results must not change after they are made)."""
    a = np.array(values, dtype=np.float64, copy=True)
    a.flags.writeable = False
    return a


@dataclass(frozen=True)
class EngineWarning:
    """A degenerate or doubtful outcome, reported next to the numbers (never a silent NaN)."""

    code: str
    message: str


@dataclass(frozen=True)
class Interval:
    """A confidence interval; ``lower``/``upper`` are None (with a ``note``) when it is undefined.

    ``quantile_levels`` are the levels of the resample distribution the endpoints were read at
    (for BCa the adjusted levels), when the method reads quantiles (None for an open end).
    ``side``: "two-sided", or "lower" / "upper" for a one-sided confidence bound, whose other end
    is open: ``upper`` is +inf for a lower bound, ``lower`` −inf for an upper bound (the record
    writes an open end as null beside ``side``).
    """

    method: str
    level: float
    lower: float | None
    upper: float | None
    note: str | None = None
    quantile_levels: tuple[float | None, float | None] | None = None
    # about 95% Monte Carlo ranges (low, high) of the lower and of the upper endpoint; None when
    # exact (exhaustive enumeration) or undefined; the open end of a one-sided bound has none
    monte_carlo: tuple[tuple[float, float] | None, tuple[float, float] | None] | None = None
    # Monte Carlo s.d. of the lower and of the upper endpoint, by the same rule (intervals.MC_RULE)
    monte_carlo_sd: tuple[float | None, float | None] | None = None
    side: str = "two-sided"


@dataclass(frozen=True)
class NullTest:
    """The p-value of a stated null value from a bootstrap, by inverting the pre-specified interval's
    family of one-sided bounds (``engines.intervals.invert``); ``p_value`` None (with ``note``) when
    that interval is undefined."""

    null_value: float
    method: str  # the interval method inverted
    rule: str
    p_value: float | None
    p_greater: float | None = None
    p_less: float | None = None
    # Monte Carlo s.d. of p_value and an interval for the p-value of B = ∞ (None when exact)
    monte_carlo_sd: float | None = None
    monte_carlo_interval: tuple[float, float] | None = None
    interval_rule: str | None = None
    floored: bool = False  # a p of exactly 0 reported as the smallest p the replicates can resolve
    note: str | None = None


@dataclass(frozen=True, eq=False)
class BootstrapResult:
    """Bootstrap estimate, standard error, bias and intervals of one statistic.

    ``standard_error`` is the sd of the B replicates with divisor B−1; ``bias`` is mean(θ*) − θ̂.
    They are None only when some replicate is not finite (see ``warnings``).
    """

    estimate: float
    standard_error: float | None
    bias: float | None
    intervals: tuple[Interval, ...]
    resamples: int
    scheme: str
    n: tuple[int, ...]
    distribution: np.ndarray
    z0: float | None
    acceleration: float | None
    conventions: dict[str, str] = field(default_factory=dict)
    warnings: tuple[EngineWarning, ...] = ()
    # exhaustive enumeration: every distinct resample once, with its multinomial probability
    exact: bool = False
    weights: np.ndarray | None = None
    # Monte Carlo s.d. of the standard error, SE·sqrt((κ − 1)/(4B)), and of the bias, SE/√B
    # (V-TOL); 0 when exact; None when there is no standard error
    standard_error_sd: float | None = None
    bias_sd: float | None = None
    # scheme-specific facts: fitted parameters, block length, inner standard-error method and cost
    details: dict = field(default_factory=dict)
    # "two-sided" intervals, or one-sided bounds: "greater" (lower bounds), "less" (upper bounds)
    alternative: str = "two-sided"
    null_test: NullTest | None = None  # with a stated null value: its p-value
    precision: object | None = None  # engines.precision.PrecisionOutcome: B chosen to a target accuracy


@dataclass(frozen=True, eq=False)
class ModelBootstrapResult(BootstrapResult):
    """The bootstrap of a model statistic (engines/modelboot.py): a bootstrap result with the p-value
    of a scheme that defines one (wild or wild cluster with the null imposed), else None."""

    p_value: float | None = None


@dataclass(frozen=True, eq=False)
class JackknifeResult:
    """Delete-one jackknife of one statistic (V-CONV-JACK conventions).

    ``replicates[g][i]`` is the statistic with observation i of group g deleted;
    ``pseudo_values[g][i] = n_g θ̂ − (n_g−1) replicates[g][i]``.
    """

    estimate: float
    bias: float
    standard_error: float
    corrected_estimate: float
    replicates: tuple[np.ndarray, ...]
    pseudo_values: tuple[np.ndarray, ...]
    n: tuple[int, ...]
    warnings: tuple[EngineWarning, ...] = ()
    scheme: str = "delete-one observation"
    conventions: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class ShiftedTest:
    """The two-group permutation test at a shifted null, H0: x = y + shift (x − shift against y).

    ``p_greater`` = count_greater / total when exact, (count_greater + 1) / (total + 1) by Monte
    Carlo; likewise ``p_less``.
    """

    shift: float
    count_greater: int
    count_less: int
    total: int
    exact: bool
    p_greater: float
    p_less: float


@dataclass(frozen=True, eq=False)
class PermutationResult:
    """Permutation test of one statistic; ``count_*`` and ``null`` let anyone recompute ``p_value``.

    exact: p_greater = count_greater / arrangements; Monte Carlo: (count_greater + 1) / (resamples + 1);
    likewise for ``less``; two-sided = min(1, 2 min(p_greater, p_less)) (``two_sided_rule="doubled"``).
    """

    observed: float
    p_value: float
    alternative: str
    two_sided_rule: str
    exact: bool
    arrangements: int
    resamples: int
    # a whole number of arrangements or draws: an int when exact (draws, listed arrangements, exact DP
    # integers), else a float sum of DP weights (decimal text beyond 1.8e308); see counts_exact
    count_greater: int | float | str
    count_less: int | float | str
    null: np.ndarray
    tolerance: float
    n: tuple[int, ...]
    scheme: str
    warnings: tuple[EngineWarning, ...] = ()
    conventions: dict[str, str] = field(default_factory=dict)
    # added for the complete permutation tests; defaults keep older constructions valid
    p_greater: float | None = None
    p_less: float | None = None
    count_absolute: int | float | str | None = None  # |T* − centre| ≥ |t − centre| − tolerance
    centre: float = 0.0
    monte_carlo_se: float | None = None  # pvalues.monte_carlo_sd; None when exact
    p_interval: tuple[float, float] | None = None  # Clopper–Pearson for the full-enumeration p
    smallest_p: float | None = None  # the smallest p-value these arrangements can give
    null_weights: np.ndarray | None = None  # arrangements at each null value (exact DP); None: one each
    # the DP weights above are held as weight · 2**null_weight_exponent (beyond the float range; exactdist)
    null_weight_exponent: int = 0
    # the null weights as exact Python integers, where the DP counts pass 2**53
    null_exact_weights: tuple[int, ...] | None = None
    counts_exact: bool = True  # False: DP counts beyond 2**53 held in floating point (13 digits)
    precision: object | None = None  # engines.precision.PrecisionOutcome: resamples drawn to a decision risk
    computation: str = "enumeration"  # enumeration | dynamic programming | Monte Carlo
    intervals: tuple[Interval, ...] = ()
    shift_estimate: float | None = None
    shifted_tests: tuple[ShiftedTest, ...] = ()  # a decision's tests at shifted nulls (margin, limits)
    design: dict[str, object] = field(default_factory=dict)
