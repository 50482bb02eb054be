"""The statistics a plan can name, and the sample checks shared by the engines.

A :class:`Statistic` is a vectorised function of one array per group. Each array has the
observations on its LAST axis and any number of leading batch axes; the function reduces the last
axis and returns the leading shape. ``compute(x)`` with ``x.shape == (rows, n)`` returns ``(rows,)``.

Multi-column observations (``columns > 1``, e.g. a pair (x, y) per subject for a correlation) are
passed to the engines as ``(n, columns)`` arrays, observation axis FIRST as in a table; the engines
hand them to ``compute`` as ``(..., columns, n)`` so that the observation axis is still last.

Every statistic must be a symmetric function of the observations within a group (the engines
may present a group's observations in any order).

Adding a statistic is one :func:`register` call; ``form`` tells the engines about closed forms
("mean": the group mean, or the first group's minus the second's; "median" likewise), which they
use only where verified equal to the plain computation.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.engines.ranks import rankdata
from planrunner.errors import EngineError

__all__ = [
    "MODEL_STATISTICS",
    "PARAMETERS",
    "RATIOS",
    "comparison_word",
    "null_value",
    "STATISTICS",
    "Statistic",
    "bind",
    "bound_statistic",
    "check_samples",
    "check_strata",
    "get_statistic",
    "register",
    "take_observations",
    "to_compute_layout",
]


@dataclass(frozen=True)
class Statistic:
    """A named statistic of one group, or of two groups (first minus second)."""

    name: str
    label: str
    samples: int
    smooth: bool
    outcome: str
    compute: Callable[..., np.ndarray]
    columns: int = 1
    form: str | None = None
    # a statistic with a parameter (e.g. the level of a quantile) names its plan key here and is
    # registered unbound; ``bind`` makes the computable statistic for one value of it
    parameter: str | None = None
    value: float | None = None
    maker: Callable[[float], Callable[..., np.ndarray]] | None = None
    # analytic standard error (same arguments and shapes as ``compute``), for studentized intervals
    se: Callable[..., np.ndarray] | None = None
    se_maker: Callable[[float], Callable[..., np.ndarray]] | None = None
    se_formula: str | None = None

    def __post_init__(self) -> None:
        if self.outcome not in ("numeric", "binary", "censored"):
            raise ValueError(f"outcome must be 'numeric', 'binary' or 'censored', got {self.outcome!r}")
        if self.form not in (None, "mean", "median", "quantile", "survival", "model"):
            raise ValueError(f"unknown form {self.form!r}")
        if self.samples < 0 or self.columns < 1:
            raise ValueError("samples must be >= 0 (0: two or more groups) and columns >= 1")


STATISTICS: dict[str, Statistic] = {}


def register(statistic: Statistic) -> Statistic:
    """Add a statistic to the registry (names are unique)."""
    if statistic.name in STATISTICS:
        raise ValueError(f"statistic {statistic.name!r} is already registered")
    STATISTICS[statistic.name] = statistic
    return statistic


def get_statistic(name: str) -> Statistic:
    """The registered statistic called ``name``; unknown names raise KeyError listing the known ones."""
    try:
        return STATISTICS[name]
    except KeyError:
        known = ", ".join(sorted(STATISTICS))
        raise KeyError(f"unknown statistic {name!r}; known statistics: {known}") from None


def _unbound(*_: np.ndarray) -> np.ndarray:
    raise ValueError("this statistic has a parameter; use bind(statistic, value) first")


# Parameters a plan may give a statistic: plan key -> (lowest, highest, whether the lowest is allowed);
# the highest is never allowed (a 1-quantile is the maximum; trimming half leaves nothing)
PARAMETERS: dict[str, tuple[float, float, bool]] = {"quantile": (0.0, 1.0, False), "trim": (0.0, 0.5, True),
                                                   # a time and a horizon of Kaplan–Meier statistics
                                                   "at": (0.0, math.inf, False), "horizon": (0.0, math.inf, False)}


def bind(statistic: Statistic, value: float | None) -> Statistic:
    """The computable statistic for one value of its parameter (unchanged if it has none)."""
    if statistic.parameter is None:
        if value is not None:
            raise ValueError(f"statistic {statistic.name!r} takes no parameter")
        return statistic
    if value is None:
        raise ValueError(f"statistic {statistic.name!r} needs its {statistic.parameter!r}")
    low, high, low_allowed = PARAMETERS[statistic.parameter]
    if not (low <= value if low_allowed else low < value) or not value < high:
        raise ValueError(f"{statistic.parameter} must lie in {'[' if low_allowed else '('}{low}, {high}), got {value}")
    assert statistic.maker is not None
    return dataclasses.replace(
        statistic, value=float(value), compute=statistic.maker(float(value)),
        se=statistic.se_maker(float(value)) if statistic.se_maker is not None else statistic.se,
        label=statistic.label.replace("{value}", f"{value:g}"))


def bound_statistic(name: str, value: float) -> Statistic:
    """The registered statistic ``name`` bound to ``value``: how a statistic with a parameter travels
    to a worker process (by name and value; its functions are closures, which cannot be pickled)."""
    return bind(get_statistic(name), value)


# --- one group, one column ------------------------------------------------------------------------
# Quantiles use numpy's default definition (linear interpolation between order statistics,
# "type 7"): Q(q) = s[j] + (h − j)(s[j+1] − s[j]) with h = (n − 1)q and j = floor(h).


def _mean(x: np.ndarray) -> np.ndarray:
    return np.mean(x, axis=-1)


def _mean_se(x: np.ndarray) -> np.ndarray:
    return np.std(x, axis=-1, ddof=1) / np.sqrt(x.shape[-1])


def _median(x: np.ndarray) -> np.ndarray:
    return np.median(x, axis=-1)


def _quantile(q: float) -> Callable[[np.ndarray], np.ndarray]:
    def compute(x: np.ndarray) -> np.ndarray:
        return np.quantile(x, q, axis=-1)
    return compute


def _trimmed_mean(trim: float) -> Callable[[np.ndarray], np.ndarray]:
    """Mean after cutting floor(trim·n) observations from each end (as scipy.stats.trim_mean)."""
    def compute(x: np.ndarray) -> np.ndarray:
        n = x.shape[-1]
        k = int(math.floor(trim * n))
        return np.mean(np.sort(x, axis=-1)[..., k:n - k], axis=-1)
    return compute


def _variance(x: np.ndarray) -> np.ndarray:
    return np.var(x, axis=-1, ddof=1)


def _plugin_variance(x: np.ndarray) -> np.ndarray:
    return np.var(x, axis=-1)


def _moments(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    centred = x - x.mean(axis=-1, keepdims=True)
    return np.mean(centred ** 2, axis=-1), np.mean(centred ** 4, axis=-1)


def _plugin_variance_se(x: np.ndarray) -> np.ndarray:
    """Delta-method SE of the plug-in variance, sqrt((m4 − m2²)/n) (V-SPATIAL)."""
    m2, m4 = _moments(x)
    return np.sqrt(np.maximum(m4 - m2 ** 2, 0.0) / x.shape[-1])


def _variance_se(x: np.ndarray) -> np.ndarray:
    n = x.shape[-1]
    return _plugin_variance_se(x) * n / (n - 1)


def _sd(x: np.ndarray) -> np.ndarray:
    return np.std(x, axis=-1, ddof=1)


def _sd_se(x: np.ndarray) -> np.ndarray:
    """Delta method: se(s) = se(s²) / (2s)."""
    return _variance_se(x) / (2.0 * _sd(x))


def _cv(x: np.ndarray) -> np.ndarray:
    return np.std(x, axis=-1, ddof=1) / np.mean(x, axis=-1)


def _mad(x: np.ndarray) -> np.ndarray:
    """Median absolute deviation from the median, unscaled (no 1.4826 normal factor)."""
    return np.median(np.abs(x - np.median(x, axis=-1, keepdims=True)), axis=-1)


def _proportion_se(x: np.ndarray) -> np.ndarray:
    p = np.mean(x, axis=-1)
    return np.sqrt(p * (1.0 - p) / x.shape[-1])


# --- one group, two columns (predictor first, outcome second; shape (..., 2, n)) ----------------


def _pearson(xy: np.ndarray) -> np.ndarray:
    """Pearson correlation of the two columns (predictor, outcome); xy has shape (..., 2, n)."""
    x = xy[..., 0, :] - xy[..., 0, :].mean(axis=-1, keepdims=True)
    y = xy[..., 1, :] - xy[..., 1, :].mean(axis=-1, keepdims=True)
    return (x * y).sum(axis=-1) / np.sqrt((x * x).sum(axis=-1) * (y * y).sum(axis=-1))


def _spearman(xy: np.ndarray) -> np.ndarray:
    """Pearson correlation of the ranks (ties get their average rank), as scipy.stats.spearmanr."""
    return _pearson(rankdata(xy, axis=-1))


def _slope(xy: np.ndarray) -> np.ndarray:
    """Least-squares slope of the outcome on the predictor, Σ(x − x̄)(y − ȳ) / Σ(x − x̄)²."""
    x = xy[..., 0, :] - xy[..., 0, :].mean(axis=-1, keepdims=True)
    y = xy[..., 1, :] - xy[..., 1, :].mean(axis=-1, keepdims=True)
    return (x * y).sum(axis=-1) / (x * x).sum(axis=-1)


def _ratio(xy: np.ndarray) -> np.ndarray:
    """mean(outcome) / mean(predictor)."""
    return xy[..., 1, :].mean(axis=-1) / xy[..., 0, :].mean(axis=-1)


# --- two groups (first, second) ---------------------------------------------------------------------


def _difference(one: Callable[[np.ndarray], np.ndarray]) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    """first group minus second group of a one-group statistic"""

    def compute(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return one(x) - one(y)

    compute.__name__ = f"{one.__name__.lstrip('_')}_difference"
    return compute


def _mean_difference_se(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """sqrt(s1²/n1 + s2²/n2), divisors n − 1 (unpooled)."""
    return np.sqrt(_mean_se(x) ** 2 + _mean_se(y) ** 2)


def _risk_difference_se(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """sqrt(p1(1 − p1)/n1 + p2(1 − p2)/n2)."""
    return np.sqrt(_proportion_se(x) ** 2 + _proportion_se(y) ** 2)


def _ratio_of_means(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    return np.mean(x, axis=-1) / np.mean(y, axis=-1)


def _odds_ratio(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Sample odds ratio p1(1 − p2) / (p2(1 − p1)) (not the conditional MLE)."""
    p1, p2 = np.mean(x, axis=-1), np.mean(y, axis=-1)
    return p1 * (1.0 - p2) / (p2 * (1.0 - p1))


