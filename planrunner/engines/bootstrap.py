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
from collections.abc import Sequence
from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np
from scipy.special import ndtri

from planrunner.errors import EngineError
from planrunner.engines import schemes
from planrunner.engines.blocks import bind as range_task
from planrunner.engines.blocks import map_resamples
from planrunner.engines.intervals import INTERVAL_METHODS, Summary, bca_levels, quantile_rank, read_quantile
from planrunner.engines.jackknife import SMALL_SAMPLE, cluster_replicates, jackknife_replicates
from planrunner.engines.results import BootstrapResult, EngineWarning, Interval, frozen_array
from planrunner.engines.statistics import Statistic, check_samples, check_strata, to_compute_layout
from planrunner.engines.streams import Stream

__all__ = [
    "BootstrapOptions",
    "BootstrapResult",
    "DEGENERATE_CHOICES",
    "INTERVAL_METHODS",
    "TAIL_MINIMUM",
    "bca_acceleration",
    "bca_levels",
    "bootstrap",
    "percentile_of_score",
    "quantile_rank",
]

TIE_TOLERANCE = 1e-10  # relative; values this close to θ̂ count as ties (rounding, not data)
# The tail-count rule: an endpoint with fewer than TAIL_MINIMUM replicates beyond it is mostly
# noise (common practice; with α/2 = 0.025 it asks B ≥ 400, below the B ≥ 1000 that Efron &
# Tibshirani advise for percentile intervals, from memory).
TAIL_MINIMUM = 10
DEGENERATE_CHOICES = ("fail", "percentile", "estimate-only")

