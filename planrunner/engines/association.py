"""Association tests: the outcome shuffled against the predictor; residual permutation with covariates.

Without covariates the null is that predictor and outcome are independent: every one of the n!
pairings of the outcomes with the predictors is equally likely (identity 18). Exact
enumeration lists ``itertools.permutations(range(n))`` in lexicographic order (the identity first,
the observed pairing). Monte Carlo resample r pairs predictor i with outcome
``argsort(keys)[i]``, ``keys`` row r of the stream's uniform rows (see ``engines.streams``).

With covariates Z (an intercept included) the statistic is the partial slope of the predictor x in
the full model y ~ 1 + x + Z, by Frisch–Waugh–Lovell b = x̃ᵀy/x̃ᵀx̃ with x̃ the predictor's residual
on Z; with x the 0/1 indicator of the first group it is the adjusted difference in means. Two
residual permutations test b = 0 (definitions as in Anderson & Legendre 1999 and Winkler et al.
2014, Table 2):

* Freedman–Lane (Freedman & Lane 1983): fit the reduced model y = Zγ + e, keep its fitted values ŷ
  and residuals e, and refit the full model to y* = ŷ + Pe for each permutation P. Since x̃ is
  orthogonal to ŷ (in the span of Z), b* = x̃ᵀPe/x̃ᵀx̃. The identity P = I gives the observed b.
* ter Braak (ter Braak 1992): fit the full model, keep its residuals f = y − Xβ̂, form
  y* = Xβ̂ + Pf and compare b* − b̂ = x̃ᵀPf/x̃ᵀx̃ with b̂. The identity gives 0, not b̂: the observed
  arrangement is not among the permuted ones, so the test is Monte Carlo only ((count + 1)/(m + 1),
  the observed counted once); ``exact: always`` is refused.

Which residuals may trade places (the exchangeability the design states):

* all rows (the default): n! permutations;
* within strata: rows are pooled stratum by stratum (codes increasing, file order within), and a
  permutation moves a residual only inside its stratum: ∏_h n_h!. Draw: ``argsort(keys + 2·h,
  kind="stable")`` (h the stratum index of each position), as the label shuffle within strata;
  enumeration: the lexicographic product over strata of each stratum's permutations. Every stratum
  needs at least 2 rows, and the predictor must vary within some stratum.
* whole clusters: rows are pooled cluster by cluster (file order within), and a permutation moves
  the residual block of cluster c, row for row, into the places of cluster π(c): G! permutations of
  the cluster codes (draw ``argsort(keys)`` of width G). The blocks are exchangeable only when every
  cluster has the same number of rows (k-th row with k-th row) and the tested predictor is a
  cluster-level one (constant within each cluster, as the group of a cluster-randomised design);
  anything else is refused.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from planrunner.engines.blocks import bind as range_task
from planrunner.engines.permcore import (
    ENUMERATION,
    MONTE_CARLO,
    ComputedNull,
    Description,
    Judge,
    PermutationOptions,
    all_ties,
    check_null,
    choose_computation,
    monte_carlo_null,
    observed_value,
    permutation_result,
    tie_tolerance,
)
from planrunner.engines.results import EngineWarning, PermutationResult
from planrunner.engines.statistics import Statistic, check_samples
from planrunner.engines.streams import Stream, UniformRows
from planrunner.errors import EngineError

__all__ = ["FREEDMAN_LANE", "RESIDUAL_PERMUTATIONS", "TER_BRAAK", "TER_BRAAK_NOT_EXACT", "ResidualScheme",
           "association_test", "computation"]

FREEDMAN_LANE = "freedman-lane"
TER_BRAAK = "ter-braak"
RESIDUAL_PERMUTATIONS = (FREEDMAN_LANE, TER_BRAAK)
TER_BRAAK_NOT_EXACT = ("ter Braak permutes the full model's residuals, whose identity arrangement is not the "
                       "observed one: it has no exact null distribution",
                       "use exact: auto or never (Monte Carlo), or covariate_permutation: freedman-lane")
_NAMES = {FREEDMAN_LANE: "Freedman–Lane (Freedman & Lane 1983)", TER_BRAAK: "ter Braak (ter Braak 1992)"}


@dataclass(frozen=True, eq=False)
class ResidualScheme:
    """How a test with covariates permutes residuals: which model's residuals (``method``) and which
    rows may trade places (``strata`` or ``clusters``: codes 0..k−1 per row, ``labels`` their names)."""

    method: str = FREEDMAN_LANE
    strata: np.ndarray | None = None
    clusters: np.ndarray | None = None
    labels: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.method not in RESIDUAL_PERMUTATIONS:
            raise EngineError(f"unknown covariate permutation {self.method!r}",
                              hint=f"use one of {', '.join(RESIDUAL_PERMUTATIONS)}")
        if self.strata is not None and self.clusters is not None:
            raise EngineError("residuals are permuted within strata or between whole clusters, not both",
                              hint="remove strata or clusters")

    def label(self, code: int) -> str:
        return self.labels[code] if code < len(self.labels) else str(code)


def association_test(xy: np.ndarray, statistic: Statistic, options: PermutationOptions, *, stream: Stream,
                     covariates: np.ndarray | None = None, residuals: ResidualScheme | None = None,
                     batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of a two-column statistic (predictor, outcome), or a residual permutation
    (Freedman–Lane or ter Braak) of the partial slope with covariates."""
    model, observed, scheme = _checked(xy, statistic, covariates, residuals)
    n = model.x.size
    # the tie tolerance scales with the null's own values (the largest drawn so far, while drawing)
    judge = Judge(observed, 0.0, lambda values: tie_tolerance(observed, float(np.max(np.abs(values)))))
    null = _null(model, statistic, options, stream, max(1, batch_elements // (2 * n)), judge)
    check_null(null.values, statistic, "pairing(s)")
    tolerance = tie_tolerance(observed, float(np.max(np.abs(null.values))))
    warnings: tuple[EngineWarning, ...] = ()
    if all_ties(null.values, observed, tolerance):
        warnings = (EngineWarning("degenerate-distribution", "every pairing gives the observed value"),)
    about = Description(n=(n,), scheme=scheme, conventions=_conventions(model), design=_design(model, covariates))
    return permutation_result(null, observed, options, tolerance=tolerance, about=about, warnings=warnings)


@dataclass(frozen=True)
class _Model:
    """What a pairing is evaluated on: the predictor and outcome (plain shuffle), or, with covariates,
    the residuals permuted and the weights x̃/x̃ᵀx̃ of the partial slope. With strata or clusters the
    rows are pooled block by block (``stratum``: the block index of each position; ``cluster_size``:
    rows per cluster, the blocks consecutive)."""

    x: np.ndarray
    y: np.ndarray
    residual: np.ndarray | None = None
    weights_x: np.ndarray | None = None
    terms: int = 0  # columns of Z (the intercept included)
    method: str = ""  # FREEDMAN_LANE | TER_BRAAK with covariates
    stratum: np.ndarray | None = None
    cluster_size: int = 0

    @property
    def units(self) -> int:
        """How many things a permutation reorders: rows, or whole clusters."""
        return self.x.size // self.cluster_size if self.cluster_size else self.x.size

    @property
    def strata_sizes(self) -> np.ndarray:
        assert self.stratum is not None
        return np.bincount(self.stratum)


def _residual_model(x: np.ndarray, y: np.ndarray, statistic: Statistic, covariates: np.ndarray,
                    scheme: ResidualScheme) -> tuple[_Model, float]:
    """Pool the rows block by block, fit the reduced model y = Zγ + e (Freedman–Lane) or the full
    model (ter Braak) and the predictor's residual x̃ on Z; the observed partial slope."""
    n = x.size
    if statistic.name != "slope":
        raise EngineError("with covariates only the partial slope is tested (Freedman–Lane or ter Braak)",
                          hint="use statistic: slope")
    given = np.asarray(covariates, dtype=np.float64)
    z = np.column_stack([np.ones(n), given.reshape(n, given.size // n)])  # no columns: the intercept alone
    if not np.all(np.isfinite(z)):
        raise EngineError("a covariate has a non-finite value", hint="declare missing values or fix the data")
    if np.linalg.matrix_rank(np.column_stack([z, x])) < z.shape[1] + 1:
        raise EngineError("the predictor is a linear combination of the covariates (and the intercept)",
                          hint="remove the redundant covariate")
    if n <= z.shape[1] + 1:
        raise EngineError(f"{n} rows cannot fit a slope and {z.shape[1]} other terms")
    pooled, stratum, cluster_size = _exchangeable_blocks(x, scheme)
    x, y, z = x[pooled], y[pooled], z[pooled]
    reduced = y - z @ np.linalg.lstsq(z, y, rcond=None)[0]
    x_tilde = x - z @ np.linalg.lstsq(z, x, rcond=None)[0]
    weights = x_tilde / float(x_tilde @ x_tilde)
    residual = reduced
    if scheme.method == TER_BRAAK:
        full = np.column_stack([z, x])
        residual = y - full @ np.linalg.lstsq(full, y, rcond=None)[0]
    model = _Model(x, y, residual=residual, weights_x=weights, terms=z.shape[1], method=scheme.method,
                   stratum=stratum, cluster_size=cluster_size)
    # b = x̃ᵀe/x̃ᵀx̃ with e the reduced residuals (x̃ᵀŷ = 0), the same for both methods
    return model, float(np.multiply(reduced, weights).sum())


def _exchangeable_blocks(x: np.ndarray, scheme: ResidualScheme) -> tuple[np.ndarray, np.ndarray | None, int]:
    """The row order that pools strata or clusters into consecutive blocks, each position's stratum
    index, and the rows per cluster; refused where the residuals are not exchangeable so."""
    n = x.size
    if scheme.strata is not None:
        codes = _codes(scheme.strata, n, "stratum")
        sizes = np.bincount(codes)
        for code in np.flatnonzero(sizes < 2):
            raise EngineError(f"stratum '{scheme.label(int(code))}' has {int(sizes[code])} row(s); residuals "
                              "permuted within strata need at least 2 rows in every stratum",
                              hint="merge small strata, or remove strata")
        pooled = np.argsort(codes, kind="stable")
        if np.all(np.diff(x[pooled])[np.diff(codes[pooled]) == 0] == 0):
            raise EngineError("the predictor (or group) is constant within every stratum: residuals permuted "
                              "within strata never move it against the outcome",
                              hint="remove strata (or add them as a covariate), or use strata within which "
                                   "the predictor varies")
        return pooled, codes[pooled], 0
    if scheme.clusters is not None:
        codes = _codes(scheme.clusters, n, "cluster")
        sizes = np.bincount(codes)
        if sizes.size < 2:
            raise EngineError("one cluster cannot be permuted", hint="remove clusters")
        if np.any(sizes != sizes[0]):
            other = int(np.flatnonzero(sizes != sizes[0])[0])
            raise EngineError(
                f"clusters differ in size (cluster '{scheme.label(0)}' has {int(sizes[0])} rows, "
                f"'{scheme.label(other)}' has {int(sizes[other])}); whole clusters' residual blocks are "
                "exchangeable only between clusters of equal size",
                hint="use the bootstrap (model_resampling: wild-cluster), or the cluster label shuffle "
                     "without covariates")
        pooled = np.argsort(codes, kind="stable")
        blocks = x[pooled].reshape(sizes.size, int(sizes[0]))
        for cluster in np.flatnonzero(np.any(blocks != blocks[:, :1], axis=1)):
            raise EngineError(
                f"the predictor (or group) varies within cluster '{scheme.label(int(cluster))}'; a permutation "
                "of whole clusters tests a cluster-level predictor only",
                hint="remove clusters (rows then are exchangeable), or test a predictor that is constant "
                     "within each cluster")
        return pooled, None, int(sizes[0])
    return np.arange(n), None, 0


def _codes(codes: np.ndarray, n: int, what: str) -> np.ndarray:
    c = np.asarray(codes)
    if c.shape != (n,) or not np.issubdtype(c.dtype, np.integer) or (n and c.min() < 0):
        raise EngineError(f"{what} codes must be {n} whole numbers from 0")
    return c.astype(np.int64)


def _checked(xy: np.ndarray, statistic: Statistic, covariates: np.ndarray | None,
             residuals: ResidualScheme | None) -> tuple[_Model, float, str]:
    """The model the test permutes, the observed statistic and the scheme; refused as the test refuses."""
    if statistic.columns != 2 or statistic.samples != 1:
        raise EngineError(f"an association test needs a statistic of two columns; {statistic.name!r} is not one")
    (data,) = check_samples([xy], statistic, minimum=3, method="the association test")
    x, y = data[:, 0], data[:, 1]
    if np.all(x == x[0]) or np.all(y == y[0]):
        raise EngineError("the predictor or the outcome is constant; there is no association to test",
                          hint="check the columns and the row filter")
    if covariates is None:
        if residuals is not None and (residuals.strata is not None or residuals.clusters is not None
                                      or residuals.method != FREEDMAN_LANE):
            raise EngineError("a residual permutation (strata, clusters, ter Braak) needs covariates",
                              hint="add covariates: [..], or remove the key")
        return (_Model(x, y), observed_value(statistic, np.ascontiguousarray(data.T)),
                "outcome shuffled against the predictor")
    model, observed = _residual_model(x, y, statistic, covariates, residuals or ResidualScheme())
    return model, observed, _scheme_words(model)


def _scheme_words(model: _Model) -> str:
    """The record's ``scheme``: which residuals, over which rows."""
    whose = (f"residuals of the outcome on {model.terms - 1} covariate(s)" if model.method == FREEDMAN_LANE
             else f"residuals of the full model (predictor and {model.terms - 1} covariate(s))")
    if model.stratum is not None:
        where = f"permuted within {model.strata_sizes.size} strata"
    elif model.cluster_size:
        where = f"permuted as whole blocks of {model.units} clusters of {model.cluster_size} rows"
    else:
        where = "permuted"
    return f"{_NAMES[model.method]}: {whose} {where}"


def _conventions(model: _Model) -> dict[str, str]:
    if model.method == TER_BRAAK:
        p_value = "Monte Carlo: (count + 1) / (resamples + 1), the observed counted once (no exact null)"
    else:
        p_value = "exact: count / arrangements; Monte Carlo: (count + 1) / (resamples + 1)"
    if model.stratum is not None:
        draws = "rows pooled stratum by stratum; residual i of resample r is argsort(keys + 2·stratum)[i]"
    elif model.cluster_size:
        draws = "rows pooled cluster by cluster; the block of cluster c receives that of argsort(keys of row r)[c]"
    else:
        draws = "outcome i of resample r is argsort(keys of row r)[i]"
    return {"p_value": p_value, "draws": draws}


def _design(model: _Model, covariates: np.ndarray | None) -> dict[str, object]:
    out: dict[str, object] = {"covariates": 0 if covariates is None else model.terms - 1}
    if model.stratum is not None:
        out["strata"] = int(model.strata_sizes.size)
    if model.cluster_size:
        out["clusters"] = model.units
        out["cluster_size"] = model.cluster_size
    return out


def computation(xy: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                covariates: np.ndarray | None = None, residuals: ResidualScheme | None = None) -> str:
    """The computation :func:`association_test` will use on these data, or its refusal (raised)."""
    model, _, _ = _checked(xy, statistic, covariates, residuals)
    return _choose(model, statistic, options)[0]


def _arrangements(model: _Model) -> int:
    if model.stratum is not None:
        return math.prod(math.factorial(int(size)) for size in model.strata_sizes)
    return math.factorial(model.units)


def _choose(model: _Model, statistic: Statistic, options: PermutationOptions) -> tuple[str, int]:
    """(computation, arrangements) by the one rule of ``choose_computation``; ter Braak is drawn."""
    arrangements = _arrangements(model)
    if model.method == TER_BRAAK:
        if options.exact == "always":
            raise EngineError(TER_BRAAK_NOT_EXACT[0], hint=TER_BRAAK_NOT_EXACT[1])
        return MONTE_CARLO, arrangements
    return choose_computation(arrangements, options, shortcut=False, space="pairings",
                              statistic=statistic.name), arrangements


def _null(model: _Model, statistic: Statistic, options: PermutationOptions, stream: Stream,
          rows_per_batch: int, judge: Judge | None = None) -> ComputedNull:
    """The null over the arrangements: listed in lexicographic order, or drawn (range tasks)."""
    path, arrangements = _choose(model, statistic, options)
    if path == ENUMERATION:
        null = np.empty(arrangements)
        listing = _listing(model)
        for start in range(0, arrangements, rows_per_batch):
            rows = min(rows_per_batch, arrangements - start)
            order = np.array(list(itertools.islice(listing, rows)), dtype=np.int64).reshape(rows, model.units)
            null[start:start + rows] = _evaluate(model, statistic, _row_order(model, order))
        return ComputedNull(null, path, arrangements)
    # ranges of resamples may run on other workers (engines.blocks); the same numbers
    task = range_task(_drawn_range, model, statistic, stream, rows_per_batch)
    return monte_carlo_null(task, options, arrangements, judge)


def _listing(model: _Model) -> Iterator[tuple[int, ...]]:
    """Every arrangement in lexicographic order, the identity first: permutations of the rows (of
    the clusters), or the product over strata of each stratum's permutations of its positions."""
    if model.stratum is None:
        return itertools.permutations(range(model.units))
    bounds = np.concatenate([[0], np.cumsum(model.strata_sizes)])
    per_stratum = [itertools.permutations(range(int(a), int(b))) for a, b in zip(bounds[:-1], bounds[1:])]
    return (tuple(itertools.chain.from_iterable(parts)) for parts in itertools.product(*per_stratum))


def _row_order(model: _Model, order: np.ndarray) -> np.ndarray:
    """Row positions of each arrangement: cluster orders become their blocks' rows, row for row."""
    if not model.cluster_size:
        return order
    size = model.cluster_size
    return (order[:, :, None] * size + np.arange(size)).reshape(order.shape[0], -1)


def _drawn_range(model: _Model, statistic: Statistic, stream: Stream, rows_per_batch: int,
                 start: int, stop: int) -> np.ndarray:
    """The statistic of random resamples [start, stop) (a picklable range task): outcome i is paired
    with predictor argsort(keys)[i] (within strata: argsort(keys + 2·stratum); clusters: whole blocks)."""
    reader = UniformRows(stream, model.units, start)
    offset = None if model.stratum is None else 2.0 * model.stratum
    null = np.empty(stop - start)
    for first in range(0, stop - start, rows_per_batch):
        rows = min(rows_per_batch, stop - start - first)
        keys = reader.take(rows)
        order = np.argsort(keys, axis=1) if offset is None else np.argsort(keys + offset, axis=1, kind="stable")
        null[first:first + rows] = _evaluate(model, statistic, _row_order(model, order))
    return null


def _evaluate(model: _Model, statistic: Statistic, order: np.ndarray) -> np.ndarray:
    """The statistic of each pairing (row of ``order``)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        if model.residual is not None:
            assert model.weights_x is not None
            # row-wise sums, not a BLAS product, whose rounding depends on how many rows share a call
            return np.multiply(model.residual[order], model.weights_x).sum(axis=1)
        stacked = np.stack([np.broadcast_to(model.x, order.shape), model.y[order]], axis=-2)
        return statistic.compute(np.ascontiguousarray(stacked))