HL_ELEMENTS = 4_000_000  # pairwise differences held at once by the Hodges–Lehmann shift


def _hodges_lehmann(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Median of all n1·n2 differences x_i − y_j (Hodges–Lehmann two-sample shift).

    Evaluated in chunks of leading rows so that the n1·n2 differences per row stay bounded.
    """
    lead = np.broadcast_shapes(x.shape[:-1], y.shape[:-1])
    xs = np.broadcast_to(x, lead + x.shape[-1:]).reshape(-1, x.shape[-1])
    ys = np.broadcast_to(y, lead + y.shape[-1:]).reshape(-1, y.shape[-1])
    pairs = x.shape[-1] * y.shape[-1]
    step = max(1, HL_ELEMENTS // pairs)
    out = np.empty(xs.shape[0], dtype=np.float64)
    for start in range(0, xs.shape[0], step):
        d = xs[start:start + step, :, None] - ys[start:start + step, None, :]
        out[start:start + step] = np.median(d.reshape(d.shape[0], pairs), axis=-1)
    return out.reshape(lead)


register(Statistic("mean", "mean", 1, True, "numeric", _mean, form="mean",
                   se=_mean_se, se_formula="s / sqrt(n), s with divisor n - 1"))
register(Statistic("correlation", "Pearson correlation", 1, True, "numeric", _pearson, columns=2))
register(Statistic("median", "median", 1, False, "numeric", _median, form="median"))
register(Statistic("proportion", "proportion of 1s", 1, True, "binary", _mean, form="mean",
                   se=_proportion_se, se_formula="sqrt(p (1 - p) / n)"))
register(Statistic("mean_difference", "difference in means", 2, True, "numeric",
                   _difference(_mean), form="mean", se=_mean_difference_se,
                   se_formula="sqrt(s1^2/n1 + s2^2/n2), divisors n - 1"))
register(Statistic("median_difference", "difference in medians", 2, False, "numeric",
                   _difference(_median), form="median"))
register(Statistic("quantile", "{value} quantile", 1, False, "numeric", _unbound, form="quantile",
                   parameter="quantile", maker=_quantile))
register(Statistic("trimmed_mean", "{value}-trimmed mean", 1, True, "numeric", _unbound,
                   parameter="trim", maker=_trimmed_mean))
register(Statistic("sd", "standard deviation", 1, True, "numeric", _sd, se=_sd_se,
                   se_formula="delta method: se(s^2) / (2 s)"))
register(Statistic("variance", "variance (divisor n - 1)", 1, True, "numeric", _variance, se=_variance_se,
                   se_formula="delta method: n/(n-1) sqrt((m4 - m2^2) / n)"))
register(Statistic("plugin_variance", "plug-in variance (divisor n)", 1, True, "numeric", _plugin_variance,
                   se=_plugin_variance_se, se_formula="delta method: sqrt((m4 - m2^2) / n)"))
register(Statistic("cv", "coefficient of variation", 1, True, "numeric", _cv))
register(Statistic("mad", "median absolute deviation", 1, False, "numeric", _mad))
register(Statistic("spearman", "Spearman correlation", 1, False, "numeric", _spearman, columns=2))
register(Statistic("slope", "least-squares slope", 1, True, "numeric", _slope, columns=2))
register(Statistic("ratio", "ratio of means (outcome / predictor)", 1, True, "numeric", _ratio, columns=2))
register(Statistic("quantile_difference", "difference in {value} quantiles", 2, False, "numeric", _unbound,
                   form="quantile", parameter="quantile", maker=lambda q: _difference(_quantile(q))))
register(Statistic("ratio_of_means", "ratio of means", 2, True, "numeric", _ratio_of_means))
register(Statistic("risk_difference", "risk difference", 2, True, "binary", _difference(_mean), form="mean",
                   se=_risk_difference_se, se_formula="sqrt(p1 (1 - p1)/n1 + p2 (1 - p2)/n2)"))
register(Statistic("risk_ratio", "risk ratio", 2, True, "binary", _ratio_of_means))
register(Statistic("odds_ratio", "odds ratio", 2, True, "binary", _odds_ratio))
register(Statistic("hodges_lehmann", "Hodges–Lehmann shift", 2, False, "numeric", _hodges_lehmann))



def _model_only(*_: np.ndarray) -> np.ndarray:
    raise EngineError("a model statistic is computed from its design matrix by the model engine",
                      hint="use method: bootstrap (engines/modelboot.py)")


# Model statistics (form "model"): a coefficient of a fitted regression, or its standardised
# predictions; computed from a design matrix by `engines.models` / `engines.modelboot`, never by
# reducing samples, so `compute` refuses.
for _name, _label, _samples, _outcome, _columns in (
        ("adjusted_mean_difference", "covariate-adjusted difference in means (least squares)", 2, "numeric", 1),
        ("standardized_risk_difference", "standardised risk difference (logistic g-computation)", 2, "binary", 1),
        ("standardized_risk_ratio", "standardised risk ratio (logistic g-computation)", 2, "binary", 1),
        ("standardized_odds_ratio", "standardised odds ratio (logistic g-computation)", 2, "binary", 1),
        ("coefficient", "regression coefficient of the predictor, adjusted for covariates", 1, "numeric", 2)):
    register(Statistic(_name, _label, _samples, True, _outcome, _model_only, columns=_columns, form="model"))
MODEL_STATISTICS = frozenset(name for name, s in STATISTICS.items() if s.form == "model")

# two-group statistics that compare by a quotient (first over second), not a difference
RATIOS = frozenset({"ratio_of_means", "risk_ratio", "odds_ratio", "rmst_ratio", "standardized_risk_ratio",
                    "standardized_odds_ratio"})

NO_EFFECT_ZERO = frozenset({"mean_difference", "median_difference", "quantile_difference", "risk_difference",
                            "hodges_lehmann", "correlation", "spearman", "kendall", "slope",
                            "t_pooled", "t_welch"})


def null_value(statistic: object) -> float | None:
    """The statistic's value when there is no effect, from its kind (0 for a difference or an
    association, 1 for a ratio); None when it has none (a mean, a rank sum, an F statistic)."""
    if statistic in RATIOS:
        return 1.0
    return 0.0 if statistic in NO_EFFECT_ZERO else None



def comparison_word(name: str) -> str:
    """How a two-group statistic relates the groups: 'over' for a ratio, 'minus' for a difference."""
    return "over" if name in RATIOS else "minus"


# ---------------------------------------------------------------------------------------------
# Sample checks shared by the engines: what only the data can reveal.


# the largest magnitude whose squares, summed over a billion values, stay finite: sqrt(1.8e308 / 1e9)
MAGNITUDE_LIMIT = 1e149


def check_samples(samples: Sequence[np.ndarray], statistic: Statistic, *, minimum: int = 1,
                  method: str = "this method") -> tuple[np.ndarray, ...]:
    """Validate the groups and return them as float64 arrays, observation axis first.

    Raises EngineError for a wrong number of groups, a wrong shape, a group smaller than
    ``minimum``, a non-finite value, or a non-0/1 value for a binary statistic.
    """
    if len(samples) != statistic.samples and not (statistic.samples == 0 and len(samples) >= 2):
        wanted = "two or more" if statistic.samples == 0 else statistic.samples
        raise EngineError(
            f"statistic {statistic.name!r} takes {wanted} group(s), got {len(samples)}",
            hint="check the groups of the analysis")
    out = []
    for g, raw in enumerate(samples):
        a = np.asarray(raw, dtype=np.float64)
        want = 1 if statistic.columns == 1 else 2
        if a.ndim != want or (want == 2 and a.shape[1] != statistic.columns):
            shape = "(n,)" if want == 1 else f"(n, {statistic.columns})"
            raise EngineError(f"group {g + 1} has shape {a.shape}; {statistic.name!r} needs {shape}")
        n = a.shape[0]
        if n == 0:
            raise EngineError(f"group {g + 1} is empty", hint="check the row filter and the group levels")
        if n < minimum:
            raise EngineError(
                f"group {g + 1} has {n} observation(s); {method} needs at least {minimum}",
                hint="use more data or another method")
        bad = ~np.isfinite(a) if a.ndim == 1 else ~np.isfinite(a).all(axis=1)
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise EngineError(
                f"group {g + 1} has {int(bad.sum())} observation(s) with a non-finite value "
                f"(first: observation {first + 1})",
                hint="declare missing values in the plan (missing: drop) or fix the data")
        largest = float(np.max(np.abs(a))) if a.size else 0.0
        if largest > MAGNITUDE_LIMIT:
            raise EngineError(
                f"group {g + 1} holds a value of magnitude {largest:.3g} (observation "
                f"{int(np.argmax(np.max(np.abs(a), axis=-1) if a.ndim == 2 else np.abs(a))) + 1}); sums of squares "
                f"of such values pass the largest double (1.8e308), so variances, t statistics and standard errors "
                "would be infinite or 0", hint="express the data in other units (e.g. divide by 1e150), or check "
                "the value")
        if statistic.outcome == "binary" and not np.isin(a, (0.0, 1.0)).all():
            raise EngineError(
                f"group {g + 1} has values other than 0 and 1; {statistic.name!r} needs a binary outcome",
                hint="code the outcome as 0/1")
        a = np.ascontiguousarray(a)
        a.flags.writeable = False
        out.append(a)
    return tuple(out)


def check_strata(strata: Sequence[np.ndarray] | None, samples: Sequence[np.ndarray]) -> tuple[np.ndarray, ...] | None:
    """Validate per-group stratum codes (integers, one per observation) and return them as int64."""
    if strata is None:
        return None
    if len(strata) != len(samples):
        raise EngineError(f"strata are given for {len(strata)} group(s) but there are {len(samples)}")
    out = []
    for g, (codes, a) in enumerate(zip(strata, samples)):
        c = np.asarray(codes)
        if c.ndim != 1 or c.shape[0] != a.shape[0]:
            raise EngineError(
                f"group {g + 1} has {a.shape[0]} observation(s) but {c.size} stratum code(s)")
        if c.size and not np.issubdtype(c.dtype, np.integer):
            if not (np.issubdtype(c.dtype, np.floating) and np.all(np.isfinite(c)) and np.all(c == np.round(c))):
                raise EngineError(f"stratum codes of group {g + 1} must be integers")
        out.append(np.asarray(c, dtype=np.int64))
    return tuple(out)


def to_compute_layout(a: np.ndarray) -> np.ndarray:
    """(n,) stays; (n, k) becomes (k, n): observation axis last, as ``compute`` expects."""
    return a if a.ndim == 1 else np.ascontiguousarray(a.T)


def take_observations(a: np.ndarray, index: np.ndarray) -> np.ndarray:
    """Gather observations of ``a`` (observation axis first) by an index array of shape (rows, m).

    Returns a C-contiguous ``(rows, m)`` or ``(rows, k, m)`` array ready for ``compute``;
    contiguity keeps the reductions bit-identical whatever the number of rows in a batch.
    """
    if a.ndim == 1:
        return a[index]
    return np.stack([a[:, c][index] for c in range(a.shape[1])], axis=-2)

