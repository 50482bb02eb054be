"""Delete-one jackknife, within each group.

Conventions (V-CONV-JACK; E&T ch. 11), for groups g = 1..G with n_g observations:

* θ_(g,i) is the statistic with observation i of group g deleted, other groups whole;
  θ̄_g is the mean of the n_g replicates of group g.
* bias = Σ_g (n_g − 1)(θ̄_g − θ̂);  se = sqrt(Σ_g (n_g − 1)/n_g Σ_i (θ_(g,i) − θ̄_g)²);
  corrected estimate θ̂ − bias; pseudo-values n_g θ̂ − (n_g − 1) θ_(g,i).
  With two groups and a difference of means, se = sqrt(s₁²/n₁ + s₂²/n₂) (identity 6).

Replicates come in closed form for the mean, proportion and mean difference (O(n)), and for the
median and any quantile (the delete-one values take at most 3 distinct values of the sorted data,
O(n), by partition: no sort)); the delete-one-cluster jackknife loops over clusters; any other
statistic goes through a blocked loop over deletions that keeps memory bounded.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from planrunner.engines.results import EngineWarning, JackknifeResult, frozen_array
from planrunner.engines.statistics import (
    Statistic,
    check_samples,
    check_strata,
    take_observations,
    to_compute_layout,
)
from planrunner.errors import EngineError

__all__ = ["JackknifeOptions", "JackknifeResult", "cluster_replicates", "jackknife", "jackknife_replicates"]

SMALL_SAMPLE = 10  # common practice: below about 10 observations resampling summaries are rough


@dataclass(frozen=True)
class JackknifeOptions:
    """What a plan may set for a jackknife (compile builds it once per analysis).

    The delete-one jackknife has no choice to make today: the design (clusters) is data, not an
    option. A key the plan gains goes here, with its one default, and into ``settings``.
    """

    def settings(self) -> dict[str, Any]:
        """The record's ``settings``."""
        return {}


def jackknife(samples: Sequence[np.ndarray], statistic: Statistic, options: JackknifeOptions = JackknifeOptions(),
              *, clusters: Sequence[np.ndarray] | None = None,
              batch_elements: int = 2_000_000) -> JackknifeResult:
    """Delete-one jackknife bias, standard error and pseudo-values of ``statistic``.

    With ``clusters`` (integer codes per group) whole clusters are deleted one at a time, and
    n_g in the formulas is the number of clusters of group g (replicates in cluster-code order).
    """
    data = check_samples(samples, statistic, minimum=1 if clusters is not None else 2, method="the jackknife")
    estimate = float(statistic.compute(*[to_compute_layout(a) for a in data]))
    if not math.isfinite(estimate):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    if clusters is None:
        replicates = _replicates(data, statistic, batch_elements)
    else:
        replicates = cluster_replicates(data, statistic, check_strata(clusters, data))
    n = tuple(int(r.shape[0]) for r in replicates)

    bias = 0.0
    sum_sq = 0.0
    pseudo = []
    for reps, n_g in zip(replicates, n):
        mean_g = float(np.mean(reps))
        bias += (n_g - 1) * (mean_g - estimate)
        sum_sq += (n_g - 1) / n_g * float(np.sum((reps - mean_g) ** 2))
        pseudo.append(frozen_array(n_g * estimate - (n_g - 1) * reps))

    warnings = []
    if not statistic.smooth:
        warnings.append(EngineWarning(
            "jackknife-non-smooth",
            f"the jackknife is unreliable for the {statistic.label}, which is not a smooth statistic: "
            "its delete-one values take only a few distinct values (for the median of an even number "
            "of observations the jackknife bias is exactly 0, which says nothing about the real bias); "
            "prefer the bootstrap for this statistic"))
    small = [f"group {g + 1} (n = {k})" for g, k in enumerate(n) if k < SMALL_SAMPLE]
    if small:
        warnings.append(EngineWarning(
            "small-sample",
            f"fewer than {SMALL_SAMPLE} observations in {', '.join(small)}: "
            "the jackknife standard error and bias are rough"))

    warnings += _degenerate_spread(data, statistic, sum_sq)

    scheme = "delete-one observation" if len(data) == 1 else "delete-one observation within each group"
    if clusters is not None:
        scheme = "delete-one cluster" if len(data) == 1 else "delete-one cluster within each group"
        small = [f"group {g + 1} ({k} clusters)" for g, k in enumerate(n) if k < SMALL_SAMPLE]
        if small:
            warnings.append(EngineWarning(
                "few-clusters", f"fewer than {SMALL_SAMPLE} clusters in {', '.join(small)}: the delete-one-cluster "
                "standard error and bias are rough"))
    return JackknifeResult(
        estimate=estimate,
        bias=bias,
        standard_error=math.sqrt(sum_sq),
        corrected_estimate=estimate - bias,
        replicates=tuple(frozen_array(r) for r in replicates),
        pseudo_values=tuple(pseudo),
        n=n,
        warnings=tuple(warnings),
        scheme=scheme,
        conventions={
            "standard_error": "sqrt(sum over groups of (n_g-1)/n_g * sum_i (theta_(g,i) - mean_g)^2)",
            "bias": "sum over groups of (n_g-1) * (mean_g - theta_hat)",
            "pseudo_values": "n_g * theta_hat - (n_g-1) * theta_(g,i)",
            "replicates": "closed forms for the mean (O(n)) and for the median and quantiles (O(n), by "
                          "partition around the order statistics read); other statistics delete one at a time"
                          + ("; clusters: n_g is the number of clusters of group g" if clusters is not None else ""),
        },
    )


