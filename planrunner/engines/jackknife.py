"""Delete-one jackknife, within each group.

Conventions (REFERENCES §0.1; E&T ch. 11), for groups g = 1..G with n_g observations:

* θ_(g,i) is the statistic with observation i of group g deleted, other groups whole;
  θ̄_g is the mean of the n_g replicates of group g.
* bias = Σ_g (n_g − 1)(θ̄_g − θ̂);  se = sqrt(Σ_g (n_g − 1)/n_g Σ_i (θ_(g,i) − θ̄_g)²);
  corrected estimate θ̂ − bias; pseudo-values n_g θ̂ − (n_g − 1) θ_(g,i).
  With two groups and a difference of means, se = sqrt(s₁²/n₁ + s₂²/n₂) (identity 6).

Replicates come in closed form for the mean, proportion and mean difference (O(n)), and for the
median (the delete-one medians take at most 3 distinct values of the sorted data); any other
statistic goes through a blocked loop over deletions that keeps memory bounded.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from planrunner.errors import EngineError
from planrunner.engines.results import EngineWarning, JackknifeResult, frozen_array
from planrunner.engines.statistics import Statistic, check_samples, take_observations, to_compute_layout

__all__ = ["JackknifeResult", "jackknife", "jackknife_replicates"]

SMALL_SAMPLE = 10  # common practice: below about 10 observations resampling summaries are rough


def jackknife(samples: Sequence[np.ndarray], statistic: Statistic, *,
              batch_elements: int = 2_000_000) -> JackknifeResult:
    """Delete-one jackknife bias, standard error and pseudo-values of ``statistic``."""
    data = check_samples(samples, statistic, minimum=2, method="the jackknife")
    estimate = float(statistic.compute(*[to_compute_layout(a) for a in data]))
    if not math.isfinite(estimate):
        raise EngineError(f"the statistic {statistic.name!r} is not finite on the data")
    replicates = _replicates(data, statistic, batch_elements)
    n = tuple(int(a.shape[0]) for a in data)

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

    scheme = "delete-one observation" if len(data) == 1 else "delete-one observation within each group"
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
        deleted = _delete_one_mean if statistic.form == "mean" else _delete_one_median
        if statistic.samples == 1:
            reps = [deleted(data[0])]
        else:
            # the form says θ = loc(group 1) − loc(group 2); the location is the one-group statistic
            loc = [float(np.mean(a)) if statistic.form == "mean" else float(np.median(a)) for a in data]
            reps = [deleted(data[0]) - loc[1], loc[0] - deleted(data[1])]
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


def _delete_one_mean(x: np.ndarray) -> np.ndarray:
    """x̄_(i) = x̄ + (x̄ − x_i)/(n − 1): the deviation form keeps full precision."""
    mean = np.mean(x)
    return mean + (mean - x) / (x.shape[0] - 1)


def _delete_one_median(x: np.ndarray) -> np.ndarray:
    """Median of x without x_i, from the sorted data: at most 3 distinct values.

    n even (n − 1 odd, middle index m = n/2 − 1 of the rest): s[m+1] if rank(i) ≤ m else s[m].
    n odd (h = (n − 1)/2): (s[h]+s[h+1])/2 if rank < h; (s[h−1]+s[h+1])/2 if rank = h;
    (s[h−1]+s[h])/2 if rank > h. Deleting either of two tied values leaves the same data, so any
    ranking of ties gives the same replicate.
    """
    n = x.shape[0]
    order = np.argsort(x, kind="stable")
    s = x[order]
    rank = np.empty(n, dtype=np.int64)
    rank[order] = np.arange(n)
    if n % 2 == 0:
        m = n // 2 - 1
        return np.where(rank <= m, s[m + 1], s[m]).astype(np.float64)
    h = (n - 1) // 2
    low = (s[h] + s[h + 1]) / 2
    mid = (s[h - 1] + s[h + 1]) / 2
    high = (s[h - 1] + s[h]) / 2
    return np.where(rank < h, low, np.where(rank == h, mid, high)).astype(np.float64)


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