CONVENTIONS = {
    "standard_error": "sd of the replicates, divisor B-1 (exhaustive: exact weighted sd)",
    "bias": "mean of the replicates minus the estimate (exhaustive: weighted mean)",
    "quantile": "inverse empirical CDF (numpy method 'inverted_cdf'): smallest replicate whose "
                "empirical CDF reaches the level; level*B within 1e-9 of an integer is snapped to it",
    "bca_z0": "mid-rank: inverse normal of (#{theta* < theta_hat} + #{theta* <= theta_hat}) / (2B), "
              "ties to relative tolerance 1e-10",
    "bca_acceleration": "delete-one jackknife (delete-one cluster with clusters), E&T eq. 14.15 for one "
                        "sample; for several independently resampled samples (groups or group x stratum "
                        "cells) E&T eq. 15.36 as in scipy.stats.bootstrap",
    "bca_levels": "Phi(z0 + (z0 + z_alpha) / (1 - a (z0 + z_alpha)))",
    "basic": "(2 theta_hat - q(1 - alpha/2), 2 theta_hat - q(alpha/2))",
    "normal": "(theta_hat - bias) -/+ z(1 - alpha/2) * standard error",
    "studentized": "t* = (theta* - theta_hat) / se*; (theta_hat - se_hat t(1 - alpha/2), theta_hat - se_hat t(alpha/2))",
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


def _pair_statistic(statistic: Statistic) -> Statistic:
    """A two-group statistic seen as a one-sample statistic of (first, second) rows."""
    def compute(xy: np.ndarray) -> np.ndarray:
        return statistic.compute(xy[..., 0, :], xy[..., 1, :])

    se = formula = None
    if statistic.form == "mean":
        # a difference of paired means is the mean of the paired differences: its SE is sd(d)/√n
        # (the two-group formula would ignore the pairing)
        def se(xy: np.ndarray) -> np.ndarray:
            d = xy[..., 0, :] - xy[..., 1, :]
            return np.std(d, axis=-1, ddof=1) / np.sqrt(d.shape[-1])
        formula = "sd(paired differences) / sqrt(n), divisor n - 1"
    return replace(statistic, samples=1, columns=2, compute=compute, se=se, se_formula=formula, form=None)


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
    # "jackknife" or "bootstrap" (nested); None: analytic when the statistic has one
    studentized_se: str | None = None
    inner_resamples: int = 50  # M, the inner resamples of the nested bootstrap standard error
    on_degenerate: str = "estimate-only"  # what to do when an interval is undefined (DEGENERATE_CHOICES)
    blocks: tuple[str, int] | None = None  # (scheme, length) for time-ordered data
    parametric: str | None = None  # the model of the parametric bootstrap
    trials: int | None = None  # the binomial model's number of trials
    exhaustive: bool = False  # enumerate every distinct resample instead of drawing
    save_distribution: bool = False  # the record keeps every replicate (not used by the engine)

    def settings(self) -> dict[str, Any]:
        """The record's ``settings`` (JSON values: tuples become lists)."""
        values = ((f.name, getattr(self, f.name)) for f in fields(self))
        return {name: list(v) if isinstance(v, tuple) else v for name, v in values}


def bootstrap(samples: Sequence[np.ndarray], statistic: Statistic, options: BootstrapOptions, *,
              stream: Stream, strata: Sequence[np.ndarray] | None = None,
              clusters: Sequence[np.ndarray] | None = None, paired: bool = False,
              batch_elements: int = 2_000_000) -> BootstrapResult:
    """Bootstrap ``statistic`` with ``options`` over resamples drawn from ``stream``.

    ``samples``: one array per group, shape (n_g,) or (n_g, columns), observation axis first.
    ``strata`` / ``clusters``: optional integer codes per group. ``paired``: the two groups are
    aligned pairs (row i of each). ``batch_elements``: about the most draws held at once.
    """
    resamples, confidence, intervals = options.resamples, options.confidence, options.intervals
    studentized_se, inner_resamples = options.studentized_se, options.inner_resamples
    on_degenerate, blocks, parametric = options.on_degenerate, options.blocks, options.parametric
    trials, exhaustive = options.trials, options.exhaustive
    if resamples < 2:
        raise EngineError(f"resamples must be at least 2, got {resamples}", hint="use 999 or more")
    if not 0.0 < confidence < 1.0:
        raise EngineError(f"confidence must lie strictly between 0 and 1, got {confidence}")
    unknown = [m for m in intervals if m not in INTERVAL_METHODS]
    if unknown:
        raise EngineError(f"unknown interval method(s) {', '.join(map(repr, unknown))}",
                          hint=f"known: {', '.join(INTERVAL_METHODS)}")
    if on_degenerate not in DEGENERATE_CHOICES:
        raise EngineError(f"on_degenerate must be one of {', '.join(DEGENERATE_CHOICES)}, got {on_degenerate!r}")
    if batch_elements < 1:
        raise ValueError("batch_elements must be >= 1")
    chosen = [k for k, v in (("strata", strata), ("clusters", clusters), ("pairs", paired or None),
                             ("blocks", blocks), ("parametric", parametric), ("exhaustive", exhaustive or None))
              if v is not None]
    allowed = [{"strata", "clusters"}, {"strata", "pairs"}, {"strata", "exhaustive"},
               {"pairs", "exhaustive"}, {"strata", "pairs", "exhaustive"}]
    if len(chosen) > 1 and set(chosen) not in allowed:
        raise EngineError(f"the bootstrap cannot combine {' and '.join(chosen)}")
    dependent = blocks is not None or parametric is not None
    if dependent and "bca" in intervals:
        why = ("for time-ordered data the iid jackknife acceleration ignores the dependence"
               if blocks is not None else "the parametric bootstrap has no nonparametric jackknife acceleration")
        raise EngineError(f"BCa is refused: {why}", hint="use percentile, basic or normal intervals")
    if blocks is not None and "studentized" in intervals:
        raise EngineError("studentized intervals are refused for blocks: the per-resample standard error "
                          "would assume independent rows", hint="use percentile, basic or normal intervals")
    if clusters is not None and "studentized" in intervals:
        raise EngineError("studentized intervals are not available with clusters",
                          hint="use percentile, basic, normal or bca intervals")

    data = check_samples(samples, statistic, method="the bootstrap")
    codes = check_strata(strata, data)
    cluster_codes = check_strata(clusters, data)
    work = statistic
    if paired:
        if statistic.samples != 2 or statistic.columns != 1:
            raise EngineError(f"pairs need a two-group statistic of one column; {statistic.name!r} is not")
        if data[0].shape[0] != data[1].shape[0]:
            raise EngineError(f"pairs need as many rows in each group, got {data[0].shape[0]} and {data[1].shape[0]}")
        if codes is not None:
            if not np.array_equal(codes[0], codes[1]):
                raise EngineError("the two rows of a pair lie in different strata",
                                  hint="a pair must lie inside one stratum")
            codes = (codes[0],)
        data = (np.ascontiguousarray(np.column_stack(data)),)
        work = _pair_statistic(statistic)
    n = tuple(int(a.shape[0]) for a in data)

    inner = None
    if "studentized" in intervals:
        inner = studentized_se or ("analytic" if work.se is not None else None)
        if inner is None:
            raise EngineError(f"the {statistic.label} has no analytic standard error",
                              hint="declare studentized_se: jackknife (B x n extra evaluations)")
        if inner == "analytic" and work.se is None:
            raise EngineError(f"the {statistic.label} has no analytic standard error",
                              hint="declare studentized_se: jackknife")
        if inner == "jackknife" and min(n) < 2:
            raise EngineError("the inner jackknife needs at least two observations per group")
        if inner == "bootstrap":
            if exhaustive or parametric is not None or blocks is not None or clusters is not None:
                raise EngineError("the nested bootstrap standard error is available for the row, strata and "
                                  "pairs schemes only", hint="use studentized_se: jackknife")
            if inner_resamples < 10:
                raise EngineError(f"inner_resamples must be at least 10, got {inner_resamples}")

    whole = [to_compute_layout(a) for a in data]
    estimate = float(work.compute(*whole))
    if not math.isfinite(estimate):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")

    details: dict[str, Any] = {}
    weights = None
    se_star = None
    lay = schemes.layout(data, codes)
    cl = None
    warnings: list[EngineWarning] = []
    if exhaustive:
        distribution, weights, se_star = schemes.enumerate_cells(lay, work, batch_elements, inner)
        details["distinct_resamples"] = int(distribution.shape[0])
        details["exhaustive_limit"] = schemes.EXHAUSTIVE_LIMIT
        resamples = int(distribution.shape[0])
        scheme = "exhaustive enumeration of every distinct resample" + (" of pairs" if paired else "") + (
            " within group × stratum cells" if codes is not None else "")
    elif parametric is not None:
        if parametric not in schemes.MODELS:
            raise EngineError(f"unknown model {parametric!r}", hint=f"one of: {', '.join(schemes.MODELS)}")
        if parametric == "binomial" and (trials is None or trials < 1):
            raise EngineError("the binomial model needs the number of trials (at least 1)")
        if statistic.columns > 2 or (statistic.columns == 2 and parametric != "normal"):
            raise EngineError("the parametric bootstrap of two columns needs the (bivariate) normal model")
        fits = [schemes.fit_model(a, parametric, trials, g) for g, a in enumerate(data)]
        details["model"] = parametric
        details["fitted_parameters"] = fits
        details["fit"] = {"normal": "maximum likelihood: mean, sd with divisor n" if statistic.columns == 1
                          else "maximum likelihood: mean vector, covariance with divisor n (bivariate normal)",
                          "exponential": "maximum likelihood: mean", "poisson": "maximum likelihood: rate = mean",
                          "binomial": "maximum likelihood: p = mean / trials"}[parametric]
        distribution, se_star = schemes.draw_parametric(data, work, resamples, stream, batch_elements,
                                                        model=parametric, fits=fits, inner=inner)
        scheme = f"parametric: {parametric} model fitted by maximum likelihood" + (
            ", each group separately" if len(data) > 1 else "")
    elif blocks is not None:
        kind, length = blocks
        if kind not in schemes.BLOCK_SCHEMES:
            raise EngineError(f"unknown block scheme {kind!r}", hint=f"one of: {', '.join(schemes.BLOCK_SCHEMES)}")
        if length < 1:
            raise EngineError(f"the block length must be at least 1, got {length}")
        distribution = schemes.draw_blocks(data, work, resamples, stream, batch_elements, scheme=kind, length=length)
        details["blocks"] = {"scheme": kind, ("mean_length" if kind == "stationary" else "length"): length}
        scheme = (f"stationary bootstrap, mean block length {length}" if kind == "stationary"
                  else f"{kind}-block bootstrap, block length {length}") + (
            ", each group separately" if len(data) > 1 else "")
    elif cluster_codes is not None:
        cl = schemes.cluster_layout(data, cluster_codes, codes)
        distribution = schemes.draw_clusters(data, cl, work, resamples, stream, batch_elements)
        counts = [int(np.sum(cl.slot_group == g)) for g in range(len(data))]
        details["clusters"] = counts
        scheme = "whole clusters resampled" + (" within strata" if codes is not None else "") + (
            ", each group separately" if len(data) > 1 else "")
        few = [f"group {g + 1} ({k} clusters)" for g, k in enumerate(counts) if k < SMALL_SAMPLE]
        if few:
            warnings.append(EngineWarning(
                "few-clusters", f"fewer than {SMALL_SAMPLE} clusters in {', '.join(few)}: the cluster bootstrap "
                "distribution is coarse and its intervals tend to be too narrow"))
    else:
        if inner is None:
            # ranges of resamples may run on other workers (engines.blocks); the same numbers
            distribution = map_resamples(range_task(_cells_range, lay, work, stream, batch_elements), resamples)
            se_star = None
        else:
            distribution, se_star = schemes.draw_cells(lay, work, resamples, stream, batch_elements, inner,
                                                       inner_resamples)
        if paired:
            scheme = "whole pairs resampled" + (" within strata" if codes is not None else "")
        elif codes is None:
            scheme = "rows resampled" if len(data) == 1 else "each group resampled separately"
        else:
            scheme = "within group × stratum cells"
    if inner is not None:
        extra = {"jackknife": sum(n), "bootstrap": inner_resamples}.get(inner, 0)
        details["studentized_se"] = {
            "method": inner,
            "formula": {"analytic": work.se_formula, "jackknife": "delete-one jackknife of each resample",
                        "bootstrap": f"sd (divisor M - 1) of M = {inner_resamples} inner resamples of each "
                                     "resample; the data's se_hat is the outer bootstrap standard error"}[inner],
            "statistic_evaluations": int(resamples * (1 + extra))}
        if inner == "bootstrap":
            details["studentized_se"]["inner_resamples"] = inner_resamples
            details["studentized_se"]["inner_stream"] = f"child {schemes.INNER_LABEL} of the analysis stream; " \
                "inner resample j of resample r is its row r*M + j"

    if inner == "jackknife" and not statistic.smooth:
        warnings.append(EngineWarning(
            "studentized-non-smooth",
            f"the studentized interval uses the jackknife standard error of each resample, which is unreliable "
            f"for the {statistic.label} (not a smooth statistic); prefer studentized_se: bootstrap or the "
            "percentile interval"))
    if cl is None:
        warnings = _data_warnings(n, lay, codes is not None, paired) + warnings
    exact = weights is not None

    def finish(standard_error: float | None, bias: float | None, found: tuple[Interval, ...],
               z0: float | None = None, acceleration: float | None = None,
               se_sd: float | None = None, bias_sd: float | None = None) -> BootstrapResult:
        return BootstrapResult(
            estimate=estimate, standard_error=standard_error, bias=bias, intervals=found,
            resamples=resamples, scheme=scheme, n=n, distribution=frozen_array(distribution),
            z0=z0, acceleration=acceleration, conventions=dict(CONVENTIONS), warnings=tuple(warnings),
            exact=exact, weights=None if weights is None else frozen_array(weights),
            standard_error_sd=se_sd, bias_sd=bias_sd, details=details)

    def no_intervals(note: str) -> tuple[Interval, ...]:
        return tuple(Interval(m, confidence, None, None, note=note) for m in intervals)

    finite = np.isfinite(distribution)
    if not finite.all():
        bad = int((~finite).sum())
        message = (f"the statistic is not finite on {bad} of {resamples} resamples; no standard error, "
                   "bias or interval is reported")
        if on_degenerate == "fail":
            raise EngineError(message, hint="on_degenerate: fail was declared in the plan")
        warnings.append(EngineWarning("non-finite-replicates", message))
        return finish(None, None, no_intervals(f"{bad} of {resamples} replicates are not finite"))

    if exact:
        assert weights is not None
        mean = float(np.sum(weights * distribution))
        standard_error = math.sqrt(float(np.sum(weights * (distribution - mean) ** 2)))
        bias = mean - estimate
        se_sd = bias_sd = 0.0
    else:
        standard_error = float(np.std(distribution, ddof=1))
        bias = float(np.mean(distribution)) - estimate
        kurtosis = _kurtosis(distribution)
        se_sd = standard_error * math.sqrt(max(kurtosis - 1.0, 0.0) / (4 * resamples)) if kurtosis else 0.0
        bias_sd = standard_error / math.sqrt(resamples)
    lowest, highest = float(distribution.min()), float(distribution.max())

    order = np.argsort(distribution, kind="stable")
    ordered = distribution[order]
    cumulative = None if weights is None else np.cumsum(weights[order])

    # all replicates equal up to rounding: constant data (or constant cells); no interval
    if highest - lowest <= 1e-12 * max(abs(lowest), abs(highest)):
        message = (f"all {resamples} bootstrap replicates are equal ({lowest!r}): the data do not vary within "
                   "the resampled units, so no interval can be formed")
        if on_degenerate == "fail":
            raise EngineError(message, hint="on_degenerate: fail was declared in the plan")
        warnings.append(EngineWarning("degenerate-distribution", message))
        if on_degenerate == "percentile":
            found = tuple(Interval(m, confidence, lowest, highest,
                                   note="degenerate distribution: the percentile interval (a single point) "
                                        "is reported, as on_degenerate: percentile declares")
                          for m in intervals)
            return finish(standard_error, bias, found, se_sd=se_sd, bias_sd=bias_sd)
        return finish(standard_error, bias, no_intervals(f"all {resamples} replicates equal {lowest!r}"),
                      se_sd=se_sd, bias_sd=bias_sd)

    z0 = acceleration = problem = None
    if "bca" in intervals:
        # ties judged relative to the data's magnitude: rounding, not data, separates such values
        tolerance = TIE_TOLERANCE * max(abs(estimate), max(float(np.max(np.abs(a))) for a in data))
        z0, acceleration, problem = _bca_constants(data, work, lay, cl, cluster_codes, ordered, estimate,
                                                   tolerance, confidence, batch_elements,
                                                   None if weights is None else weights[order])
        if problem is not None:
            warnings.append(EngineWarning("bca-undefined", f"no BCa interval: {problem}"))
        if not statistic.smooth:
            warnings.append(EngineWarning(
                "bca-non-smooth",
                f"the BCa interval is doubtful for the {statistic.label}, which is not a smooth statistic: "
                "its jackknife acceleration and the bias correction from a discrete bootstrap "
                "distribution are unreliable; compare with the percentile interval"))

    t_ordered = t_cumulative = se_hat = t_problem = None
    if inner is not None:
        assert se_star is not None
        se_hat = (float(work.se(*whole)) if inner == "analytic" else standard_error if inner == "bootstrap"
                  else _jackknife_se(data, work, batch_elements))
        # a resample with se* = 0 but θ* ≠ θ̂ (e.g. all draws of one observation) has t* = ±∞: a
        # legitimate extreme of the t* distribution; 0/0 or a non-finite se* leaves t* undefined
        zero = se_star == 0
        moved = np.abs(distribution - estimate) > TIE_TOLERANCE * max(1.0, abs(estimate))
        undefined = ~np.isfinite(se_star) | (zero & ~moved)
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
            t_cumulative = None if weights is None else np.cumsum(weights[t_order])
            ends = [t_ordered[0], t_ordered[-1]]
            if not np.isfinite(ends).all():
                # infinite t* only matter if an endpoint reads them
                alpha = 1.0 - confidence
                reads = [read_quantile(t_ordered, t_cumulative, p) for p in (alpha / 2, 1 - alpha / 2)]
                if not np.isfinite(reads).all():
                    t_problem = ("so many resamples have a zero standard error that an endpoint of the "
                                 "studentized interval is infinite")
                    t_ordered = t_cumulative = None
        if t_problem is not None:
            warnings.append(EngineWarning("studentized-undefined", f"no studentized interval: {t_problem}"))
        details["se_hat"] = se_hat

    summary = Summary(estimate, ordered, cumulative, confidence, standard_error, bias,
                      None if exact else se_sd, None if exact else bias_sd, z0, acceleration, problem,
                      t_ordered, t_cumulative, se_hat, t_problem)
    found = []
    for m in intervals:
        interval = INTERVAL_METHODS[m](summary)
        if interval.lower is None and m in ("bca", "studentized"):
            if on_degenerate == "fail":
                raise EngineError(f"the {m} interval is undefined: {interval.note}",
                                  hint="on_degenerate: fail was declared in the plan")
            if on_degenerate == "percentile":
                fallback = INTERVAL_METHODS["percentile"](summary)
                interval = replace(fallback, note=f"in place of the undefined {m} interval ({interval.note}), "
                                                  "as on_degenerate: percentile declares")
        found.append(interval)
    if not exact:
        for w in _tail_warnings(tuple(found), ordered):
            if w not in warnings:  # a fallback percentile interval repeats the percentile's warning
                warnings.append(w)
    return finish(standard_error, bias, tuple(found), z0, acceleration, se_sd, bias_sd)


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


def _tail_warnings(found: tuple[Interval, ...], ordered: np.ndarray) -> list[EngineWarning]:
    """The tail-count rule (common practice): fewer than TAIL_MINIMUM replicates beyond an endpoint."""
    warnings = []
    for iv in found:
        if iv.lower is None or iv.upper is None or iv.method in ("normal", "studentized", "basic"):
            continue  # these endpoints are not read from the replicates' own tails
        below = int(np.count_nonzero(ordered < iv.lower))
        above = int(np.count_nonzero(ordered > iv.upper))
        if min(below, above) < TAIL_MINIMUM:
            warnings.append(EngineWarning(
                "few-resamples-in-tail",
                f"only {below} replicate(s) lie below and {above} above the {iv.method} interval "
                f"(fewer than {TAIL_MINIMUM} in a tail): the endpoint is poorly determined by "
                f"{ordered.shape[0]} resamples; use more resamples"))
    return warnings


def _bca_constants(data: tuple[np.ndarray, ...], statistic: Statistic, lay: schemes.Layout,
                   cl: schemes.ClusterLayout | None, cluster_codes: tuple[np.ndarray, ...] | None,
                   ordered: np.ndarray, estimate: float, tolerance: float, confidence: float, batch_elements: int,
                   ordered_weights: np.ndarray | None) -> tuple[float | None, float | None, str | None]:
    """z0, acceleration, and the reason BCa is undefined (None when it is defined)."""
    share = percentile_of_score(ordered, estimate, tolerance, ordered_weights)
    z0 = float(ndtri(share))
    if not math.isfinite(z0):
        side = "above" if share == 0.0 else "below"
        return None, None, f"every replicate lies {side} the estimate, so the bias correction z0 is infinite"
    if cl is not None:
        replicates = cluster_replicates(data, statistic, cluster_codes)
        # each (group, stratum) cell of clusters is one independently resampled sample
        assert cluster_codes is not None
        per_cell = [replicates[g][np.searchsorted(np.unique(cluster_codes[g]), cl.codes[list(numbers)])]
                    for g, numbers in cl.cells]
    else:
        if any(a.shape[0] < 2 for a in data):
            return z0, None, "a group has a single observation, so the jackknife acceleration is undefined"
        replicates = jackknife_replicates(data, statistic, batch_elements=batch_elements)
        # each independently resampled cell is one sample of E&T eq. 15.36
        per_cell = [replicates[g][members] for g, members in lay.cells]
    acceleration = bca_acceleration(per_cell)
    if not math.isfinite(acceleration):
        return z0, None, ("the delete-one jackknife values do not vary, so the acceleration is undefined")
    alpha = 1.0 - confidence
    z = z0 + ndtri(np.array([alpha / 2, 1 - alpha / 2]))
    if np.any(1.0 - acceleration * z <= 0.0):
        return z0, acceleration, (f"the acceleration {acceleration:.4g} is so large that the level "
                                  "adjustment is not monotone")
    return z0, acceleration, None


def _cells_range(lay: schemes.Layout, statistic: Statistic, stream: Stream, batch_elements: int,
                 start: int, stop: int) -> np.ndarray:
    """Replicates of resamples [start, stop) of the cells scheme (a picklable range task)."""
    return schemes.draw_cells(lay, statistic, stop - start, stream, batch_elements, None, start=start)[0]