def jackknife_replicates(samples: Sequence[np.ndarray], statistic: Statistic, *,
                         batch_elements: int = 2_000_000) -> tuple[np.ndarray, ...]:
    """Delete-one replicates per group: element i of entry g deletes observation i of group g."""
    data = check_samples(samples, statistic, minimum=2, method="the jackknife")
    return tuple(frozen_array(r) for r in _replicates(data, statistic, batch_elements))


def _replicates(data: tuple[np.ndarray, ...], statistic: Statistic,
                batch_elements: int) -> list[np.ndarray]:
    if statistic.form is not None and statistic.columns == 1 and statistic.samples in (1, 2):
        deleted: Callable[[np.ndarray], np.ndarray]
        loc: Callable[[np.ndarray], Any]
        if statistic.form == "mean":
            deleted, loc = _delete_one_mean, np.mean
        elif statistic.form == "median":
            deleted, loc = _delete_one_median, np.median
        else:
            q = statistic.value
            assert q is not None, "a quantile statistic must be bound to its level"
            deleted = lambda x: _delete_one_quantile(x, q)  # noqa: E731
            loc = lambda x: np.quantile(x, q)  # noqa: E731
        if statistic.samples == 1:
            reps = [deleted(data[0])]
        else:
            # the form says θ = loc(group 1) − loc(group 2); the location is the one-group statistic
            whole = [float(loc(a)) for a in data]
            reps = [deleted(data[0]) - whole[1], whole[0] - deleted(data[1])]
    else:
        reps = _generic(data, statistic, batch_elements)
    for g, r in enumerate(reps):
        bad = ~np.isfinite(r)
        if bad.any():
            raise EngineError(
                f"the statistic {statistic.name!r} is not finite when observation "
                f"{int(np.flatnonzero(bad)[0]) + 1} of group {g + 1} is deleted",
                hint="the jackknife cannot be used for these data")
    return reps


def cluster_replicates(data: tuple[np.ndarray, ...], statistic: Statistic,
                       clusters: tuple[np.ndarray, ...] | None) -> list[np.ndarray]:
    """Delete-one-cluster replicates: entry g, element k deletes the k-th cluster (ascending code) of group g."""
    assert clusters is not None
    whole = [to_compute_layout(a) for a in data]
    reps = []
    for g, a in enumerate(data):
        ids = np.unique(clusters[g])
        if ids.size < 2:
            raise EngineError(f"group {g + 1} has a single cluster; the delete-one-cluster jackknife needs two",
                              hint="use more clusters or another method")
        out = np.empty(ids.size, dtype=np.float64)
        for k, code in enumerate(ids):
            kept = to_compute_layout(a[clusters[g] != code])
            with np.errstate(invalid="ignore", divide="ignore"):
                out[k] = float(statistic.compute(*[kept if h == g else w for h, w in enumerate(whole)]))
        if not np.isfinite(out).all():
            bad = int(ids[np.flatnonzero(~np.isfinite(out))[0]])
            raise EngineError(f"the statistic {statistic.name!r} is not finite when cluster {bad} of group "
                              f"{g + 1} is deleted", hint="the jackknife cannot be used for these data")
        reps.append(out)
    return reps


