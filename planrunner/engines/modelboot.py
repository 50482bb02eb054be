"""The bootstrap of a model statistic: cases, residual, wild and wild cluster resampling.

Schemes (``model_resampling``; formulas in :mod:`planrunner.engines.models`):

* ``cases``: whole rows (with clusters: whole clusters) drawn with replacement within each group ×
  stratum cell, the model refitted on each resample. Least squares: the normal equations of a
  resample are Σ c_i x_i x_iᵀ and Σ c_i x_i y_i with c_i the times row i is drawn, solved for a whole
  batch at once. Logistic regression: batched Newton steps from the full-data fit (at most
  ``NEWTON_STEPS``); a resample that does not converge, or shows separation, gives a non-finite
  replicate, reported as such.
* ``residual`` (least squares only): y* = Xβ̂ + e*, e* drawn with replacement from the residuals
  rescaled by √(n/(n − p)) (Davison & Hinkley 1997, §6.2.3), so that E*[var] = s²(XᵀX)⁻¹.
* ``wild`` (least squares only): y* = Xβ̂ + e_i·v_i with independent weights v of mean 0 and
  variance 1: Rademacher (±1, each with probability 1/2) or Mammen's two-point weights
  (−(√5 − 1)/2 with probability (√5 + 1)/(2√5), else (√5 + 1)/2). Its variance of a coefficient is
  the HC0 variance exactly in expectation: var*(aᵀ(e∘v)) = Σ a_i²e_i².
* ``wild-cluster``: one weight per cluster, shared by its rows (Cameron, Gelbach & Miller 2008,
  REStat 90(3)). With Rademacher weights and at most ``ENUMERATE_CLUSTERS`` clusters the 2^G sign
  vectors are enumerated exactly (each with weight 2^−G) instead of drawn.

With ``impose_null`` (wild and wild cluster) the data are generated from the fit whose target
coefficient is fixed at the null value V (``null_value``, else 0): y* = X₀β̃ + V·target + ẽ∘v, β̃
the least squares of y − V·target on the other columns. With t = (θ̂ − V)/ŝe and t* = (θ* − V)/se*
(the robust standard errors below) the p-value is, by ``alternative``, the share of |t*| ≥ |t|
(two-sided, CGM 2008's symmetric wild cluster bootstrap-t), of t* ≥ t (greater) or of t* ≤ t (less);
Monte Carlo p = (1 + count)/(B + 1), enumerated p = count/2^G (a count of 0 floored at 2^−G).
Without it, ``alternative`` makes one-sided bounds and ``null_value`` is tested by inverting the
pre-specified interval, as for every bootstrap (`bootstrap.null_test`); ``precision`` chooses B by
`bootstrap.run_to_precision` (refused where the sign vectors are enumerated: no Monte Carlo error).

Standard errors of a resample (studentized intervals, p-values), the same formula for the data's
ŝe: residual: classical s·√((XᵀX)⁻¹_jj); wild and cases: HC1; wild cluster and cases with clusters:
cluster-robust (CR1). A logistic coefficient (cases): the same sandwich with the logistic bread
(XᵀWX)⁻¹ and residuals y − μ. A standardised effect (cases): the delta method on the sandwich of the
stacked estimating equations of (β, p₁, p₀) (`models.standardized_influence`), with the HC1 or CR1
factor.

Speed: no Python loop per resample. Resamples are computed in chunks of ``CHUNK`` consecutive
resamples (chunk k holds resamples kC … kC + C − 1, whatever range a worker was given), each chunk
by a few matrix products of fixed shape, so every resample's number is the same whatever the
executor or the range split (a worker whose range starts inside a chunk computes the whole chunk
and keeps its part). Draws come from the analysis stream through ``UniformRows`` (row r of resample r).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from planrunner.engines.blocks import bind as range_task
from planrunner.engines.blocks import map_resamples
from planrunner.engines.bootstrap import (
    ALTERNATIVES,
    TIE_TOLERANCE,
    alpha_inside,
    bca_acceleration,
    interval_or_fallback,
    null_test,
    percentile_of_score,
    record_settings,
    replicate_moments,
    run_to_precision,
    tail_count_warnings,
)
from planrunner.engines.intervals import INVERSION_RULES, Summary, tail_levels
from planrunner.engines.lazy import ndtri
from planrunner.engines.models import (
    LINEAR,
    Design,
    Fit,
    check_rank,
    effect,
    expit,
    fit_logistic,
    fit_ols,
    robust_covariance,
    solve_each,
    standardized,
    standardized_influence,
)
from planrunner.engines.precision import BootstrapPrecision
from planrunner.engines.pvalues import P_INTERVAL_LEVEL, clopper_pearson
from planrunner.engines.results import EngineWarning, Interval, ModelBootstrapResult, NullTest, frozen_array
from planrunner.engines.streams import Stream, UniformRows
from planrunner.errors import EngineError

__all__ = ["ModelBootstrapOptions", "ModelBootstrapResult", "model_bootstrap"]

CHUNK = 32  # resamples per matrix product (fixed: see the module doc)
ENUMERATE_CLUSTERS = 12  # Rademacher wild cluster weights are enumerated when G ≤ this (2^12 = 4096)
MIN_WILD_CLUSTERS = 5  # fewer clusters are refused: 2^G sign vectors leave too few distinct t* (common practice)
NEWTON_STEPS = 25  # batched Newton steps at most for a logistic resample
MAMMEN_LOW = -(math.sqrt(5.0) - 1.0) / 2.0
MAMMEN_HIGH = (math.sqrt(5.0) + 1.0) / 2.0
MAMMEN_P_LOW = (math.sqrt(5.0) + 1.0) / (2.0 * math.sqrt(5.0))
SCHEMES = ("cases", "residual", "wild", "wild-cluster")
LEAST_SQUARES_ONLY = ("residual", "wild", "wild-cluster")


@dataclass(frozen=True)
class ModelBootstrapOptions:
    """What a plan may set for the bootstrap of a model statistic (the field order is the record's)."""

    resamples: int
    confidence: float
    intervals: tuple[str, ...]
    model: str  # "linear" or "logistic"
    model_resampling: str = "cases"
    weights: str = "rademacher"  # wild schemes only
    impose_null: bool = False
    on_degenerate: str = "estimate-only"
    save_distribution: bool = False
    # "two-sided" intervals, or one-sided bounds ("greater": lower, "less": upper); with the null
    # imposed, the side of the bootstrap-t p-value
    alternative: str = "two-sided"
    # the value the p-value tests: imposed on the data (impose_null), else found by inverting the
    # pre-specified interval (as for every bootstrap)
    null_value: float | None = None
    precision: BootstrapPrecision | None = None  # resamples chosen to a target (Andrews & Buchinsky)

    def settings(self) -> dict[str, Any]:
        return record_settings(self)


@dataclass(frozen=True, eq=False)
class _Prepared:
    design: Design
    statistic: str
    options: ModelBootstrapOptions
    fit: Fit
    estimate: float
    base: np.ndarray  # the fitted values the schemes add noise to (X₀β̃ under the null)
    noise: np.ndarray  # the residuals they resample or weight
    q: np.ndarray  # Q of the QR of X (least squares)
    a: np.ndarray  # row `target` of (XᵀX)⁻¹Xᵀ
    se_kind: str | None  # "classical", "HC1", "cluster" or None
    groups: int  # clusters G (0 without clusters)
    enumerated: bool  # wild cluster with Rademacher weights and G ≤ ENUMERATE_CLUSTERS: all 2^G vectors
    null: float  # the value imposed (impose_null) or tested; 0 when the plan states none
    slots: tuple[int, np.ndarray, np.ndarray, np.ndarray]  # cases: units, their cell order, slot starts and sizes


def model_bootstrap(design: Design, statistic: str, options: ModelBootstrapOptions, *, stream: Stream,
                    what: str = "the model") -> ModelBootstrapResult:
    """Bootstrap a model statistic (``statistic`` a name of `models.LINEAR` or `models.STANDARDIZED`)."""
    if options.precision is not None:
        _prepare(design, statistic, options, what)  # refusals before the first stage
        return run_to_precision(options.precision, lambda resamples: model_bootstrap(
            design, statistic, replace(options, resamples=resamples, precision=None), stream=stream, what=what))
    p = _prepare(design, statistic, options, what)
    enumerate_all = p.enumerated
    total = 2 ** p.groups if enumerate_all else options.resamples
    studentized = "studentized" in options.intervals or options.impose_null
    task = range_task(_range, p, stream, enumerate_all, studentized)
    joined = map_resamples(task, total)
    replicates = np.ascontiguousarray(joined[:, 0])
    se_star = np.ascontiguousarray(joined[:, 1]) if studentized else None
    weights = np.full(total, 1.0 / total) if enumerate_all else None
    return _summarise(p, replicates, se_star, weights, stream, what)


# ------------------------------------------------------------------ prepare


def check_model(design: Design, statistic: str, options: ModelBootstrapOptions) -> None:
    """What a run would refuse (scheme, rank, separation, too few clusters), found without resampling."""
    _prepare(design, statistic, options, "the model")


def _prepare(design: Design, statistic: str, options: ModelBootstrapOptions, what: str) -> _Prepared:
    scheme = options.model_resampling
    if scheme not in SCHEMES:
        raise EngineError(f"unknown model_resampling {scheme!r}", hint=f"one of: {', '.join(SCHEMES)}")
    logistic = options.model == "logistic"
    if logistic and scheme in LEAST_SQUARES_ONLY:
        raise EngineError(f"model_resampling: {scheme} resamples residuals of a least-squares fit; a "
                          "logistic regression has none that can be resampled", hint="use model_resampling: cases")
    if scheme == "residual" and design.clusters is not None:
        raise EngineError("a residual bootstrap treats the residuals as exchangeable across rows, which "
                          "clusters contradict", hint="use model_resampling: wild-cluster or cases")
    if scheme == "wild-cluster" and design.clusters is None:
        raise EngineError("model_resampling: wild-cluster needs clusters", hint="declare clusters: COLUMN")
    if options.impose_null and scheme not in ("wild", "wild-cluster"):
        raise EngineError("impose_null applies to the wild and wild-cluster schemes",
                          hint="remove impose_null, or use model_resampling: wild-cluster")
    if "bca" in options.intervals and scheme != "cases":
        raise EngineError("BCa is available for model_resampling: cases only (its acceleration is a "
                          "delete-one jackknife of rows)", hint="use percentile, basic, normal or studentized")
    if options.alternative not in ALTERNATIVES:
        raise EngineError(f"alternative must be one of {', '.join(ALTERNATIVES)}, got {options.alternative!r}")
    groups = 0 if design.clusters is None else int(design.clusters.max()) + 1
    if scheme == "wild-cluster" and groups < MIN_WILD_CLUSTERS:
        raise EngineError(f"{groups} clusters are too few for a wild cluster bootstrap (at least "
                          f"{MIN_WILD_CLUSTERS}: {2 ** groups} sign vectors give too coarse a distribution)",
                          hint="use more clusters, or report the analysis without resampling clusters")
    enumerated = scheme == "wild-cluster" and options.weights == "rademacher" and groups <= ENUMERATE_CLUSTERS
    if enumerated and options.precision is not None:
        raise EngineError(f"with {groups} clusters the wild cluster bootstrap enumerates all 2^{groups} sign "
                          "vectors exactly: there is no Monte Carlo error to choose resamples for",
                          hint="remove precision (the enumeration is exact), or use weights: mammen")
    check_rank(design, what)
    x, y, target = design.x, design.y, design.target
    if logistic:
        fit = fit_logistic(x, y, what, design.names)
        q = np.empty((0, 0))
        a = np.empty(0)
    else:
        fit = fit_ols(x, y)
        q = np.linalg.qr(x)[0]
        a = (fit.bread @ x.T)[target]
    estimate = _estimate(statistic, fit.beta, x, target)
    if not math.isfinite(estimate):
        raise EngineError(f"the {statistic.replace('_', ' ')} is not finite on the data")
    base, noise = fit.fitted, fit.residuals
    null = 0.0 if options.null_value is None else float(options.null_value)
    if options.impose_null:  # the restricted fit: target coefficient fixed at the null value
        offset = null * x[:, target]
        restricted = fit_ols(np.delete(x, target, axis=1), y - offset)
        base, noise = restricted.fitted + offset, restricted.residuals
    elif scheme == "residual":
        noise = fit.residuals * math.sqrt(design.n / (design.n - design.p))
    se_kind = {"residual": "classical", "wild": "HC1", "wild-cluster": "cluster",
               "cases": "cluster" if design.clusters is not None else "HC1"}[scheme]
    return _Prepared(design, statistic, options, fit, estimate, base, noise, q, a, se_kind, groups, enumerated,
                     null, _slots(design))


def _slots(design: Design) -> tuple[int, np.ndarray, np.ndarray, np.ndarray]:
    """The cases draw's layout, found once: the units (rows or clusters) sorted by cell, and for each
    drawn slot the first position and the size of its cell in that order."""
    units, unit_cells = _units(design)
    order = np.argsort(unit_cells, kind="stable")
    _, starts, sizes = np.unique(unit_cells[order], return_index=True, return_counts=True)
    return units, order, np.repeat(starts, sizes), np.repeat(sizes, sizes)


def _estimate(statistic: str, beta: np.ndarray, x: np.ndarray, target: int) -> float:
    if statistic in LINEAR:
        return float(beta[target])
    p1, p0 = standardized(beta, x, target)
    return float(effect(statistic, p1, p0))


def data_standard_error(p: _Prepared) -> float:
    """ŝe of the data, by the scheme's standard-error formula (module doc)."""
    x, fit, target = p.design.x, p.fit, p.design.target
    if p.se_kind == "classical":
        s2 = float(fit.residuals @ fit.residuals) / (p.design.n - p.design.p)
        return math.sqrt(s2 * fit.bread[target, target])
    if p.options.model == "logistic":  # the resamples' formula on the data (every row counted once)
        return float(_case_standard_errors(p, fit.beta[None, :], np.ones((1, p.design.n)))[0])
    kind = "cluster" if p.se_kind == "cluster" else "HC1"
    return math.sqrt(robust_covariance(x, fit, kind, p.design.clusters)[target, target])


# ------------------------------------------------------------------ draw


def _range(p: _Prepared, stream: Stream, enumerate_all: bool, studentized: bool, start: int, stop: int) -> np.ndarray:
    """Replicates (and standard errors) of resamples [start, stop), computed chunk by chunk."""
    out = np.empty((stop - start, 2))
    first = start // CHUNK
    for chunk in range(first, (stop + CHUNK - 1) // CHUNK):
        lo = chunk * CHUNK
        theta, se = _chunk(p, stream, enumerate_all, studentized, lo)
        keep_lo, keep_hi = max(lo, start), min(lo + CHUNK, stop)
        out[keep_lo - start:keep_hi - start, 0] = theta[keep_lo - lo:keep_hi - lo]
        out[keep_lo - start:keep_hi - start, 1] = se[keep_lo - lo:keep_hi - lo]
    return out


def _chunk(p: _Prepared, stream: Stream, enumerate_all: bool, studentized: bool,
           lo: int) -> tuple[np.ndarray, np.ndarray]:
    scheme = p.options.model_resampling
    if scheme == "cases":
        return _cases(p, _case_counts(p, stream, lo), studentized)
    design = p.design
    if scheme == "residual":
        u = UniformRows(stream, design.n, lo).take(CHUNK)
        index = (u * design.n).astype(np.intp)
        noise = p.noise[index]
    elif scheme == "wild":
        noise = p.noise * _weights(UniformRows(stream, design.n, lo).take(CHUNK), p.options.weights)
    else:
        assert design.clusters is not None
        if enumerate_all:
            numbers = np.arange(lo, lo + CHUNK)[:, None]
            bits = (numbers >> np.arange(p.groups)[None, :]) & 1
            v = np.where(bits == 1, 1.0, -1.0)
        else:
            v = _weights(UniformRows(stream, p.groups, lo).take(CHUNK), p.options.weights)
        noise = p.noise * v[:, design.clusters]
    return _linear_replicates(p, noise, studentized)


def _weights(u: np.ndarray, kind: str) -> np.ndarray:
    if kind == "rademacher":
        return np.where(u < 0.5, -1.0, 1.0)
    return np.where(u < MAMMEN_P_LOW, MAMMEN_LOW, MAMMEN_HIGH)


def _linear_replicates(p: _Prepared, noise: np.ndarray, studentized: bool) -> tuple[np.ndarray, np.ndarray]:
    """θ* = aᵀ(base + noise) for each row of ``noise``; se* from the refit's residuals M·noise."""
    theta = float(p.a @ p.base) + noise @ p.a
    if not studentized:
        return theta, np.zeros_like(theta)
    residuals = noise - (noise @ p.q) @ p.q.T  # base lies in the column space of X: M·base = 0
    return theta, _se_from_residuals(p, residuals)


def _se_from_residuals(p: _Prepared, residuals: np.ndarray) -> np.ndarray:
    n, k = p.design.n, p.design.p
    if p.se_kind == "classical":
        s2 = np.sum(residuals * residuals, axis=1) / (n - k)
        return np.sqrt(s2 * p.fit.bread[p.design.target, p.design.target])
    if p.se_kind == "HC1":
        return np.sqrt(n / (n - k) * ((residuals * residuals) @ (p.a * p.a)))
    assert p.design.clusters is not None
    summed = (residuals * p.a) @ _indicator(p.design.clusters, p.groups)
    factor = p.groups / (p.groups - 1) * (n - 1) / (n - k)
    return np.sqrt(factor * np.sum(summed * summed, axis=1))


def _indicator(codes: np.ndarray, count: int) -> np.ndarray:
    out = np.zeros((codes.shape[0], count))
    out[np.arange(codes.shape[0]), codes] = 1.0
    return out


def _case_counts(p: _Prepared, stream: Stream, lo: int) -> np.ndarray:
    """How often each row is drawn in each resample of the chunk (CHUNK, n): rows (or clusters)
    drawn with replacement within their cell, one uniform per drawn unit."""
    design = p.design
    units, order, slot_start, slot_size = p.slots
    u = UniformRows(stream, units, lo).take(CHUNK)
    drawn = order[slot_start + (u * slot_size).astype(np.intp)]
    flat = (drawn + (np.arange(CHUNK) * units)[:, None]).ravel()
    counts = np.bincount(flat, minlength=CHUNK * units).reshape(CHUNK, units).astype(np.float64)
    if design.clusters is None:
        return counts
    return counts[:, design.clusters]


def _units(design: Design) -> tuple[int, np.ndarray]:
    """The resampled units (rows, or clusters) and the cell of each; clusters that span cells are
    resampled together, across cells."""
    if design.clusters is None:
        return design.n, design.cells
    groups = int(design.clusters.max()) + 1
    first = np.zeros(groups, dtype=np.intp)
    first[design.clusters[::-1]] = design.cells[::-1]
    nested = bool(np.all(first[design.clusters] == design.cells))
    return groups, (first if nested else np.zeros(groups, dtype=np.intp))


def _cases(p: _Prepared, counts: np.ndarray, studentized: bool) -> tuple[np.ndarray, np.ndarray]:
    """Refit on each resample given by its row counts (CHUNK, n); see the module doc."""
    x, y, target = p.design.x, p.design.y, p.design.target
    k = x.shape[1]
    outer = (x[:, :, None] * x[:, None, :]).reshape(x.shape[0], k * k)
    if p.options.model == "linear":
        gram = (counts @ outer).reshape(-1, k, k)
        beta = solve_each(gram, counts @ (x * y[:, None]))
    else:
        beta = np.repeat(p.fit.beta[None, :], counts.shape[0], axis=0)
        for _ in range(NEWTON_STEPS):
            mu = expit(beta @ x.T)
            hessian = ((counts * mu * (1.0 - mu)) @ outer).reshape(-1, k, k)
            step = solve_each(hessian, (counts * (y - mu)) @ x)
            beta = beta + step
            if not np.any(np.abs(step) > 1e-10 * np.maximum(1.0, np.abs(beta))):
                break
        mu = expit(beta @ x.T)
        unsettled = np.any(np.abs(step) > 1e-8 * np.maximum(1.0, np.abs(beta)), axis=1)
        separated = np.any((counts > 0) & ((mu < 1e-8) | (mu > 1.0 - 1e-8)), axis=1)
        beta[unsettled | separated] = np.nan
    if p.statistic in LINEAR:
        theta = beta[:, target]
    else:
        p1, p0 = standardized(beta, x, target, counts / counts.sum(axis=1, keepdims=True))
        theta = effect(p.statistic, p1, p0)
    if not studentized:
        return theta, np.zeros_like(theta)
    return theta, _case_standard_errors(p, beta, counts)


def _case_standard_errors(p: _Prepared, beta: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """The robust standard error of each refit (``beta`` (R, p) on rows counted ``counts`` (R, n)):
    √(factor·Σᵢ cᵢuᵢ²), or with clusters √(factor·Σ_g (copies of g)·(Σ_{i∈g} uᵢ)²), each drawn copy
    of a cluster a cluster of the resample. uᵢ is row i's share of the error: the coefficient's
    [(XᵀCWX)⁻¹xᵢ]_target·(yᵢ − μᵢ) (W = 1 for least squares, so HC1/CR1 of the refit), or a
    standardised effect's ψ_cov,i + ψ_β,i (`models.standardized_influence`); factor n/(n − p), or
    G/(G − 1)·(n − 1)/(n − p) with clusters."""
    x, y, target = p.design.x, p.design.y, p.design.target
    n, k = x.shape
    if p.statistic in LINEAR:
        mu = beta @ x.T if p.options.model == "linear" else expit(beta @ x.T)
        w = counts if p.options.model == "linear" else counts * mu * (1.0 - mu)
        outer = (x[:, :, None] * x[:, None, :]).reshape(n, k * k)
        unit = np.zeros((beta.shape[0], k))
        unit[:, target] = 1.0
        a_rows = solve_each((w @ outer).reshape(-1, k, k), unit) @ x.T  # row `target` of (XᵀCWX)⁻¹Xᵀ
        shares = a_rows * (y[None, :] - mu)
    else:
        psi_cov, psi_beta = standardized_influence(p.statistic, beta, x, y, target, counts)
        shares = psi_cov + psi_beta
    if p.design.clusters is None:
        return np.sqrt(n / (n - k) * np.sum(counts * shares * shares, axis=1))
    copies = np.zeros((counts.shape[0], p.groups))
    copies[:, p.design.clusters] = counts
    sums = shares @ _indicator(p.design.clusters, p.groups)
    factor = p.groups / (p.groups - 1) * (n - 1) / (n - k)
    return np.sqrt(factor * np.sum(copies * sums * sums, axis=1))


# ------------------------------------------------------------------ summarise


def _summarise(p: _Prepared, distribution: np.ndarray, se_star: np.ndarray | None, weights: np.ndarray | None,
               stream: Stream, what: str) -> ModelBootstrapResult:
    options = p.options
    confidence, resamples = options.confidence, int(distribution.shape[0])
    scheme_words = _scheme_words(p, weights is not None)
    details: dict[str, Any] = {"model": options.model, "columns": list(p.design.names),
                               "coefficients": [float(b) for b in p.fit.beta],
                               "standard_error_formula": _se_words(p), "chunk": CHUNK}
    if p.groups:
        details["clusters"] = p.groups
    warnings: list[EngineWarning] = []
    side = {"greater": "lower", "less": "upper"}.get(options.alternative, "two-sided")
    result = ModelBootstrapResult(
        estimate=p.estimate, standard_error=None, bias=None, intervals=(), resamples=resamples, scheme=scheme_words,
        n=(p.design.n,), distribution=frozen_array(distribution), z0=None, acceleration=None,
        conventions=_conventions(p), exact=weights is not None,
        weights=None if weights is None else frozen_array(weights), details=details,
        alternative=options.alternative)

    def no_intervals(note: str) -> tuple[Interval, ...]:
        return tuple(Interval(m, confidence, None, None, note=note, side=side) for m in options.intervals)

    bad = ~np.isfinite(distribution)
    if bad.any():
        message = (f"the model could not be refitted on {int(bad.sum())} of {resamples} resamples (a covariate "
                   "level or an outcome value lost, or separation in the resample); no standard error, bias or "
                   "interval is reported")
        if options.on_degenerate == "fail":
            raise EngineError(f"{message}", hint="on_degenerate: fail was declared in the plan")
        warnings.append(EngineWarning("non-finite-replicates", message))
        no_p = None if options.null_value is None or options.impose_null else NullTest(
            options.null_value, options.intervals[0], INVERSION_RULES[options.intervals[0]], None,
            note=f"no p-value: {int(bad.sum())} of {resamples} replicates are not finite")
        return replace(result, warnings=tuple(warnings), intervals=no_intervals(message), null_test=no_p)
    moments = replicate_moments(distribution, weights, p.estimate)
    if options.impose_null:
        assert se_star is not None
        test = _imposed_null_test(p, distribution, se_star, weights, details, warnings)
        note = ("the null is imposed: the replicates are drawn under the null value, so they give a "
                "p-value, not an interval")
        return replace(result, warnings=tuple(warnings), p_value=test.p_value, null_test=test,
                       standard_error=moments["standard_error"], standard_error_sd=moments["standard_error_sd"],
                       intervals=no_intervals(note))
    order = np.argsort(distribution, kind="stable")
    ordered = distribution[order]
    cumulative = None if weights is None else np.cumsum(weights[order])
    z0 = acceleration = bca_problem = None
    if "bca" in options.intervals:
        z0, acceleration, bca_problem = _bca(p, ordered, confidence)
        if bca_problem:
            warnings.append(EngineWarning("bca-undefined", f"no BCa interval: {bca_problem}"))
    t_ordered = t_cumulative = se_hat_value = t_problem = None
    if "studentized" in options.intervals:
        assert se_star is not None
        se_hat_value = data_standard_error(p)
        details["se_hat"] = se_hat_value
        unusable = ~(se_star > 0) | ~np.isfinite(se_star)
        if unusable.any() or not (math.isfinite(se_hat_value) and se_hat_value > 0):
            t_problem = (f"the standard error is zero or not finite on {int(unusable.sum())} resamples"
                         if unusable.any() else "the standard error of the data is zero or not finite")
            warnings.append(EngineWarning("studentized-undefined", f"no studentized interval: {t_problem}"))
        else:
            t = (distribution - p.estimate) / se_star
            t_order = np.argsort(t, kind="stable")
            t_ordered = t[t_order]
            t_cumulative = None if weights is None else np.cumsum(weights[t_order])
    exact = weights is not None
    summary = Summary(p.estimate, ordered, cumulative, confidence, moments["standard_error"], moments["bias"],
                      None if exact else moments["standard_error_sd"], None if exact else moments["bias_sd"],
                      z0, acceleration, bca_problem, t_ordered, t_cumulative, se_hat_value, t_problem,
                      options.alternative)
    found = tuple(interval_or_fallback(m, summary, options.on_degenerate) for m in options.intervals)
    if not exact:
        warnings += [w for w in tail_count_warnings(found, ordered) if w not in warnings]
    inverted = None if options.null_value is None else null_test(options, summary, found[0], weights, warnings)
    return replace(result, warnings=tuple(warnings), intervals=found, z0=z0, acceleration=acceleration,
                   standard_error=moments["standard_error"], bias=moments["bias"],
                   standard_error_sd=moments["standard_error_sd"], bias_sd=moments["bias_sd"],
                   null_test=inverted, p_value=None if inverted is None else inverted.p_value)


IMPOSED_NULL_RULES = {
    "two-sided": "share of |t*| >= |t| (symmetric, as Cameron, Gelbach & Miller 2008)",
    "greater": "share of t* >= t (evidence that the coefficient exceeds the null value)",
    "less": "share of t* <= t (evidence that the coefficient is below the null value)",
}


def _imposed_null_test(p: _Prepared, distribution: np.ndarray, se_star: np.ndarray, weights: np.ndarray | None,
                       details: dict[str, Any], warnings: list[EngineWarning]) -> NullTest:
    """The bootstrap-t p-value with the null imposed: t = (θ̂ − V)/ŝe against t* = (θ* − V)/se* of
    resamples drawn from the restricted fit; Monte Carlo (1 + count)/(B + 1), enumerated Σ of the
    weights of the vectors counted (never 0: at least the smallest vector's weight, `floored`)."""
    options, null = p.options, p.null
    se_hat = data_standard_error(p)
    t = (p.estimate - null) / se_hat
    with np.errstate(divide="ignore", invalid="ignore"):
        t_star = (distribution - null) / se_star
    tolerance = 1e-10 * max(abs(t), 1.0)
    hits = {"two-sided": np.abs(t_star) >= abs(t) - tolerance, "greater": t_star >= t - tolerance,
            "less": t_star <= t + tolerance}
    resamples = int(distribution.shape[0])

    def share(mask: np.ndarray) -> float:
        if weights is not None:
            return float(np.sum(weights[mask]))
        return (1.0 + float(mask.sum())) / (resamples + 1)

    counted = hits[options.alternative]
    p_value = min(1.0, share(counted))
    floored = False
    if weights is not None and p_value <= 0.0:
        floored, p_value = True, float(np.min(weights))
    sd: float | None = None
    interval: tuple[float, float] | None = None
    interval_rule: str | None = None
    if weights is None:
        count = int(counted.sum())
        sd = math.sqrt(p_value * (1.0 - p_value) / resamples)
        interval = clopper_pearson(count, resamples)
        interval_rule = f"{P_INTERVAL_LEVEL:.0%} Clopper-Pearson interval of the count of t* behind the p-value"
        warnings += alpha_inside(options.confidence, interval, null, resamples)
    details.update(se_hat=se_hat, t=t, count_absolute=int(hits["two-sided"].sum()),
                   count_greater_equal=int(hits["greater"].sum()), count_less_equal=int(hits["less"].sum()),
                   imposed_null={"null_value": null, "alternative": options.alternative,
                                 "rule": IMPOSED_NULL_RULES[options.alternative],
                                 "statistic": "t = (estimate - null value) / se_hat against t* = (theta* - null "
                                              "value) / se* of the resamples drawn from the fit with the target "
                                              "coefficient fixed at the null value",
                                 "p_value_rule": "Monte Carlo (1 + count)/(B + 1); enumerated: the share of the "
                                                 "2^G sign vectors counted"})
    return NullTest(null, "imposed-null bootstrap-t", IMPOSED_NULL_RULES[options.alternative], p_value,
                    share(hits["greater"]), share(hits["less"]), sd, interval, interval_rule, floored,
                    None if not floored else "no sign vector gives a t* as extreme as t: p is reported as the "
                                             "weight of one vector, 1/2^G")


def _bca(p: _Prepared, ordered: np.ndarray, confidence: float) -> tuple[float | None, float | None, str | None]:
    """z0 from the replicates; the acceleration from the delete-one (row or cluster) jackknife, each
    cell of resampled units one sample of E&T eq. 15.36."""
    tolerance = TIE_TOLERANCE * max(abs(p.estimate), 1.0)
    z0 = float(ndtri(percentile_of_score(ordered, p.estimate, tolerance)))
    if not math.isfinite(z0):
        return None, None, "every replicate lies on one side of the estimate, so z0 is infinite"
    units, unit_cells = _units(p.design)
    replicates = np.empty(units)
    for lo in range(0, units, CHUNK):
        keep = np.ones((CHUNK, units))
        rows = np.arange(lo, min(lo + CHUNK, units))
        keep[np.arange(rows.size), rows] = 0.0
        counts = keep if p.design.clusters is None else keep[:, p.design.clusters]
        replicates[rows] = _cases(p, counts, False)[0][:rows.size]
    if not np.all(np.isfinite(replicates)):
        return z0, None, "the model cannot be refitted on every delete-one sample"
    acceleration = bca_acceleration([replicates[unit_cells == c] for c in np.unique(unit_cells)])
    if not math.isfinite(acceleration):
        return z0, None, "the delete-one jackknife values do not vary, so the acceleration is undefined"
    levels = [q for q in tail_levels(confidence, p.options.alternative) if q is not None]  # the ends read
    z = z0 + ndtri(np.array(levels))
    if np.any(1.0 - acceleration * z <= 0.0):
        return z0, acceleration, (f"the acceleration {acceleration:.4g} is so large that the level adjustment "
                                  "is not monotone")
    return z0, acceleration, None


def _scheme_words(p: _Prepared, enumerated: bool) -> str:
    scheme, options = p.options.model_resampling, p.options
    fit = "logistic regression" if options.model == "logistic" else "least squares"
    if scheme == "cases":
        unit = "clusters" if p.design.clusters is not None else "rows"
        return f"cases bootstrap ({unit} resampled within group × stratum cells; {fit} refitted on each)"
    if scheme == "residual":
        return "residual bootstrap (residuals rescaled by sqrt(n/(n-p)), drawn with replacement; least squares)"
    null = ", null imposed" if options.impose_null else ""
    if scheme == "wild":
        return f"wild bootstrap ({options.weights} weights per row{null}; least squares)"
    how = f"all 2^{p.groups} = {2 ** p.groups} sign vectors enumerated" if enumerated else f"{options.weights} weights"
    return f"wild cluster bootstrap ({how}, one weight per cluster{null}; least squares)"


def _se_words(p: _Prepared) -> str:
    """The standard-error formula of the data's ŝe and of each resample's se* (studentized, p-values)."""
    kind = {"classical": "classical s*sqrt((X'X)^-1_jj)", "HC1": "HC1", "cluster": "CR1 (cluster-robust)"}[
        p.se_kind or "HC1"]
    if p.statistic not in LINEAR:
        return (f"delta method on the sandwich of the stacked estimating equations (coefficients, p1, p0), {kind} "
                "factor")
    return f"{kind} sandwich of the logistic fit" if p.options.model == "logistic" else kind


def _conventions(p: _Prepared) -> dict[str, str]:
    return {
        "standard_error": "sd of the replicates, divisor B-1 (enumerated: exact weighted sd)",
        "quantile": "inverse empirical CDF, as for every bootstrap",
        "robust_se": "HC1 = n/(n-p) HC0; cluster = G/(G-1) (n-1)/(n-p) times the cluster sandwich",
        "weights": "rademacher: -1 or 1, each 1/2; mammen: -(sqrt5-1)/2 w.p. (sqrt5+1)/(2 sqrt5), else (sqrt5+1)/2",
        "chunks": f"resamples computed in fixed chunks of {CHUNK} (same numbers for any executor)",
    }
