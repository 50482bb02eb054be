"""Bootstrap: standard error, bias, five kinds of interval, and their Monte Carlo error.

Resampling schemes (``BootstrapResult.scheme`` names the one used; draw contracts in
:mod:`planrunner.engines.schemes`):

* nonparametric, independent rows: each group is always resampled separately (the group is a
  stratum); with ``strata`` every (group, stratum) cell is resampled separately, keeping its size;
* pairs (``paired=True``): two groups aligned row by row, whole pairs resampled (within strata);
* clusters: whole clusters resampled within each (group, stratum) cell;
* blocks: moving, circular or stationary blocks of time-ordered data (each group separately);
* parametric: each group drawn from a fitted normal, exponential, Poisson or binomial model;
* exhaustive ("ideal"): every distinct resample once with its multinomial probability (exact;
  only when the count C(2n − 1, n), multiplied over cells, is at most ``EXHAUSTIVE_LIMIT``).

How it runs: :func:`bootstrap` checks the options, prepares the data (pairs, strata, the estimate),
lets the scheme chosen from :data:`SCHEMES` draw, and summarises. Every scheme hands its draws to
``blocks.map_resamples`` as a range task, so an executor may compute ranges of resamples on other
workers with the same numbers.

Memory: a batch holds at most about ``batch_elements`` draws (at least one row); the numbers do
not depend on the batch size.

Conventions (also returned in ``BootstrapResult.conventions``):

* standard error: sd of the B replicates with divisor B − 1 (E&T eq. 6.6); bias: mean(θ*) − θ̂.
  Exhaustive: the exact moments of the weighted distribution (no B − 1).
* quantiles: inverse of the empirical CDF, ``np.quantile(..., method="inverted_cdf")``,
  i.e. the smallest replicate whose empirical CDF reaches the level (level·B within 1e-9 of an
  integer is snapped to it, so float rounding of 1 − confidence cannot shift an endpoint).
* BCa (E&T ch. 14): z0 = Φ⁻¹((#{θ* < θ̂} + #{θ* ≤ θ̂}) / (2B)) (mid-rank, as scipy), with ties
  judged to a relative tolerance (weighted shares when exhaustive); adjusted levels
  Φ(z0 + (z0 + z_α)/(1 − a(z0 + z_α))).
* acceleration from the delete-one jackknife (delete-one cluster with clusters). One sample:
  E&T eq. 14.15, a = Σ(θ̄ − θ_(i))³ / (6 [Σ(θ̄ − θ_(i))²]^{3/2}). Several independently resampled
  samples (groups, or group × stratum cells): E&T eq. 15.36 as in scipy.stats.bootstrap,
  U_ji = (n_j − 1)(θ̄_j − θ_(j,i)), a = Σ_j Σ_i U³/n_j³ / (6 [Σ_j Σ_i U²/n_j²]^{3/2}),
  which reduces to eq. 14.15 for one sample. BCa is refused for blocks (the iid jackknife
  ignores the dependence) and for the parametric scheme.
* studentized: the standard error of each resample is the statistic's analytic one, the
  delete-one jackknife of that resample (B·n extra evaluations), or a nested bootstrap of M inner
  resamples of it (B·M extra evaluations; the data's ŝe is then the outer bootstrap SE); the cost
  is stated in ``details``.
* Monte Carlo error (V-TOL): sd of the SE ≈ SE·√((κ − 1)/(4B)) with κ the kurtosis of the
  replicates, sd of the bias ≈ SE/√B; endpoint ranges from order statistics (see intervals).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, fields, replace
from typing import Any, Protocol, TypeVar

import numpy as np

from planrunner.engines import schemes
from planrunner.engines.blocks import RangeTask, map_resamples
from planrunner.engines.blocks import bind as range_task
from planrunner.engines.intervals import (
    INTERVAL_METHODS,
    INVERSION_RULES,
    Summary,
    bca_levels,
    invert,
    quantile_rank,
    read_quantile,
    tail_levels,
)
from planrunner.engines.jackknife import SMALL_SAMPLE, cluster_replicates, jackknife_replicates
from planrunner.engines.lazy import ndtri
from planrunner.engines.precision import (
    ANDREWS_BUCHINSKY,
    BootstrapPrecision,
    PrecisionOutcome,
    andrews_buchinsky_resamples,
)
from planrunner.engines.pvalues import P_INTERVAL_LEVEL, clopper_pearson
from planrunner.engines.results import BootstrapResult, EngineWarning, Interval, NullTest, frozen_array
from planrunner.engines.statistics import Statistic, check_samples, check_strata, to_compute_layout
from planrunner.engines.streams import DRAW_BLOCK, Stream
from planrunner.errors import EngineError

__all__ = [
    "BootstrapOptions",
    "BootstrapResult",
    "DEGENERATE_CHOICES",
    "INTERVAL_METHODS",
    "TAIL_MINIMUM",
    "bca_acceleration",
    "bca_levels",
    "bootstrap",
    "interval_or_fallback",
    "percentile_of_score",
    "quantile_rank",
    "replicate_moments",
    "tail_count_warnings",
]

# relative; values this close to θ̂ count as ties (rounding, not data): 512 units in the last
# place, so a large common offset (1e7 + readings of 0.001) does not make every replicate a tie
TIE_TOLERANCE = 2.0 ** -43
# The tail-count rule: an endpoint with fewer than TAIL_MINIMUM replicates beyond it is mostly
# noise (common practice; with α/2 = 0.025 it asks B ≥ 400, below the B ≥ 1000 that Efron &
# Tibshirani advise for percentile intervals, from memory).
TAIL_MINIMUM = 10
DEGENERATE_CHOICES = ("fail", "percentile", "estimate-only")
ALTERNATIVES = ("two-sided", "greater", "less")  # greater: a one-sided lower bound; less: an upper bound

CONVENTIONS = {
    "standard_error": "sd of the replicates, divisor B-1 (exhaustive: exact weighted sd)",
    "bias": "mean of the replicates minus the estimate (exhaustive: weighted mean)",
    "quantile": "inverse empirical CDF (numpy method 'inverted_cdf'): smallest replicate whose "
                "empirical CDF reaches the level; level*B within 1e-9 of an integer is snapped to it",
    "bca_z0": "mid-rank: inverse normal of (#{theta* < theta_hat} + #{theta* <= theta_hat}) / (2B), "
              "ties to relative tolerance 2^-43 (about 1.1e-13)",
    "bca_acceleration": "delete-one jackknife (delete-one cluster with clusters), E&T eq. 14.15 for one "
                        "sample; for several independently resampled samples (groups or group x stratum "
                        "cells) E&T eq. 15.36 as in scipy.stats.bootstrap",
    "bca_levels": "Phi(z0 + (z0 + z_alpha) / (1 - a (z0 + z_alpha)))",
    "basic": "(2 theta_hat - q(1 - alpha/2), 2 theta_hat - q(alpha/2))",
    "normal": "(theta_hat - bias) -/+ z(1 - alpha/2) * standard error",
    "studentized": ("t* = (theta* - theta_hat) / se*; "
                    "(theta_hat - se_hat t(1 - alpha/2), theta_hat - se_hat t(alpha/2))"),
    "monte_carlo": "sd(SE) = SE sqrt((kurtosis - 1) / (4B)); sd(bias) = SE / sqrt(B); endpoint ranges "
                   "(about 95%) from the order statistics at ranks B p -/+ 1.96 sqrt(B p (1 - p))",
    "tail_rule": f"warn when fewer than {TAIL_MINIMUM} replicates lie beyond an endpoint",
    "draws": "one uniform row per resample; see the scheme's draw contract",
    "statistics": "quantiles (quantile, quantile_difference) by linear interpolation between order statistics "
                  "(numpy default); median by numpy; mad unscaled; odds_ratio the sample odds ratio; spearman with "
                  "average ranks for ties; sd, variance and cv with divisor n-1",
}


def bca_acceleration(replicates: Sequence[np.ndarray]) -> float:
    """Acceleration from delete-one replicates of one or more independently resampled samples.

    One sample: a = Σ(θ̄ − θ_(i))³ / (6 [Σ(θ̄ − θ_(i))²]^{3/2}) (E&T eq. 14.15). Several: with
    U_ji = (n_j − 1)(θ̄_j − θ_(j,i)), a = Σ U³/n_j³ / (6 [Σ U²/n_j²]^{3/2}) (E&T eq. 15.36, scipy).
    NaN when every replicate equals its sample's mean (no spread to measure skewness with).
    """
    num = 0.0
    den = 0.0
    for reps in replicates:
        r = np.asarray(reps, dtype=np.float64)
        n = r.shape[0]
        if n < 2:
            continue  # a single observation cannot move: U = 0
        u = (n - 1) * (np.mean(r) - r)
        num += float(np.sum(u ** 3)) / n ** 3
        den += float(np.sum(u ** 2)) / n ** 2
    scale = 6.0 * den ** 1.5
    if scale == 0.0 or not math.isfinite(scale):
        return math.nan  # no spread (or one too small to square and cube in floating point)
    return num / scale


def percentile_of_score(distribution: np.ndarray, score: float, tolerance: float,
                        weights: np.ndarray | None = None) -> float:
    """Mid-rank (#{θ* < score} + #{θ* ≤ score}) / (2B), ties judged within ``tolerance``.

    With ``weights`` (exhaustive enumeration) the counts are sums of probabilities.
    """
    below = distribution < score - tolerance
    at_or_below = distribution <= score + tolerance
    if weights is not None:
        return float(np.sum(weights[below]) + np.sum(weights[at_or_below])) / 2.0
    return (np.count_nonzero(below) + np.count_nonzero(at_or_below)) / (2.0 * distribution.shape[0])


class _PairCompute:
    """A two-group statistic computed on (first, second) rows; a class, so that it pickles."""

    def __init__(self, statistic: Statistic):
        self.statistic = statistic

    def __call__(self, xy: np.ndarray) -> np.ndarray:
        return self.statistic.compute(xy[..., 0, :], xy[..., 1, :])


def _paired_mean_se(xy: np.ndarray) -> np.ndarray:
    # a difference of paired means is the mean of the paired differences: its SE is sd(d)/√n
    # (the two-group formula would ignore the pairing)
    d = xy[..., 0, :] - xy[..., 1, :]
    return np.std(d, axis=-1, ddof=1) / np.sqrt(d.shape[-1])


def _pair_statistic(statistic: Statistic) -> Statistic:
    """A two-group statistic seen as a one-sample statistic of (first, second) rows."""
    paired_mean = statistic.form == "mean"
    return replace(statistic, samples=1, columns=2, compute=_PairCompute(statistic),
                   se=_paired_mean_se if paired_mean else None,
                   se_formula="sd(paired differences) / sqrt(n), divisor n - 1" if paired_mean else None,
                   form=None, maker=None, se_maker=None)  # bound already; no makers, so that it pickles


@dataclass(frozen=True)
class BootstrapOptions:
    """What a plan may set for a bootstrap, resolved (compile builds it once per analysis).

    Every engine default is defined here and nowhere else; the plan schema leaves a key it does not
    set as None and compile omits it, so the default below applies. The field order is the order of
    the record's ``settings``.
    """

    resamples: int
    confidence: float
    intervals: tuple[str, ...]
    # how each resample's standard error is found for a studentized interval: "analytic",
    # "jackknife", "bootstrap" (nested) or "model" (the parametric model's own standard error of a
    # mean: the parametric bootstrap-t); None: analytic when the statistic has one
    studentized_se: str | None = None
    inner_resamples: int = 50  # M, the inner resamples of the nested bootstrap standard error
    on_degenerate: str = "estimate-only"  # what to do when an interval is undefined (DEGENERATE_CHOICES)
    blocks: tuple[str, int] | None = None  # (scheme, length) for time-ordered data
    parametric: str | None = None  # the model of the parametric bootstrap
    trials: int | None = None  # the binomial model's number of trials
    exhaustive: bool = False  # enumerate every distinct resample instead of drawing
    save_distribution: bool = False  # the record keeps every replicate (not used by the engine)
    # "two-sided" intervals, or one-sided confidence bounds: "greater" a lower bound, "less" an upper one
    alternative: str = "two-sided"
    # a stated null value: its p-value by inverting the first listed interval's one-sided bounds
    null_value: float | None = None
    # resamples chosen to a target accuracy (engines.precision, Andrews & Buchinsky); ``resamples``
    # then equals precision.max_resamples
    precision: BootstrapPrecision | None = None

    def settings(self) -> dict[str, Any]:
        """The record's ``settings`` (JSON values: tuples become lists)."""
        return record_settings(self)


def record_settings(options: Any) -> dict[str, Any]:
    """A bootstrap engine's options (a dataclass with ``precision``) as the record's ``settings``, in
    field order: tuples become lists, the precision target a mapping."""
    values = ((f.name, getattr(options, f.name)) for f in fields(options) if f.name != "precision")
    out = {name: list(v) if isinstance(v, tuple) else v for name, v in values}
    precision: BootstrapPrecision | None = options.precision
    if precision is not None:
        out["precision"] = {"se_relative": precision.se_relative, "interval_end_sd": precision.interval_end_sd,
                            "max_resamples": precision.max_resamples}
    return out


def bootstrap(samples: Sequence[np.ndarray], statistic: Statistic, options: BootstrapOptions, *,
              stream: Stream, strata: Sequence[np.ndarray] | None = None,
              clusters: Sequence[np.ndarray] | None = None, paired: bool = False,
              batch_elements: int = 2_000_000) -> BootstrapResult:
    """Bootstrap ``statistic`` with ``options`` over resamples drawn from ``stream``.

    ``samples``: one array per group, shape (n_g,) or (n_g, columns), observation axis first.
    ``strata`` / ``clusters``: optional integer codes per group. ``paired``: the two groups are
    aligned pairs (row i of each). ``batch_elements``: about the most draws held at once.
    """
    if options.precision is not None:
        return _to_precision(samples, statistic, options, stream=stream, strata=strata, clusters=clusters,
                             paired=paired, batch_elements=batch_elements)
    scheme = SCHEMES[_scheme_name(options, clusters is not None)]
    _check_options(options, scheme, strata is not None, clusters is not None, paired, batch_elements)
    prepared = _prepare(samples, statistic, options, scheme, strata, clusters, paired)
    drawn = scheme.draw(prepared, options, stream, batch_elements)
    return _summarise(prepared, options, drawn, batch_elements)


def _to_precision(samples: Sequence[np.ndarray], statistic: Statistic, options: BootstrapOptions,
                  **where: Any) -> BootstrapResult:
    """The bootstrap with B chosen by the three-step rule of Andrews & Buchinsky (engines.precision):
    a first stage of B₁ resamples, then the first B of the same stream (B₁ of them the same draws),
    so the result equals a fixed-B run with that B."""
    assert options.precision is not None
    if options.exhaustive:
        raise EngineError("an exhaustive bootstrap has no Monte Carlo error to choose resamples for",
                          hint="remove precision, or exhaustive")
    return run_to_precision(options.precision, lambda resamples: bootstrap(
        samples, statistic, replace(options, resamples=resamples, precision=None), **where))


_Result = TypeVar("_Result", bound=BootstrapResult)


def run_to_precision(target: BootstrapPrecision, run: Callable[[int], _Result]) -> _Result:
    """``run(B)`` (a fixed-B bootstrap) at the B of the three-step rule for ``target``, with the
    precision outcome (the rule's facts, what was achieved, why it stopped) attached."""

    def se_and_kurtosis(result: BootstrapResult) -> tuple[float | None, float | None]:
        return result.standard_error, _kurtosis(np.asarray(result.distribution))

    def end_sds(result: BootstrapResult) -> list[float | None]:
        first = result.intervals[0] if result.intervals else None
        return list(first.monte_carlo_sd) if first is not None and first.monte_carlo_sd is not None else []

    first_stage, resamples, facts = andrews_buchinsky_resamples(
        target, first_stage=run, se_and_kurtosis=se_and_kurtosis, end_sds=end_sds)
    result = run(resamples) if resamples != first_stage else run(first_stage)
    achieved: dict[str, Any] = {}
    if result.standard_error and result.standard_error_sd is not None:
        achieved["se_relative"] = result.standard_error_sd / result.standard_error
    sds = [s for s in end_sds(result) if s is not None]
    if sds:
        achieved["interval_end_sd"] = max(sds)
    reached = all(achieved.get(key) is not None and achieved[key] <= goal * (1 + 1e-12)
                  for key, goal in (("se_relative", target.se_relative), ("interval_end_sd", target.interval_end_sd))
                  if goal is not None)
    capped = facts["resamples_wanted"] > target.max_resamples
    outcome = PrecisionOutcome(
        rule=ANDREWS_BUCHINSKY,
        parameters={"se_relative": target.se_relative, "interval_end_sd": target.interval_end_sd,
                    "max_resamples": target.max_resamples, "block": DRAW_BLOCK, **facts},
        resamples_used=resamples,
        stopped_because="max_resamples" if capped else "target reached" if reached else "rule's B reached",
        achieved=achieved)
    return replace(result, precision=outcome)


# ------------------------------------------------------------------ validate


@dataclass(frozen=True)
class Prepared:
    """The checked data of one bootstrap, as every scheme reads them."""

    data: tuple[np.ndarray, ...]  # one array per group; pairs: one (n, 2) array of (first, second)
    codes: tuple[np.ndarray, ...] | None  # stratum codes per group
    cluster_codes: tuple[np.ndarray, ...] | None
    statistic: Statistic  # the one evaluated (pairs: the one-sample view of the declared statistic)
    declared: Statistic  # as the plan names it (its label and smoothness go into warnings)
    paired: bool
    n: tuple[int, ...]
    inner: str | None  # how each resample's standard error is found for a studentized interval
    lay: schemes.Layout  # the observations cell by cell (every scheme's small-sample checks read it)
    whole: tuple[np.ndarray, ...]  # the data in the statistic's layout
    estimate: float


def _check_options(options: BootstrapOptions, scheme: Scheme, stratified: bool, clustered: bool, paired: bool,
                   batch_elements: int) -> None:
    if options.resamples < 2:
        raise EngineError(f"resamples must be at least 2, got {options.resamples}", hint="use 999 or more")
    if not 0.0 < options.confidence < 1.0:
        raise EngineError(f"confidence must lie strictly between 0 and 1, got {options.confidence}")
    unknown = [m for m in options.intervals if m not in INTERVAL_METHODS]
    if unknown:
        raise EngineError(f"unknown interval method(s) {', '.join(map(repr, unknown))}",
                          hint=f"known: {', '.join(INTERVAL_METHODS)}")
    if options.alternative not in ALTERNATIVES:
        raise EngineError(f"alternative must be one of {', '.join(ALTERNATIVES)}, got {options.alternative!r}")
    if options.on_degenerate not in DEGENERATE_CHOICES:
        raise EngineError(f"on_degenerate must be one of {', '.join(DEGENERATE_CHOICES)}, "
                          f"got {options.on_degenerate!r}")
    if batch_elements < 1:
        raise ValueError("batch_elements must be >= 1")
    chosen = [key for key, given in (("strata", stratified), ("clusters", clustered), ("pairs", paired),
                                     ("blocks", options.blocks is not None),
                                     ("parametric", options.parametric is not None),
                                     ("exhaustive", options.exhaustive)) if given]
    allowed = [{"strata", "clusters"}, {"strata", "pairs"}, {"strata", "exhaustive"},
               {"pairs", "exhaustive"}, {"strata", "pairs", "exhaustive"}]
    if len(chosen) > 1 and set(chosen) not in allowed:
        raise EngineError(f"the bootstrap cannot combine {' and '.join(chosen)}")
    for interval, message, hint in scheme.refused:
        if interval in options.intervals:
            raise EngineError(message, hint=hint)


def _prepare(samples: Sequence[np.ndarray], statistic: Statistic, options: BootstrapOptions, scheme: Scheme,
             strata: Sequence[np.ndarray] | None, clusters: Sequence[np.ndarray] | None,
             paired: bool) -> Prepared:
    data = check_samples(samples, statistic, method="the bootstrap")
    codes = check_strata(strata, data)
    cluster_codes = check_strata(clusters, data)
    work = statistic
    if paired:
        data, codes = _as_pairs(data, codes, statistic)
        work = _pair_statistic(statistic)
    n = tuple(int(a.shape[0]) for a in data)
    inner = _inner_se(options, scheme, work, statistic, n)
    whole = tuple(to_compute_layout(a) for a in data)
    estimate = float(work.compute(*whole))
    if not math.isfinite(estimate):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    return Prepared(data, codes, cluster_codes, work, statistic, paired, n, inner, schemes.layout(data, codes),
                    whole, estimate)


def _as_pairs(data: tuple[np.ndarray, ...], codes: tuple[np.ndarray, ...] | None,
              statistic: Statistic) -> tuple[tuple[np.ndarray, ...], tuple[np.ndarray, ...] | None]:
    """The two aligned groups as one sample of (first, second) rows, and its stratum codes."""
    if statistic.samples != 2 or statistic.columns != 1:
        raise EngineError(f"pairs need a two-group statistic of one column; {statistic.name!r} is not")
    if data[0].shape[0] != data[1].shape[0]:
        raise EngineError(f"pairs need as many rows in each group, got {data[0].shape[0]} and {data[1].shape[0]}")
    if codes is not None:
        if not np.array_equal(codes[0], codes[1]):
            raise EngineError("the two rows of a pair lie in different strata",
                              hint="a pair must lie inside one stratum")
        codes = (codes[0],)
    return (np.ascontiguousarray(np.column_stack(data)),), codes


def _inner_se(options: BootstrapOptions, scheme: Scheme, work: Statistic, statistic: Statistic,
              n: tuple[int, ...]) -> str | None:
    """How each resample's standard error is found (None without a studentized interval)."""
    if "studentized" not in options.intervals:
        return None
    inner = options.studentized_se or ("analytic" if work.se is not None else None)
    if inner is None:
        raise EngineError(f"the {statistic.label} has no analytic standard error",
                          hint="declare studentized_se: jackknife (B x n extra evaluations)")
    if inner == "analytic" and work.se is None:
        raise EngineError(f"the {statistic.label} has no analytic standard error",
                          hint="declare studentized_se: jackknife")
    if inner == "model":
        if options.parametric is None:
            raise EngineError("studentized_se: model needs the parametric bootstrap (the fitted model's own "
                              "standard error)", hint="declare parametric: MODEL, or use analytic or jackknife")
        if statistic.form != "mean" or work.columns != 1:
            raise EngineError(f"the model's standard error is defined for means and differences of means; the "
                              f"{statistic.label} is neither", hint="use studentized_se: analytic or jackknife")
        if min(n) < 1:
            raise EngineError("every group needs an observation")
    if inner == "jackknife" and min(n) < 2:
        raise EngineError("the inner jackknife needs at least two observations per group")
    if inner == "bootstrap":
        if not scheme.nested_se:
            raise EngineError("the nested bootstrap standard error is available for the row, strata and "
                              "pairs schemes only", hint="use studentized_se: jackknife")
        if options.inner_resamples < 10:
            raise EngineError(f"inner_resamples must be at least 10, got {options.inner_resamples}")
    return inner


# ------------------------------------------------------------------ draw (the scheme table)


@dataclass(frozen=True)
class Drawn:
    """What a scheme's draws give: the replicates in resample order, and how they were drawn."""

    distribution: np.ndarray
    se_star: np.ndarray | None  # each resample's standard error (studentized intervals)
    scheme: str  # the scheme in words, for the record
    details: dict[str, Any]
    warnings: tuple[EngineWarning, ...] = ()
    weights: np.ndarray | None = None  # exhaustive: each distinct resample's probability
    clusters: schemes.ClusterLayout | None = None  # the clusters scheme's layout (BCa reads it)


def _mapped(task: RangeTask, total: int, inner: str | None) -> tuple[np.ndarray, np.ndarray | None]:
    """The replicates (and inner standard errors) of resamples [0, total), whose ranges an executor
    may compute anywhere (``engines.blocks``): the numbers are the same."""
    joined = map_resamples(task, total)
    if inner is None:
        return joined, None
    return np.ascontiguousarray(joined[:, 0]), np.ascontiguousarray(joined[:, 1])


def _each_group(data: tuple[np.ndarray, ...]) -> str:
    return ", each group separately" if len(data) > 1 else ""


def _draw_cells(p: Prepared, options: BootstrapOptions, stream: Stream, batch_elements: int) -> Drawn:
    task = range_task(schemes.cells_range, p.lay, p.statistic, stream, batch_elements, p.inner,
                      options.inner_resamples)
    distribution, se_star = _mapped(task, options.resamples, p.inner)
    if p.paired:
        words = "whole pairs resampled" + (" within strata" if p.codes is not None else "")
    elif p.codes is None:
        words = "rows resampled" if len(p.data) == 1 else "each group resampled separately"
    else:
        words = "within group × stratum cells"
    return Drawn(distribution, se_star, words, {})


def _draw_clusters(p: Prepared, options: BootstrapOptions, stream: Stream, batch_elements: int) -> Drawn:
    assert p.cluster_codes is not None
    lay = schemes.cluster_layout(p.data, p.cluster_codes, p.codes)
    task = range_task(schemes.clusters_range, p.data, lay, p.statistic, stream, batch_elements)
    distribution, _ = _mapped(task, options.resamples, None)
    counts = [int(np.sum(lay.slot_group == g)) for g in range(len(p.data))]
    words = "whole clusters resampled" + (" within strata" if p.codes is not None else "") + _each_group(p.data)
    few = [f"group {g + 1} ({k} clusters)" for g, k in enumerate(counts) if k < SMALL_SAMPLE]
    warnings = () if not few else (EngineWarning(
        "few-clusters", f"fewer than {SMALL_SAMPLE} clusters in {', '.join(few)}: the cluster bootstrap "
        "distribution is coarse and its intervals tend to be too narrow"),)
    return Drawn(distribution, None, words, {"clusters": counts}, warnings, clusters=lay)


def _draw_blocks(p: Prepared, options: BootstrapOptions, stream: Stream, batch_elements: int) -> Drawn:
    assert options.blocks is not None
    kind, length = options.blocks
    schemes.check_blocks(p.data, kind, length)
    task = range_task(schemes.blocks_range, p.data, p.statistic, stream, batch_elements, kind, length)
    distribution, _ = _mapped(task, options.resamples, None)
    details = {"blocks": {"scheme": kind, ("mean_length" if kind == "stationary" else "length"): length}}
    words = (f"stationary bootstrap, mean block length {length}" if kind == "stationary"
             else f"{kind}-block bootstrap, block length {length}") + _each_group(p.data)
    return Drawn(distribution, None, words, details)


FITS = {"normal": "maximum likelihood: mean, sd with divisor n",
        "bivariate normal": "maximum likelihood: mean vector, covariance with divisor n (bivariate normal)",
        "exponential": "maximum likelihood: mean", "poisson": "maximum likelihood: rate = mean",
        "binomial": "maximum likelihood: p = mean / trials"}


def _draw_parametric(p: Prepared, options: BootstrapOptions, stream: Stream, batch_elements: int) -> Drawn:
    model, trials = options.parametric, options.trials
    if model not in schemes.MODELS:
        raise EngineError(f"unknown model {model!r}", hint=f"one of: {', '.join(schemes.MODELS)}")
    if model == "binomial" and (trials is None or trials < 1):
        raise EngineError("the binomial model needs the number of trials (at least 1)")
    columns = p.statistic.columns
    if columns > 2 or (columns == 2 and model != "normal"):
        raise EngineError("the parametric bootstrap of two columns needs the (bivariate) normal model")
    fits = [schemes.fit_model(a, model, trials, g) for g, a in enumerate(p.data)]
    details = {"model": model, "fitted_parameters": fits,
               "fit": FITS["bivariate normal" if model == "normal" and columns == 2 else model]}
    task = range_task(schemes.parametric_range, p.data, p.statistic, stream, batch_elements, model, fits, p.inner)
    distribution, se_star = _mapped(task, options.resamples, p.inner)
    words = f"parametric: {model} model fitted by maximum likelihood" + _each_group(p.data)
    return Drawn(distribution, se_star, words, details)


def _draw_exhaustive(p: Prepared, options: BootstrapOptions, stream: Stream, batch_elements: int) -> Drawn:
    enum = schemes.enumeration(p.lay)
    task = range_task(schemes.exhaustive_range, p.lay, enum, p.statistic, batch_elements, p.inner)
    distribution, se_star = _mapped(task, enum.total, p.inner)
    details = {"distinct_resamples": int(distribution.shape[0]), "exhaustive_limit": schemes.EXHAUSTIVE_LIMIT}
    words = "exhaustive enumeration of every distinct resample" + (" of pairs" if p.paired else "") + (
        " within group × stratum cells" if p.codes is not None else "")
    return Drawn(distribution, se_star, words, details, weights=schemes.enumeration_weights(enum))


@dataclass(frozen=True)
class Scheme:
    """One resampling scheme: how it draws, and the intervals it refuses (with why and what instead)."""

    draw: Callable[[Prepared, BootstrapOptions, Stream, int], Drawn]
    refused: tuple[tuple[str, str, str], ...] = ()  # (interval, message, hint), checked in this order
    nested_se: bool = False  # whether a studentized interval may use the nested bootstrap standard error


_NO_BCA_HINT = "use percentile, basic or normal intervals"
SCHEMES: dict[str, Scheme] = {
    "cells": Scheme(_draw_cells, nested_se=True),
    "clusters": Scheme(_draw_clusters, refused=(
        ("studentized", "studentized intervals are not available with clusters",
         "use percentile, basic, normal or bca intervals"),)),
    "blocks": Scheme(_draw_blocks, refused=(
        ("bca", "BCa is refused: for time-ordered data the iid jackknife acceleration ignores the dependence",
         _NO_BCA_HINT),
        ("studentized", "studentized intervals are refused for blocks: the per-resample standard error would "
         "assume independent rows", _NO_BCA_HINT))),
    "parametric": Scheme(_draw_parametric, refused=(
        ("bca", "BCa is refused: the parametric bootstrap has no nonparametric jackknife acceleration",
         _NO_BCA_HINT),)),
    "exhaustive": Scheme(_draw_exhaustive),
}


def _scheme_name(options: BootstrapOptions, clustered: bool) -> str:
    if options.exhaustive:
        return "exhaustive"
    if options.parametric is not None:
        return "parametric"
    if options.blocks is not None:
        return "blocks"
    return "clusters" if clustered else "cells"


# ------------------------------------------------------------------ summarise


def _summarise(p: Prepared, options: BootstrapOptions, drawn: Drawn, batch_elements: int) -> BootstrapResult:
    resamples = int(drawn.distribution.shape[0])
    details = dict(drawn.details)
    warnings = list(drawn.warnings)
    if p.inner is not None:
        details["studentized_se"] = _studentized_details(p, options, resamples)
        if p.inner == "jackknife" and not p.declared.smooth:
            warnings.append(EngineWarning(
                "studentized-non-smooth",
                f"the studentized interval uses the jackknife standard error of each resample, which is unreliable "
                f"for the {p.declared.label} (not a smooth statistic); prefer studentized_se: bootstrap or the "
                "percentile interval"))
    if drawn.clusters is None:
        warnings = _data_warnings(p.n, p.lay, p.codes is not None, p.paired) + warnings
    result = BootstrapResult(
        estimate=p.estimate, standard_error=None, bias=None, intervals=(), resamples=resamples,
        scheme=drawn.scheme, n=p.n, distribution=frozen_array(drawn.distribution), z0=None, acceleration=None,
        conventions=dict(CONVENTIONS), warnings=(), exact=drawn.weights is not None,
        weights=None if drawn.weights is None else frozen_array(drawn.weights), details=details,
        alternative=options.alternative)
    return _with_intervals(result, p, options, drawn, warnings, batch_elements)


def _studentized_details(p: Prepared, options: BootstrapOptions, resamples: int) -> dict[str, Any]:
    m = options.inner_resamples
    extra = {"jackknife": sum(p.n), "bootstrap": m}.get(p.inner or "", 0)
    out: dict[str, Any] = {
        "method": p.inner,
        "formula": {"analytic": p.statistic.se_formula, "jackknife": "delete-one jackknife of each resample",
                    "model": (f"the fitted {options.parametric} model's standard error of each mean: "
                              f"{schemes.MODEL_SE.get(options.parametric or '', '')}"
                              + ("; of a difference: the root of the summed variances" if len(p.n) > 1 else "")),
                    "bootstrap": f"sd (divisor M - 1) of M = {m} inner resamples of each resample; the data's "
                                 "se_hat is the outer bootstrap standard error"}[p.inner or ""],
        "statistic_evaluations": int(resamples * (1 + extra))}
    if p.inner == "bootstrap":
        out["inner_resamples"] = m
        out["inner_stream"] = (f"child {schemes.INNER_LABEL} of the analysis stream; "
                               "inner resample j of resample r is its row r*M + j")
    return out


def _with_intervals(result: BootstrapResult, p: Prepared, options: BootstrapOptions, drawn: Drawn,
                    warnings: list[EngineWarning], batch_elements: int) -> BootstrapResult:
    """The moments, the intervals and their warnings (or the reason there are none)."""
    distribution, weights, resamples = drawn.distribution, drawn.weights, result.resamples
    confidence, on_degenerate = options.confidence, options.on_degenerate

    def finish(**numbers: Any) -> BootstrapResult:
        if options.null_value is not None and "null_test" not in numbers:
            numbers["null_test"] = NullTest(options.null_value, options.intervals[0],
                                            INVERSION_RULES[options.intervals[0]], None,
                                            note="no p-value: the replicates give no interval (see the warnings)")
        return replace(result, warnings=tuple(warnings), **numbers)

    side = {"greater": "lower", "less": "upper"}.get(options.alternative, "two-sided")

    def no_intervals(note: str) -> tuple[Interval, ...]:
        return tuple(Interval(m, confidence, None, None, note=note, side=side) for m in options.intervals)

    finite = np.isfinite(distribution)
    if not finite.all():
        bad = int((~finite).sum())
        if p.declared.outcome == "censored":
            return _not_estimable(result, p, options, distribution, warnings)
        message = (f"the statistic is not finite on {bad} of {resamples} resamples; no standard error, "
                   "bias or interval is reported")
        _degenerate(on_degenerate, message, warnings, "non-finite-replicates")
        return finish(intervals=no_intervals(f"{bad} of {resamples} replicates are not finite"))

    moments = replicate_moments(distribution, weights, p.estimate)
    order = np.argsort(distribution, kind="stable")
    ordered = distribution[order]
    cumulative = None if weights is None else np.cumsum(weights[order])
    lowest, highest = float(distribution.min()), float(distribution.max())
    # all replicates equal up to rounding: constant data (or constant cells); no interval
    if highest - lowest <= 1e-12 * max(abs(lowest), abs(highest)):
        message = (f"all {resamples} bootstrap replicates are equal ({lowest!r}): the data do not vary within "
                   "the resampled units, so no interval can be formed")
        _degenerate(on_degenerate, message, warnings, "degenerate-distribution")
        if on_degenerate == "percentile":
            ends = (-math.inf if side == "upper" else lowest, math.inf if side == "lower" else highest)
            found = tuple(Interval(m, confidence, *ends, side=side,
                                   note="degenerate distribution: the percentile interval (a single point) "
                                        "is reported, as on_degenerate: percentile declares")
                          for m in options.intervals)
            return finish(intervals=found, **moments)
        return finish(intervals=no_intervals(f"all {resamples} replicates equal {lowest!r}"), **moments)

    z0 = acceleration = problem = None
    if "bca" in options.intervals:
        z0, acceleration, problem = _bca(p, drawn, ordered, order, options, batch_elements, warnings)
    t_ordered = t_cumulative = se_hat = t_problem = None
    details = result.details
    if p.inner is not None:
        t_ordered, t_cumulative, se_hat, t_problem = _studentized(p, drawn, moments["standard_error"], options,
                                                                  batch_elements, warnings)
        details = {**details, "se_hat": se_hat}
    exact = weights is not None
    summary = Summary(p.estimate, ordered, cumulative, confidence, moments["standard_error"], moments["bias"],
                      None if exact else moments["standard_error_sd"], None if exact else moments["bias_sd"],
                      z0, acceleration, problem, t_ordered, t_cumulative, se_hat, t_problem, options.alternative)
    found = tuple(interval_or_fallback(m, summary, on_degenerate) for m in options.intervals)
    if not exact:
        for w in tail_count_warnings(found, ordered):
            if w not in warnings:  # a fallback percentile interval repeats the percentile's warning
                warnings.append(w)
    extra: dict[str, Any] = {}
    if options.null_value is not None:
        extra["null_test"] = null_test(options, summary, found[0], weights, warnings)
    return finish(intervals=found, z0=z0, acceleration=acceleration, details=details, **moments, **extra)


P_Z = 2.5758293035489004  # 99.5% normal point: the p-value's Monte Carlo interval is about 99%, as the permutation one


class NullTestOptions(Protocol):
    """What the p-value of a null value reads from an engine's options (the bootstrap's, a model's)."""

    @property
    def null_value(self) -> float | None: ...
    @property
    def intervals(self) -> tuple[str, ...]: ...
    @property
    def alternative(self) -> str: ...
    @property
    def confidence(self) -> float: ...


def null_test(options: NullTestOptions, summary: Summary, first: Interval, weights: np.ndarray | None,
              warnings: list[EngineWarning]) -> NullTest:
    """The p-value of the stated null value by inverting the pre-specified (first) interval's bounds."""
    assert options.null_value is not None
    null, method = options.null_value, options.intervals[0]
    if first.note is not None and first.note.startswith("in place of the undefined"):
        method = "percentile"  # on_degenerate: percentile replaced the pre-specified interval
    rule = INVERSION_RULES[method]
    ordered = summary.ordered
    tolerance = TIE_TOLERANCE * max(abs(null), abs(float(ordered[0])), abs(float(ordered[-1])))
    found = invert(method, summary, null, tolerance)
    if isinstance(found, str):
        return NullTest(null, method, rule, None, note=f"no p-value: the {method} interval is undefined ({found})")
    if options.alternative in ("greater", "less"):
        greater = options.alternative == "greater"
        p = found.p_greater if greater else found.p_less
        sd = found.sd_greater if greater else found.sd_less
        side = 0 if greater else 1
    else:  # doubled: twice the smaller one-sided p, capped at 1
        side = 0 if found.p_greater <= found.p_less else 1
        smaller = (found.p_greater, found.p_less)[side]
        p = min(1.0, 2.0 * smaller)
        one_sd = (found.sd_greater, found.sd_less)[side]
        sd = None if one_sd is None else 2.0 * one_sd
    floored = p <= 0.0
    if floored:  # θ0 beyond every replicate: the smallest p the replicates can resolve (doubled when two-sided)
        step = 1.0 / ordered.shape[0] if weights is None else float(np.min(weights))
        p = min(1.0, step * (2.0 if options.alternative == "two-sided" else 1.0))
    interval = interval_rule = None
    if weights is None:
        if found.counts is not None:
            count, total = found.counts[side]
            lo, hi = clopper_pearson(count, total)
            doubled = options.alternative == "two-sided"
            interval = (min(1.0, 2.0 * lo), min(1.0, 2.0 * hi)) if doubled else (lo, hi)
            interval_rule = (f"{P_INTERVAL_LEVEL:.0%} Clopper-Pearson interval of the replicate count behind the "
                             "p-value" + (" (doubled)" if doubled else ""))
        elif sd is not None:
            interval = (max(0.0, p - P_Z * sd), min(1.0, p + P_Z * sd))
            interval_rule = f"p -/+ {P_Z:.3f} Monte Carlo s.d. (about {P_INTERVAL_LEVEL:.0%}), cut to [0, 1]"
        warnings += alpha_inside(options.confidence, interval, null, ordered.shape[0])
    return NullTest(null, method, rule, float(p), found.p_greater, found.p_less, sd, interval, interval_rule,
                    floored, None if not floored else
                    "no replicate lies on the far side of the null value: p is reported as the smallest value "
                    "the replicates can resolve (1/B, doubled when two-sided; exhaustive: the smallest resample "
                    "probability)")


def alpha_inside(confidence: float, interval: tuple[float, float] | None, null: float,
                 resamples: int) -> list[EngineWarning]:
    """The warning that alpha (1 − confidence) lies inside the p-value's Monte Carlo interval."""
    alpha = round(1.0 - confidence, 12)
    if interval is None or not interval[0] <= alpha <= interval[1]:
        return []
    return [EngineWarning(
        "mc-interval-contains-alpha",
        f"alpha = {alpha:g} (1 - confidence) lies inside the Monte Carlo interval ({interval[0]:.4g}, "
        f"{interval[1]:.4g}) of the p-value of the null value {null:g}: {resamples} resamples "
        "cannot settle the test at this alpha; use more resamples")]


def _not_estimable(result: BootstrapResult, p: Prepared, options: BootstrapOptions, distribution: np.ndarray,
                   warnings: list[EngineWarning]) -> BootstrapResult:
    """A Kaplan–Meier statistic not estimable in some resamples: a quantile not reached (±∞: beyond
    the follow-up) or a curve read beyond a resample's last follow-up (NaN). The share goes into the
    record; ``on_degenerate`` decides: fail, no interval (estimate-only), or (percentile) the
    percentile interval with a not-reached resample ordered beyond every finite one, reported only
    when both endpoints are finite. No standard error or bias (they would need the missing values)."""
    resamples = int(distribution.shape[0])
    beyond = int(np.isinf(distribution).sum())
    undefined = int(np.isnan(distribution).sum())
    bad = beyond + undefined
    share = bad / resamples
    details = {**result.details, "not_estimable": {
        "resamples": bad, "share": share, "quantile_not_reached": beyond, "beyond_last_follow_up": undefined}}
    left = getattr(getattr(p.declared.compute, "spec", None), "flip", None) is not None
    where = "below the detection limits" if left else "beyond the follow-up"
    parts = ([f"{beyond} where a quantile is not reached (it lies {where})"] if beyond else []) + (
        [f"{undefined} where the curve is read beyond the resample's last follow-up"] if undefined else [])
    message = (f"the {p.declared.label} is not estimable in {bad} of {resamples} resamples ({share:.1%}): "
               f"{' and '.join(parts)}; no standard error or bias is reported")
    _degenerate(options.on_degenerate, message, warnings, "not-estimable-resamples")
    confidence = options.confidence
    note = f"{bad} of {resamples} resamples ({share:.1%}) not estimable"
    found = []
    side = {"greater": "lower", "less": "upper"}.get(options.alternative, "two-sided")
    for method in options.intervals:
        interval = Interval(method, confidence, None, None, note=note, side=side)
        if method == "percentile" and options.on_degenerate == "percentile" and undefined == 0:
            ordered = np.sort(distribution)
            levels = tail_levels(confidence, options.alternative)  # a one-sided bound reads one end
            ends = [read_quantile(ordered, None, q) if q is not None else (-math.inf if k == 0 else math.inf)
                    for k, q in enumerate(levels)]
            read = [e for e, q in zip(ends, levels) if q is not None]
            if all(math.isfinite(e) for e in read):
                interval = Interval(method, confidence, ends[0], ends[1], quantile_levels=levels, side=side,
                                    note=f"{note}: ordered beyond every estimable one (not reached), as "
                                         "on_degenerate: percentile declares")
            else:
                interval = Interval(method, confidence, None, None, side=side,
                                    note=f"{note}: an endpoint lies among the not-reached resamples")
        found.append(interval)
    null_test = None if options.null_value is None else NullTest(
        options.null_value, options.intervals[0], INVERSION_RULES[options.intervals[0]], None,
        note=f"no p-value: {note}")
    return replace(result, intervals=tuple(found), details=details, warnings=tuple(warnings), null_test=null_test)


def _read_levels(confidence: float, alternative: str) -> list[float]:
    """The nominal levels whose quantiles the interval reads (one for a one-sided bound)."""
    return [q for q in tail_levels(confidence, alternative) if q is not None]


def _degenerate(on_degenerate: str, message: str, warnings: list[EngineWarning], code: str) -> None:
    """Stop when the plan declares ``on_degenerate: fail``; otherwise a warning."""
    if on_degenerate == "fail":
        raise EngineError(message, hint="on_degenerate: fail was declared in the plan")
    warnings.append(EngineWarning(code, message))


def replicate_moments(distribution: np.ndarray, weights: np.ndarray | None, estimate: float) -> dict[str, float]:
    """Standard error and bias, with their Monte Carlo s.d. (0 when exact)."""
    if weights is not None:
        mean = float(np.sum(weights * distribution))
        standard_error = math.sqrt(float(np.sum(weights * (distribution - mean) ** 2)))
        return {"standard_error": standard_error, "bias": mean - estimate, "standard_error_sd": 0.0,
                "bias_sd": 0.0}
    resamples = distribution.shape[0]
    standard_error = float(np.std(distribution, ddof=1))
    kurtosis = _kurtosis(distribution)
    return {"standard_error": standard_error, "bias": float(np.mean(distribution)) - estimate,
            "standard_error_sd": (standard_error * math.sqrt(max(kurtosis - 1.0, 0.0) / (4 * resamples))
                                  if kurtosis else 0.0),
            "bias_sd": standard_error / math.sqrt(resamples)}


def interval_or_fallback(method: str, summary: Summary, on_degenerate: str) -> Interval:
    """One interval; an undefined BCa or studentized one as ``on_degenerate`` declares."""
    interval = INTERVAL_METHODS[method](summary)
    if interval.lower is None and method in ("bca", "studentized"):
        if on_degenerate == "fail":
            raise EngineError(f"the {method} interval is undefined: {interval.note}",
                              hint="on_degenerate: fail was declared in the plan")
        if on_degenerate == "percentile":
            fallback = INTERVAL_METHODS["percentile"](summary)
            interval = replace(fallback, note=f"in place of the undefined {method} interval ({interval.note}), "
                                              "as on_degenerate: percentile declares")
    return interval


def _bca(p: Prepared, drawn: Drawn, ordered: np.ndarray, order: np.ndarray, options: BootstrapOptions,
         batch_elements: int, warnings: list[EngineWarning]) -> tuple[float | None, float | None, str | None]:
    # ties judged relative to the data's magnitude: rounding, not data, separates such values
    tolerance = TIE_TOLERANCE * max(abs(p.estimate), max(float(np.max(np.abs(a))) for a in p.data))
    z0, acceleration, problem = _bca_constants(p.data, p.statistic, p.lay, drawn.clusters, p.cluster_codes,
                                               ordered, p.estimate, tolerance,
                                               _read_levels(options.confidence, options.alternative), batch_elements,
                                               None if drawn.weights is None else drawn.weights[order])
    if problem is not None:
        warnings.append(EngineWarning("bca-undefined", f"no BCa interval: {problem}"))
    if not p.declared.smooth:
        warnings.append(EngineWarning(
            "bca-non-smooth",
            f"the BCa interval is doubtful for the {p.declared.label}, which is not a smooth statistic: "
            "its jackknife acceleration and the bias correction from a discrete bootstrap "
            "distribution are unreliable; compare with the percentile interval"))
    return z0, acceleration, problem


def _studentized(p: Prepared, drawn: Drawn, standard_error: float, options: BootstrapOptions, batch_elements: int,
                 warnings: list[EngineWarning]) -> tuple[np.ndarray | None, np.ndarray | None, float, str | None]:
    """The sorted t* (and cumulative weights), ŝe, and why there is no studentized interval (or None)."""
    se_star, distribution, estimate = drawn.se_star, drawn.distribution, p.estimate
    assert se_star is not None
    if p.inner == "model":  # the fitted model's standard error of the data's mean(s)
        assert options.parametric is not None
        fits = [schemes.fit_model(a, options.parametric, options.trials, g) for g, a in enumerate(p.data)]
        se_hat = float(schemes.model_se(options.parametric, p.whole, fits))
    else:
        se_hat = (float(p.statistic.se(*p.whole)) if p.inner == "analytic" and p.statistic.se is not None
                  else standard_error if p.inner == "bootstrap" else _jackknife_se(p.data, p.statistic, batch_elements))
    resamples = distribution.shape[0]
    # a resample with se* = 0 but θ* ≠ θ̂ (e.g. all draws of one observation) has t* = ±∞: a
    # legitimate extreme of the t* distribution; 0/0 or a non-finite se* leaves t* undefined
    zero = se_star == 0
    moved = np.abs(distribution - estimate) > TIE_TOLERANCE * max(1.0, abs(estimate))
    undefined = ~np.isfinite(se_star) | (zero & ~moved)
    t_ordered = t_cumulative = t_problem = None
    if undefined.any() or not (math.isfinite(se_hat) and se_hat > 0):
        t_problem = (f"the standard error is undefined (0/0 or not finite) on {int(undefined.sum())} of "
                     f"{resamples} resamples" if undefined.any()
                     else "the standard error of the data is zero or undefined")
    else:
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.where(zero, np.sign(distribution - estimate) * np.inf, (distribution - estimate) / se_star)
        if zero.any():
            warnings.append(EngineWarning(
                "studentized-infinite-t",
                f"{int(zero.sum())} of {resamples} resamples have a zero standard error; their t* is "
                "taken as plus or minus infinity"))
        t_order = np.argsort(t, kind="stable")
        t_ordered = t[t_order]
        t_cumulative = None if drawn.weights is None else np.cumsum(drawn.weights[t_order])
        if not np.isfinite([t_ordered[0], t_ordered[-1]]).all():
            # infinite t* only matter if an endpoint reads them (the t levels are the reflected ones)
            reads = [read_quantile(t_ordered, t_cumulative, 1 - q)
                     for q in _read_levels(options.confidence, options.alternative)]
            if not np.isfinite(reads).all():
                t_problem = ("so many resamples have a zero standard error that an endpoint of the "
                             "studentized interval is infinite")
                t_ordered = t_cumulative = None
    if t_problem is not None:
        warnings.append(EngineWarning("studentized-undefined", f"no studentized interval: {t_problem}"))
    return t_ordered, t_cumulative, se_hat, t_problem


def _kurtosis(values: np.ndarray) -> float | None:
    centred = values - values.mean()
    m2 = float(np.mean(centred ** 2))
    with np.errstate(all="ignore"):
        kurtosis = float(np.mean(centred ** 4) / m2 ** 2) if m2 > 0 else math.nan
    return kurtosis if math.isfinite(kurtosis) else None


def _jackknife_se(data: tuple[np.ndarray, ...], statistic: Statistic, batch_elements: int) -> float:
    """Delete-one jackknife SE of the data (the ŝe of a studentized interval with an inner jackknife)."""
    reps = jackknife_replicates(data, statistic, batch_elements=batch_elements)
    return math.sqrt(sum((r.shape[0] - 1) / r.shape[0] * float(np.sum((r - r.mean()) ** 2)) for r in reps))


def _data_warnings(n: tuple[int, ...], lay: schemes.Layout, stratified: bool, paired: bool) -> list[EngineWarning]:
    warnings = []
    unit = "pairs" if paired else "observations"
    small = [f"group {g + 1} (n = {k})" if not paired else f"{k} pairs" for g, k in enumerate(n) if k < SMALL_SAMPLE]
    if small:
        warnings.append(EngineWarning(  # common practice
            "small-sample",
            f"fewer than {SMALL_SAMPLE} {unit} in {', '.join(small)}: the bootstrap distribution "
            "is coarse and its intervals tend to be too narrow"))
    lonely = sum(1 for _, members in lay.cells if members.shape[0] == 1)
    if stratified and lonely:
        warnings.append(EngineWarning(
            "single-observation-cell",
            f"{lonely} group × stratum cell(s) hold a single observation; such a cell is the same in "
            "every resample and adds no variability"))
    return warnings


def tail_count_warnings(found: tuple[Interval, ...], ordered: np.ndarray) -> list[EngineWarning]:
    """The tail-count rule (common practice): fewer than TAIL_MINIMUM replicates beyond an endpoint."""
    warnings = []
    for iv in found:
        if iv.lower is None or iv.upper is None or iv.method in ("normal", "studentized", "basic"):
            continue  # these endpoints are not read from the replicates' own tails
        below = int(np.count_nonzero(ordered < iv.lower))
        above = int(np.count_nonzero(ordered > iv.upper))
        # the open end of a one-sided bound reads no tail: only the bound's own tail counts
        read = [n for n, end in ((below, iv.lower), (above, iv.upper)) if math.isfinite(end)]
        if min(read) < TAIL_MINIMUM:
            where = (f"below and {above} above the {iv.method} interval" if iv.side == "two-sided" else
                     f"{'below' if iv.side == 'lower' else 'above'} the one-sided {iv.method} {iv.side} bound")
            warnings.append(EngineWarning(
                "few-resamples-in-tail",
                f"only {below if iv.side != 'upper' else above} replicate(s) lie {where} "
                f"(fewer than {TAIL_MINIMUM} in a tail): the endpoint is poorly determined by "
                f"{ordered.shape[0]} resamples; use more resamples"))
    return warnings


def _bca_constants(data: tuple[np.ndarray, ...], statistic: Statistic, lay: schemes.Layout,
                   cl: schemes.ClusterLayout | None, cluster_codes: tuple[np.ndarray, ...] | None,
                   ordered: np.ndarray, estimate: float, tolerance: float, levels: list[float], batch_elements: int,
                   ordered_weights: np.ndarray | None) -> tuple[float | None, float | None, str | None]:
    """z0, acceleration, and the reason BCa is undefined (None when it is defined)."""
    share = percentile_of_score(ordered, estimate, tolerance, ordered_weights)
    z0 = float(ndtri(share))
    if not math.isfinite(z0):
        side = "above" if share == 0.0 else "below"
        return None, None, f"every replicate lies {side} the estimate, so the bias correction z0 is infinite"
    replicates: Sequence[np.ndarray]
    if cl is not None:
        replicates = cluster_replicates(data, statistic, cluster_codes)
        # each (group, stratum) cell of clusters is one independently resampled sample
        assert cluster_codes is not None
        per_cell = [replicates[g][np.searchsorted(np.unique(cluster_codes[g]), cl.codes[list(numbers)])]
                    for g, numbers in cl.cells]
    else:
        if any(a.shape[0] < 2 for a in data):
            return z0, None, "a group has a single observation, so the jackknife acceleration is undefined"
        try:
            replicates = jackknife_replicates(data, statistic, batch_elements=batch_elements)
        except EngineError as exc:  # e.g. a Kaplan–Meier median no longer reached when a row is deleted
            return z0, None, f"the jackknife acceleration is undefined: {exc.message}"
        # each independently resampled cell is one sample of E&T eq. 15.36
        per_cell = [replicates[g][members] for g, members in lay.cells]
    acceleration = bca_acceleration(per_cell)
    if not math.isfinite(acceleration):
        return z0, None, ("the delete-one jackknife values do not vary, so the acceleration is undefined")
    z = z0 + ndtri(np.array(levels))
    if np.any(1.0 - acceleration * z <= 0.0):
        return z0, acceleration, (f"the acceleration {acceleration:.4g} is so large that the level "
                                  "adjustment is not monotone")
    return z0, acceleration, None
