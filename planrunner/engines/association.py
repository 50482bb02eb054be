"""Association tests: the outcome shuffled against the predictor; Freedman–Lane with covariates.

Without covariates the null is that predictor and outcome are independent: every one of the n!
pairings of the outcomes with the predictors is equally likely (identity 18). Exact
enumeration lists ``itertools.permutations(range(n))`` in lexicographic order (the identity first,
the observed pairing). Monte Carlo resample r pairs predictor i with outcome
``argsort(keys)[i]``, ``keys`` row r of the stream's uniform rows (see ``engines.streams``).

With covariates Z (Freedman & Lane 1983): fit the reduced model y = Zγ + e (an intercept
included) by least squares, keep its fitted values ŷ and residuals e, and form y* = ŷ + Pe for each
permutation P of the residuals. The test statistic is the partial slope of the predictor in the
full model y* ~ 1 + x + Z, by Frisch–Waugh–Lovell b* = x̃ᵀy*/x̃ᵀx̃ with x̃ the predictor's residual on
Z. The observed arrangement (P = I) gives the observed partial slope. The scheme respects the
covariates; a plain shuffle of y would not (it breaks the y–Z relation too) and is refused.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from planrunner.engines.blocks import bind as range_task
from planrunner.engines.permcore import (
    ENUMERATION,
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

__all__ = ["association_test", "computation"]


def association_test(xy: np.ndarray, statistic: Statistic, options: PermutationOptions, *, stream: Stream,
                     covariates: np.ndarray | None = None, batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of a two-column statistic (predictor, outcome), or Freedman–Lane."""
    model, observed, scheme = _checked(xy, statistic, covariates)
    n = model.x.size
    # the tie tolerance scales with the null's own values (the largest drawn so far, while drawing)
    judge = Judge(observed, 0.0, lambda values: tie_tolerance(observed, float(np.max(np.abs(values)))))
    null = _null(model, statistic, options, stream, max(1, batch_elements // (2 * n)), judge)
    check_null(null.values, statistic, "pairing(s)")
    tolerance = tie_tolerance(observed, float(np.max(np.abs(null.values))))
    warnings: tuple[EngineWarning, ...] = ()
    if all_ties(null.values, observed, tolerance):
        warnings = (EngineWarning("degenerate-distribution", "every pairing gives the observed value"),)
    about = Description(
        n=(n,), scheme=scheme,
        conventions={"p_value": "exact: count / n! pairings; Monte Carlo: (count + 1) / (resamples + 1)",
                     "draws": "outcome i of resample r is argsort(keys of row r)[i]"},
        design={"covariates": 0 if covariates is None else model.terms - 1})
    return permutation_result(null, observed, options, tolerance=tolerance, about=about, warnings=warnings)


@dataclass(frozen=True)
class _Model:
    """What a pairing is evaluated on: the predictor and outcome (plain shuffle), or, for
    Freedman–Lane, the reduced model's residuals and the weights x̃/x̃ᵀx̃ of the partial slope."""

    x: np.ndarray
    y: np.ndarray
    residual: np.ndarray | None = None
    weights_x: np.ndarray | None = None
    terms: int = 0  # columns of Z (the intercept included)


def _freedman_lane(x: np.ndarray, y: np.ndarray, statistic: Statistic, covariates: np.ndarray) -> _Model:
    """Fit the reduced model y = Zγ + e and the predictor's residual x̃ on Z (Freedman & Lane 1983)."""
    n = x.size
    if statistic.name != "slope":
        raise EngineError("with covariates only the partial slope is tested (Freedman–Lane)",
                          hint="use statistic: slope")
    z = np.column_stack([np.ones(n), np.asarray(covariates, dtype=np.float64).reshape(n, -1)])
    if not np.all(np.isfinite(z)):
        raise EngineError("a covariate has a non-finite value", hint="declare missing values or fix the data")
    if np.linalg.matrix_rank(np.column_stack([z, x])) < z.shape[1] + 1:
        raise EngineError("the predictor is a linear combination of the covariates (and the intercept)",
                          hint="remove the redundant covariate")
    if n <= z.shape[1] + 1:
        raise EngineError(f"{n} rows cannot fit a slope and {z.shape[1]} other terms")
    fitted = z @ np.linalg.lstsq(z, y, rcond=None)[0]
    x_tilde = x - z @ np.linalg.lstsq(z, x, rcond=None)[0]
    # b* = x̃ᵀ(ŷ + Pe)/x̃ᵀx̃ = x̃ᵀPe/x̃ᵀx̃, since x̃ is orthogonal to ŷ (in the span of Z)
    return _Model(x, y, residual=y - fitted, weights_x=x_tilde / float(x_tilde @ x_tilde), terms=z.shape[1])


def _checked(xy: np.ndarray, statistic: Statistic, covariates: np.ndarray | None) -> tuple[_Model, float, str]:
    """The model the test permutes, the observed statistic and the scheme; refused as the test refuses."""
    if statistic.columns != 2 or statistic.samples != 1:
        raise EngineError(f"an association test needs a statistic of two columns; {statistic.name!r} is not one")
    (data,) = check_samples([xy], statistic, minimum=3, method="the association test")
    x, y = data[:, 0], data[:, 1]
    if np.all(x == x[0]) or np.all(y == y[0]):
        raise EngineError("the predictor or the outcome is constant; there is no association to test",
                          hint="check the columns and the row filter")
    if covariates is None:
        return (_Model(x, y), observed_value(statistic, np.ascontiguousarray(data.T)),
                "outcome shuffled against the predictor")
    model = _freedman_lane(x, y, statistic, covariates)
    assert model.weights_x is not None, "a Freedman–Lane model has the predictor's weights"
    return (model, float(model.weights_x @ model.residual),  # the partial slope, P = I
            f"Freedman–Lane: residuals of the outcome on {model.terms - 1} covariate(s) permuted")


def computation(xy: np.ndarray, statistic: Statistic, options: PermutationOptions, *,
                covariates: np.ndarray | None = None) -> str:
    """The computation :func:`association_test` will use on these data, or its refusal (raised)."""
    model, _, _ = _checked(xy, statistic, covariates)
    return _choose(model, statistic, options)[0]


def _choose(model: _Model, statistic: Statistic, options: PermutationOptions) -> tuple[str, int]:
    """(computation, n!) by the one rule of ``choose_computation``."""
    arrangements = math.factorial(model.x.size)
    return choose_computation(arrangements, options, shortcut=False, space="pairings",
                              statistic=statistic.name), arrangements


def _null(model: _Model, statistic: Statistic, options: PermutationOptions, stream: Stream,
          rows_per_batch: int, judge: Judge | None = None) -> ComputedNull:
    """The null over the n! pairings: listed in lexicographic order, or drawn (range tasks)."""
    n = model.x.size
    path, arrangements = _choose(model, statistic, options)
    if path == ENUMERATION:
        null = np.empty(arrangements)
        listing = itertools.permutations(range(n))
        for start in range(0, arrangements, rows_per_batch):
            rows = min(rows_per_batch, arrangements - start)
            order = np.array(list(itertools.islice(listing, rows)), dtype=np.int64).reshape(rows, n)
            null[start:start + rows] = _evaluate(model, statistic, order)
        return ComputedNull(null, path, arrangements)
    # ranges of resamples may run on other workers (engines.blocks); the same numbers
    task = range_task(_drawn_range, model, statistic, stream, rows_per_batch)
    return monte_carlo_null(task, options, arrangements, judge)


def _drawn_range(model: _Model, statistic: Statistic, stream: Stream, rows_per_batch: int,
                 start: int, stop: int) -> np.ndarray:
    """The statistic of random resamples [start, stop) (a picklable range task): outcome i is paired
    with predictor argsort(keys)[i]."""
    reader = UniformRows(stream, model.x.size, start)
    null = np.empty(stop - start)
    for first in range(0, stop - start, rows_per_batch):
        rows = min(rows_per_batch, stop - start - first)
        null[first:first + rows] = _evaluate(model, statistic, np.argsort(reader.take(rows), axis=1))
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
