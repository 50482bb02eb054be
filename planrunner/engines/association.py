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

import numpy as np

from planrunner.engines.permutation import ALTERNATIVES, ENUMERATION_LIMIT, EXACT_CHOICES, TIE_TOLERANCE
from planrunner.engines.pvalues import TWO_SIDED_RULES, summarize
from planrunner.engines.results import EngineWarning, PermutationResult, frozen_array
from planrunner.engines.statistics import Statistic, check_samples
from planrunner.engines.streams import Stream, UniformRows
from planrunner.errors import EngineError

__all__ = ["association_test"]


def _permutations(listing: itertools.permutations, n: int, rows: int) -> np.ndarray:
    """The next ``rows`` pairings of the lexicographic listing."""
    return np.array(list(itertools.islice(listing, rows)), dtype=np.int64).reshape(rows, n)


def association_test(xy: np.ndarray, statistic: Statistic, *, resamples: int, alternative: str, stream: Stream,
                     exact: str = "auto", two_sided: str = "doubled", alpha: float | None = None,
                     covariates: np.ndarray | None = None, batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of a two-column statistic (predictor, outcome), or Freedman–Lane."""
    if statistic.columns != 2 or statistic.samples != 1:
        raise EngineError(f"an association test needs a statistic of two columns; {statistic.name!r} is not one")
    if alternative not in ALTERNATIVES or exact not in EXACT_CHOICES or two_sided not in TWO_SIDED_RULES:
        raise EngineError("unknown alternative, exact or two-sided choice")
    (data,) = check_samples([xy], statistic, minimum=3, method="the association test")
    n = data.shape[0]
    x, y = data[:, 0], data[:, 1]
    if np.all(x == x[0]) or np.all(y == y[0]):
        raise EngineError("the predictor or the outcome is constant; there is no association to test",
                          hint="check the columns and the row filter")
    if covariates is not None:
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
        residual = y - fitted
        x_tilde = x - z @ np.linalg.lstsq(z, x, rcond=None)[0]
        weights_x = x_tilde / float(x_tilde @ x_tilde)
        # b* = x̃ᵀ(ŷ + Pe)/x̃ᵀx̃ = x̃ᵀPe/x̃ᵀx̃, since x̃ is orthogonal to ŷ (in the span of Z)
        observed = float(weights_x @ residual)
        evaluate = lambda order: residual[order] @ weights_x  # noqa: E731
        scheme = f"Freedman–Lane: residuals of the outcome on {z.shape[1] - 1} covariate(s) permuted"
    else:
        with np.errstate(invalid="ignore", divide="ignore"):  # a non-finite value is reported below
            observed = float(statistic.compute(np.ascontiguousarray(data.T)))

        def evaluate(order: np.ndarray) -> np.ndarray:
            stacked = np.stack([np.broadcast_to(x, order.shape), y[order]], axis=-2)
            return statistic.compute(np.ascontiguousarray(stacked))
        scheme = "outcome shuffled against the predictor"
    if not math.isfinite(observed):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    arrangements = math.factorial(n)
    if exact == "always" and arrangements > ENUMERATION_LIMIT:
        raise EngineError(f"exact enumeration asked for, but there are {arrangements:,} pairings "
                          f"(the limit is {ENUMERATION_LIMIT:,})", hint="use exact: never or exact: auto")
    is_exact = exact != "never" and arrangements <= (resamples if exact == "auto" else ENUMERATION_LIMIT)
    total = arrangements if is_exact else resamples
    rows_per_batch = max(1, batch_elements // (2 * n))
    null = np.empty(total)
    reader = UniformRows(stream, n)
    listing = itertools.permutations(range(n))
    for start in range(0, total, rows_per_batch):
        stop = min(total, start + rows_per_batch)
        order = (_permutations(listing, n, stop - start) if is_exact
                 else np.argsort(reader.take(stop - start), axis=1))
        with np.errstate(invalid="ignore", divide="ignore"):
            null[start:stop] = evaluate(order)
    if not np.all(np.isfinite(null)):
        raise EngineError(f"the statistic {statistic.name!r} is not finite for some pairings")
    scale = max(abs(observed), float(np.max(np.abs(null))))
    tolerance = TIE_TOLERANCE * scale
    pv = summarize(null, observed, exact=is_exact, alternative=alternative, two_sided=two_sided,
                   tolerance=tolerance, alpha=alpha, arrangements=arrangements)
    warnings = list(pv.warnings)
    if np.all(np.abs(null - observed) <= tolerance):
        warnings.append(EngineWarning("degenerate-distribution", "every pairing gives the observed value"))
    return PermutationResult(
        observed=observed, p_value=pv.p_value, alternative=alternative, two_sided_rule=two_sided, exact=is_exact,
        arrangements=arrangements, resamples=total, count_greater=pv.count_greater, count_less=pv.count_less,
        null=frozen_array(null), tolerance=tolerance, n=(n,), scheme=scheme, warnings=tuple(warnings),
        conventions={"p_value": "exact: count / n! pairings; Monte Carlo: (count + 1) / (resamples + 1)",
                     "draws": "outcome i of resample r is argsort(keys of row r)[i]"},
        p_greater=pv.p_greater, p_less=pv.p_less, count_absolute=pv.count_absolute,
        monte_carlo_se=pv.monte_carlo_se, p_interval=pv.p_interval, smallest_p=pv.smallest_p,
        computation="enumeration" if is_exact else "Monte Carlo",
        design={"covariates": 0 if covariates is None else int(np.asarray(covariates).reshape(n, -1).shape[1])})
