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

import dataclasses
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

__all__ = ["cluster_test", "computation"]


def cluster_test(x: np.ndarray, y: np.ndarray, x_clusters: np.ndarray, y_clusters: np.ndarray,
                 statistic: Statistic, options: PermutationOptions, *, stream: Stream, fast: bool = True,
                 batch_elements: int = 2_000_000) -> PermutationResult:
    """Permutation test of a two-group statistic with the labels assigned to whole clusters."""
    x, y, clusters, observed = _checked(x, y, x_clusters, y_clusters, statistic)
    g, g1 = clusters.sums.size, clusters.first
    rows_per_batch = max(1, batch_elements // max(g, clusters.values.size))
    tolerance = tie_tolerance(observed, float(np.max(np.abs(clusters.values))))
    null = _null(clusters, statistic, options, stream, rows_per_batch, fast, Judge(observed, 0.0, lambda v: tolerance))
    check_null(null.values, statistic, "cluster arrangement(s)")
    about = Description(
        n=(x.size, y.size), scheme="cluster labels shuffled (whole clusters keep one group)",
        conventions={"p_value": "exact: count / C(G, G1) cluster arrangements; Monte Carlo: (count + 1)/(m + 1)",
                     "draws": "first group = clusters at the first G1 places of argsort(keys of row r)"},
        design={"clusters": g, "clusters_first_group": g1,
                "observed_clusters_first_group": int(np.isin(clusters.levels, clusters.x_codes).sum())})
    result = permutation_result(null, observed, options, tolerance=tolerance, about=about)
    level = 0.05 if options.alpha is None else options.alpha
    assert result.smallest_p is not None
    if result.smallest_p > level:
        few = EngineWarning(
            "few-clusters",
            f"only {g} clusters ({g1} in the first group): {null.arrangements} arrangements, so the smallest "
            f"attainable p-value is {result.smallest_p:.3g}, above alpha = {level:g}; randomize more clusters")
        result = dataclasses.replace(result, warnings=result.warnings + (few,))
    return result


@dataclass(frozen=True)
class _Clusters:
    """Rows pooled (first group, then second) with their cluster index, and each cluster's sum and
    size in rows."""

    values: np.ndarray
    member: np.ndarray  # cluster index (0 … G − 1, by increasing code) of each pooled row
    levels: np.ndarray  # cluster codes, increasing
    x_codes: np.ndarray  # cluster codes of the first group's rows
    first: int  # G1, the clusters of the first group
    sums: np.ndarray
    sizes: np.ndarray

    @classmethod
    def of(cls, x: np.ndarray, y: np.ndarray, x_clusters: np.ndarray, y_clusters: np.ndarray) -> _Clusters:
        cx, cy = np.asarray(x_clusters, dtype=np.int64), np.asarray(y_clusters, dtype=np.int64)
        if cx.shape != x.shape or cy.shape != y.shape:
            raise EngineError("every row needs a cluster code")
        both = np.intersect1d(cx, cy)
        if both.size:
            raise EngineError(f"{both.size} cluster(s) have rows in both groups (first code {int(both[0])}); "
                              "labels were not assigned to whole clusters",
                              hint="remove clusters: (the design is then not cluster-randomized) or fix the data")
        values = np.concatenate([x, y])
        levels, member = np.unique(np.concatenate([cx, cy]), return_inverse=True)
        g = levels.size
        return cls(values, member, levels, cx, int(np.unique(cx).size),
                   np.bincount(member, weights=values, minlength=g),
                   np.bincount(member, minlength=g).astype(np.float64))


def _checked(x: np.ndarray, y: np.ndarray, x_clusters: np.ndarray, y_clusters: np.ndarray,
             statistic: Statistic) -> tuple[np.ndarray, np.ndarray, _Clusters, float]:
    """The groups and clusters as the test takes them, and the observed statistic; refused as the test refuses."""
    if statistic.samples != 2 or statistic.columns != 1:
        raise EngineError(f"a cluster-level test needs a two-group statistic; {statistic.name!r} is not one")
    x, y = check_samples([x, y], statistic, method="the cluster test")
    clusters = _Clusters.of(x, y, x_clusters, y_clusters)
    return x, y, clusters, observed_value(statistic, x, y)


def computation(x: np.ndarray, y: np.ndarray, x_clusters: np.ndarray, y_clusters: np.ndarray,
                statistic: Statistic, options: PermutationOptions) -> str:
    """The computation :func:`cluster_test` will use on these clusters, or its refusal (raised)."""
    return _choose(_checked(x, y, x_clusters, y_clusters, statistic)[2], statistic, options)[0]


def _choose(clusters: _Clusters, statistic: Statistic, options: PermutationOptions) -> tuple[str, int]:
    """(computation, C(G, G1)) by the one rule of ``choose_computation``."""
    arrangements = math.comb(clusters.sums.size, clusters.first)
    return choose_computation(arrangements, options, shortcut=False, space="cluster arrangements",
                              statistic=statistic.name), arrangements


def _null(clusters: _Clusters, statistic: Statistic, options: PermutationOptions, stream: Stream,
          rows_per_batch: int, fast: bool, judge: Judge | None = None) -> ComputedNull:
    """The null over the C(G, G1) cluster arrangements: listed, or drawn (range tasks)."""
    g, g1 = clusters.sums.size, clusters.first
    path, arrangements = _choose(clusters, statistic, options)
    if path == ENUMERATION:
        null = np.empty(arrangements)
        combos = itertools.combinations(range(g), g1)
        for start in range(0, arrangements, rows_per_batch):
            rows = min(rows_per_batch, arrangements - start)
            chosen = np.zeros((rows, g), dtype=bool)
            for r, combo in enumerate(itertools.islice(combos, rows)):
                chosen[r, list(combo)] = True
            null[start:start + rows] = _evaluate(clusters, statistic, chosen, fast)
        return ComputedNull(null, path, arrangements)
    # ranges of resamples may run on other workers (engines.blocks); the same numbers
    task = range_task(_drawn_range, clusters, statistic, stream, rows_per_batch, fast)
    return monte_carlo_null(task, options, arrangements, judge)


def _drawn_range(clusters: _Clusters, statistic: Statistic, stream: Stream, rows_per_batch: int, fast: bool,
                 start: int, stop: int) -> np.ndarray:
    """The statistic of random resamples [start, stop) (a picklable range task): the first group
    takes the clusters at the first G1 places of argsort(keys)."""
    g = clusters.sums.size
    reader = UniformRows(stream, g, start)
    null = np.empty(stop - start)
    for first in range(0, stop - start, rows_per_batch):
        rows = min(rows_per_batch, stop - start - first)
        chosen = np.zeros((rows, g), dtype=bool)
        np.put_along_axis(chosen, np.argsort(reader.take(rows), axis=1)[:, :clusters.first], True, axis=1)
        null[first:first + rows] = _evaluate(clusters, statistic, chosen, fast)
    return null


def _evaluate(clusters: _Clusters, statistic: Statistic, chosen: np.ndarray, fast: bool) -> np.ndarray:
    """The statistic of each row of ``chosen`` (True: the cluster is in the first group)."""
    sums, sizes, values = clusters.sums, clusters.sizes, clusters.values
    with np.errstate(invalid="ignore", divide="ignore"):
        if fast and statistic.form == "mean":
            # row sums, not a BLAS product, so the batch size never changes a bit
            n1 = np.where(chosen, sizes, 0.0).sum(axis=1)
            s1 = np.where(chosen, sums, 0.0).sum(axis=1)
            return s1 / n1 - (sums.sum() - s1) / (sizes.sum() - n1)
        return np.array([float(statistic.compute(values[row], values[~row])) for row in chosen[:, clusters.member]])
