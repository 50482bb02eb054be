"""Cluster-randomized designs: the group labels shuffled between whole clusters.

When clusters (wards, sites, batches) were randomized, the arrangements the design allows are the
ways of giving the first group G1 of the G clusters: C(G, G1), every row of a cluster keeping its
cluster's label. The statistic is computed on the rows, as for the observed data.

Exact enumeration runs over ``itertools.combinations(range(G), G1)`` (clusters numbered by their
code, increasing); Monte Carlo resample r gives the first group the clusters at the first G1
places of ``argsort(keys)``, ``keys`` row r of the stream's uniform rows of width G.

Group sizes in rows change from one arrangement to the next, so the plain computation evaluates
each arrangement on its own; a difference of means (or proportions) uses the fast path
(Σ chosen cluster sums / Σ chosen cluster sizes), checked equal to the plain one in tests.

With few clusters the smallest attainable p-value, C(G, G1)⁻¹ (doubled when two-sided), may
exceed alpha: the result then carries a ``few-clusters`` warning.
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

__all__ = ["cluster_test"]


def cluster_test(x: np.ndarray, y: np.ndarray, x_clusters: np.ndarray, y_clusters: np.ndarray,
                 statistic: Statistic, *, resamples: int, alternative: str, stream: Stream, exact: str = "auto",
                 two_sided: str = "doubled", alpha: float | None = None, fast: bool = True,
                 batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of a two-group statistic with the labels assigned to whole clusters."""
    if statistic.samples != 2 or statistic.columns != 1:
        raise EngineError(f"a cluster-level test needs a two-group statistic; {statistic.name!r} is not one")
    if alternative not in ALTERNATIVES or exact not in EXACT_CHOICES or two_sided not in TWO_SIDED_RULES:
        raise EngineError("unknown alternative, exact or two-sided choice")
    x, y = check_samples([x, y], statistic, method="the cluster test")
    cx, cy = np.asarray(x_clusters, dtype=np.int64), np.asarray(y_clusters, dtype=np.int64)
    if cx.shape != x.shape or cy.shape != y.shape:
        raise EngineError("every row needs a cluster code")
    both = np.intersect1d(cx, cy)
    if both.size:
        raise EngineError(f"{both.size} cluster(s) have rows in both groups (first code {int(both[0])}); "
                          "labels were not assigned to whole clusters",
                          hint="remove clusters: (the design is then not cluster-randomized) or fix the data")
    values = np.concatenate([x, y])
    codes = np.concatenate([cx, cy])
    levels, member = np.unique(codes, return_inverse=True)
    g = levels.size
    g1 = int(np.unique(cx).size)
    sums = np.bincount(member, weights=values, minlength=g)
    sizes = np.bincount(member, minlength=g).astype(np.float64)
    observed_set = np.isin(levels, cx)
    with np.errstate(invalid="ignore", divide="ignore"):  # a non-finite value is reported below
        observed = float(statistic.compute(x, y))
    if not math.isfinite(observed):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    arrangements = math.comb(g, g1)
    if exact == "always" and arrangements > ENUMERATION_LIMIT:
        raise EngineError(f"exact enumeration asked for, but there are {arrangements:,} cluster arrangements "
                          f"(the limit is {ENUMERATION_LIMIT:,})", hint="use exact: never or exact: auto")
    is_exact = exact != "never" and arrangements <= (resamples if exact == "auto" else ENUMERATION_LIMIT)
    total = arrangements if is_exact else resamples
    rows_per_batch = max(1, batch_elements // max(g, values.size))
    combos = itertools.combinations(range(g), g1)
    reader = UniformRows(stream, g)
    null = np.empty(total)
    for start in range(0, total, rows_per_batch):
        rows = min(rows_per_batch, total - start)
        chosen = np.zeros((rows, g), dtype=bool)
        if is_exact:
            for r, combo in enumerate(itertools.islice(combos, rows)):
                chosen[r, list(combo)] = True
        else:
            np.put_along_axis(chosen, np.argsort(reader.take(rows), axis=1)[:, :g1], True, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            if fast and statistic.form == "mean":
                # row sums, not a BLAS product, so the batch size never changes a bit
                n1 = np.where(chosen, sizes, 0.0).sum(axis=1)
                s1 = np.where(chosen, sums, 0.0).sum(axis=1)
                null[start:start + rows] = s1 / n1 - (sums.sum() - s1) / (sizes.sum() - n1)
            else:
                null[start:start + rows] = [float(statistic.compute(values[row], values[~row]))
                                            for row in chosen[:, member]]
    if np.isnan(null).any():
        raise EngineError(f"the statistic {statistic.name!r} is not finite for some cluster arrangements")
    tolerance = TIE_TOLERANCE * max(abs(observed), float(np.max(np.abs(values))))
    pv = summarize(null, observed, exact=is_exact, alternative=alternative, two_sided=two_sided,
                   tolerance=tolerance, alpha=alpha, arrangements=arrangements)
    warnings = list(pv.warnings)
    level = 0.05 if alpha is None else alpha
    if pv.smallest_p > level:
        warnings.append(EngineWarning(
            "few-clusters",
            f"only {g} clusters ({g1} in the first group): {arrangements} arrangements, so the smallest "
            f"attainable p-value is {pv.smallest_p:.3g}, above alpha = {level:g}; randomize more clusters"))
    return PermutationResult(
        observed=observed, p_value=pv.p_value, alternative=alternative, two_sided_rule=two_sided, exact=is_exact,
        arrangements=arrangements, resamples=total, count_greater=pv.count_greater, count_less=pv.count_less,
        null=frozen_array(null), tolerance=tolerance, n=(x.size, y.size),
        scheme="cluster labels shuffled (whole clusters keep one group)", warnings=tuple(warnings),
        conventions={"p_value": "exact: count / C(G, G1) cluster arrangements; Monte Carlo: (count + 1)/(m + 1)",
                     "draws": "first group = clusters at the first G1 places of argsort(keys of row r)"},
        p_greater=pv.p_greater, p_less=pv.p_less, count_absolute=pv.count_absolute,
        monte_carlo_se=pv.monte_carlo_se, p_interval=pv.p_interval, smallest_p=pv.smallest_p,
        computation="enumeration" if is_exact else "Monte Carlo",
        design={"clusters": g, "clusters_first_group": g1, "observed_clusters_first_group": int(observed_set.sum())})
