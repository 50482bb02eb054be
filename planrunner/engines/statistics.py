"""The statistics a plan can name, and the sample checks shared by the engines.

A :class:`Statistic` is a vectorised function of one array per group. Each array has the
observations on its LAST axis and any number of leading batch axes; the function reduces the last
axis and returns the leading shape. ``compute(x)`` with ``x.shape == (rows, n)`` returns ``(rows,)``.

Multi-column observations (``columns > 1``, e.g. a pair (x, y) per subject for a correlation) are
passed to the engines as ``(n, columns)`` arrays, observation axis FIRST as in a table; the engines
hand them to ``compute`` as ``(..., columns, n)`` so that the observation axis is still last.

Every statistic must be a symmetric function of the observations within a group (the engines
may present a group's observations in any order).

Adding a statistic is one :func:`register` call; ``form`` tells the engines about closed forms
("mean": the group mean, or the first group's minus the second's; "median" likewise), which they
use only where verified equal to the plain computation.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from planrunner.errors import EngineError

__all__ = [
    "STATISTICS",
    "Statistic",
    "check_samples",
    "check_strata",
    "get_statistic",
    "register",
    "take_observations",
    "to_compute_layout",
]


@dataclass(frozen=True)
class Statistic:
    """A named statistic of one group, or of two groups (first minus second)."""

    name: str
    label: str
    samples: int
    smooth: bool
    outcome: str
    compute: Callable[..., np.ndarray]
    columns: int = 1
    form: str | None = None

    def __post_init__(self) -> None:
        if self.outcome not in ("numeric", "binary"):
            raise ValueError(f"outcome must be 'numeric' or 'binary', got {self.outcome!r}")
        if self.form not in (None, "mean", "median"):
            raise ValueError(f"unknown form {self.form!r}")
        if self.samples < 0 or self.columns < 1:
            raise ValueError("samples must be >= 0 (0: two or more groups) and columns >= 1")


STATISTICS: dict[str, Statistic] = {}


def register(statistic: Statistic) -> Statistic:
    """Add a statistic to the registry (names are unique)."""
    if statistic.name in STATISTICS:
        raise ValueError(f"statistic {statistic.name!r} is already registered")
    STATISTICS[statistic.name] = statistic
    return statistic


def get_statistic(name: str) -> Statistic:
    """The registered statistic called ``name``; unknown names raise KeyError listing the known ones."""
    try:
        return STATISTICS[name]
    except KeyError:
        known = ", ".join(sorted(STATISTICS))
        raise KeyError(f"unknown statistic {name!r}; known statistics: {known}") from None


def _mean(x: np.ndarray) -> np.ndarray:
    return np.mean(x, axis=-1)


def _median(x: np.ndarray) -> np.ndarray:
    return np.median(x, axis=-1)


def _difference(one: Callable[[np.ndarray], np.ndarray]) -> Callable[[np.ndarray, np.ndarray], np.ndarray]:
    """first group minus second group of a one-group statistic"""

    def compute(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return one(x) - one(y)

    compute.__name__ = f"{one.__name__.lstrip('_')}_difference"
    return compute


def _pearson(xy: np.ndarray) -> np.ndarray:
    """Pearson correlation of the two columns (predictor, outcome); xy has shape (..., 2, n)."""
    x = xy[..., 0, :] - xy[..., 0, :].mean(axis=-1, keepdims=True)
    y = xy[..., 1, :] - xy[..., 1, :].mean(axis=-1, keepdims=True)
    return (x * y).sum(axis=-1) / np.sqrt((x * x).sum(axis=-1) * (y * y).sum(axis=-1))


register(Statistic("mean", "mean", 1, True, "numeric", _mean, form="mean"))
register(Statistic("correlation", "Pearson correlation", 1, True, "numeric", _pearson, columns=2))
register(Statistic("median", "median", 1, False, "numeric", _median, form="median"))
register(Statistic("proportion", "proportion of 1s", 1, True, "binary", _mean, form="mean"))
register(Statistic("mean_difference", "difference in means", 2, True, "numeric",
                   _difference(_mean), form="mean"))
register(Statistic("median_difference", "difference in medians", 2, False, "numeric",
                   _difference(_median), form="median"))


# ---------------------------------------------------------------------------------------------
# Sample checks shared by the engines: what only the data can reveal.


def check_samples(samples: Sequence[np.ndarray], statistic: Statistic, *, minimum: int = 1,
                  method: str = "this method") -> tuple[np.ndarray, ...]:
    """Validate the groups and return them as float64 arrays, observation axis first.

    Raises EngineError for a wrong number of groups, a wrong shape, a group smaller than
    ``minimum``, a non-finite value, or a non-0/1 value for a binary statistic.
    """
    if len(samples) != statistic.samples and not (statistic.samples == 0 and len(samples) >= 2):
        wanted = "two or more" if statistic.samples == 0 else statistic.samples
        raise EngineError(
            f"statistic {statistic.name!r} takes {wanted} group(s), got {len(samples)}",
            hint="check the groups of the analysis")
    out = []
    for g, raw in enumerate(samples):
        a = np.asarray(raw, dtype=np.float64)
        want = 1 if statistic.columns == 1 else 2
        if a.ndim != want or (want == 2 and a.shape[1] != statistic.columns):
            shape = "(n,)" if want == 1 else f"(n, {statistic.columns})"
            raise EngineError(f"group {g + 1} has shape {a.shape}; {statistic.name!r} needs {shape}")
        n = a.shape[0]
        if n == 0:
            raise EngineError(f"group {g + 1} is empty", hint="check the row filter and the group levels")
        if n < minimum:
            raise EngineError(
                f"group {g + 1} has {n} observation(s); {method} needs at least {minimum}",
                hint="use more data or another method")
        bad = ~np.isfinite(a) if a.ndim == 1 else ~np.isfinite(a).all(axis=1)
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise EngineError(
                f"group {g + 1} has {int(bad.sum())} observation(s) with a non-finite value "
                f"(first: observation {first + 1})",
                hint="declare missing values in the plan (missing: drop) or fix the data")
        if statistic.outcome == "binary" and not np.isin(a, (0.0, 1.0)).all():
            raise EngineError(
                f"group {g + 1} has values other than 0 and 1; {statistic.name!r} needs a binary outcome",
                hint="code the outcome as 0/1")
        a = np.ascontiguousarray(a)
        a.flags.writeable = False
        out.append(a)
    return tuple(out)


def check_strata(strata: Sequence[np.ndarray] | None, samples: Sequence[np.ndarray]) -> tuple[np.ndarray, ...] | None:
    """Validate per-group stratum codes (integers, one per observation) and return them as int64."""
    if strata is None:
        return None
    if len(strata) != len(samples):
        raise EngineError(f"strata are given for {len(strata)} group(s) but there are {len(samples)}")
    out = []
    for g, (codes, a) in enumerate(zip(strata, samples)):
        c = np.asarray(codes)
        if c.ndim != 1 or c.shape[0] != a.shape[0]:
            raise EngineError(
                f"group {g + 1} has {a.shape[0]} observation(s) but {c.size} stratum code(s)")
        if c.size and not np.issubdtype(c.dtype, np.integer):
            if not (np.issubdtype(c.dtype, np.floating) and np.all(np.isfinite(c)) and np.all(c == np.round(c))):
                raise EngineError(f"stratum codes of group {g + 1} must be integers")
        out.append(np.asarray(c, dtype=np.int64))
    return tuple(out)


def to_compute_layout(a: np.ndarray) -> np.ndarray:
    """(n,) stays; (n, k) becomes (k, n): observation axis last, as ``compute`` expects."""
    return a if a.ndim == 1 else np.ascontiguousarray(a.T)


def take_observations(a: np.ndarray, index: np.ndarray) -> np.ndarray:
    """Gather observations of ``a`` (observation axis first) by an index array of shape (rows, m).

    Returns a C-contiguous ``(rows, m)`` or ``(rows, k, m)`` array ready for ``compute``;
    contiguity keeps the reductions bit-identical whatever the number of rows in a batch.
    """
    if a.ndim == 1:
        return a[index]
    return np.stack([a[:, c][index] for c in range(a.shape[1])], axis=-2)


# test statistics for permutation tests live in their own module and register themselves here
from planrunner.engines import teststats as _teststats  # noqa: E402,F401