def _delete_one_mean(x: np.ndarray) -> np.ndarray:
    """x̄_(i) = x̄ + (x̄ − x_i)/(n − 1): the deviation form keeps full precision."""
    mean = np.mean(x)
    return mean + (mean - x) / (x.shape[0] - 1)


def _delete_one_median(x: np.ndarray) -> np.ndarray:
    """Median of x without x_i for every i (at most 3 distinct values); see ``_delete_one_order``."""
    return _delete_one_order(x, 0.5, np.median)


def _delete_one_quantile(x: np.ndarray, q: float) -> np.ndarray:
    """Linear-interpolation quantile (numpy's default) of x without x_i; see ``_delete_one_order``."""
    return _delete_one_order(x, q, lambda a: np.quantile(a, q))


def _delete_one_order(x: np.ndarray, q: float, location: Callable[[np.ndarray], float]) -> np.ndarray:
    """Delete-one values of an order-statistic location (median, quantile) in O(n), no sort.

    With s the sorted data and j = floor((n − 2)q), the location of the n − 1 values left after
    deleting x_i reads only the order statistics j and j + 1 of the rest, s'[k] = s[k] below the
    deleted rank and s[k + 1] from it on. So there are three cases, decided by value:
    x_i < s[j+1] (the rest is s without s[j]); x_i = s[j+1] (without s[j+1]); x_i > s[j+1]
    (without some s[k], k ≥ j + 2). Deleting either of two tied values leaves the same data, so
    comparing values is exact. Each case is evaluated once by numpy itself on the data partitioned
    around j, j + 1, j + 2 (the location depends only on those order statistics), so the values are
    identical to the plain computation.
    """
    n = x.shape[0]
    j = int(math.floor((n - 2) * q))
    kth = sorted({min(k, n - 1) for k in (j, j + 1, j + 2)})
    p = np.partition(x, kth)
    pivot = p[j + 1]
    out = np.empty(n, dtype=np.float64)
    for mask, drop in ((x < pivot, j), (x == pivot, j + 1), (x > pivot, min(j + 2, n - 1))):
        if mask.any():
            out[mask] = location(np.delete(p, drop))
    return out


def _generic(data: tuple[np.ndarray, ...], statistic: Statistic, batch_elements: int) -> list[np.ndarray]:
    """Any statistic: evaluate the deletions of each group in bounded blocks of rows."""
    whole = [to_compute_layout(a) for a in data]
    reps = []
    for g, a in enumerate(data):
        n = a.shape[0]
        width = (n - 1) * statistic.columns
        rows_per_block = max(1, batch_elements // max(1, width))
        out = np.empty(n, dtype=np.float64)
        keep = np.arange(n - 1)
        for start in range(0, n, rows_per_block):
            deleted = np.arange(start, min(n, start + rows_per_block))
            # row r keeps every observation but `deleted[r]`
            index = keep[None, :] + (keep[None, :] >= deleted[:, None])
            args = []
            for h, other in enumerate(whole):
                if h == g:
                    args.append(take_observations(a, index))
                else:
                    args.append(np.broadcast_to(other, (deleted.size,) + other.shape))
            out[start:start + deleted.size] = statistic.compute(*args)
        reps.append(out)
    return reps


def _degenerate_spread(data: Sequence[np.ndarray], statistic: Statistic, sum_sq: float) -> list[EngineWarning]:
    """A standard error of 0, or one from a 0/1 outcome with an empty cell, does not describe the
    statistic's uncertainty: say so beside the number instead of printing it plainly."""
    out = []
    if statistic.outcome == "binary":
        for g, values in enumerate(data):
            events = int(np.sum(values))
            if events in (0, values.shape[0]):
                what = "no events (every value 0)" if events == 0 else "no non-events (every value 1)"
                out.append(EngineWarning(
                    "zero-cell",
                    f"group {g + 1} has {what}: the {statistic.label} stays at its boundary in every "
                    "delete-one value that keeps the cell empty, so the jackknife standard error understates "
                    "its uncertainty (it is 0 when every deletion gives the same value); report the counts, "
                    "or use an exact permutation test"))
    if sum_sq == 0.0:
        out.append(EngineWarning(
            "zero-standard-error",
            "every delete-one value equals the estimate, so the jackknife standard error is 0: the data "
            "cannot show this statistic's variability, which does not make it certain"))
    return out
