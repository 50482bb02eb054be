"""Kaplan–Meier statistics of censored data, and the log-rank statistic.

Data layout: a censored observation is a row (time, event) of a two-column sample (observation axis
first in the engines, ``(..., 2, n)`` in ``compute``): ``event`` is 1 when the event was observed at
``time`` and 0 when the observation was censored there (still event-free at ``time``). Left-censored
concentrations (1 = detected, 0 = below the reported limit) are flipped by ``compile`` to times
``M − x`` (M the largest value of the analysis), which are right-censored; a flipped statistic
(:class:`SurvivalSpec` ``flip``) maps its result back to the concentration scale.

Conventions (README, "Censored data"):

* Kaplan–Meier: at each distinct time t_j with d_j events among the n_j observations whose time is
  ≥ t_j, S(t) = Π_{t_j ≤ t} (1 − d_j/n_j); censored observations at t_j are at risk at t_j (events
  before censorings at tied times).
* q-quantile: the smallest t_j with S(t_j) ≤ 1 − q (so the median is the smallest time with
  S ≤ 0.5). ``≤`` is judged with a rounding allowance of 4·n·2⁻⁵² (n the group size), which covers
  the rounding of a product of at most n factors; exact plateaus at 1 − q therefore count as
  reached (statsmodels' ``SurvfuncRight.quantile`` uses ``<`` and then answers the next time).
  Never reached: +∞ (the quantile lies beyond the follow-up).
* survival at a time a: S(a). Undefined (NaN) when a lies beyond the sample's last time and the
  last observation is censored (S is not estimated there).
* RMST to a horizon τ: ∫₀^τ S(t) dt = τ·S(τ) + Σ_{t_j ≤ τ} t_j (S(t_{j−1}) − S(t_j)); undefined as
  above when τ lies beyond the sample's last time with S > 0 there.
* Kaplan–Meier mean: the RMST to the sample's largest time (restricted to the follow-up; biased
  low when the largest time is censored).

Every sum over the grid of distinct times is sequential (``cumsum``, ``cumprod``), so grid times
without observations (zero counts) change no bit: the fast path over a group's once-sorted times
(:class:`SurvivalFastPath`) and the plain computation over each batch's own times give identical
numbers (tested).

Log-rank (two groups, optionally stratified by a third column of stratum codes): per stratum and
distinct time, O₁ − E₁ = Σ (d₁ⱼ − n₁ⱼ dⱼ/nⱼ) and V = Σ n₁ⱼ n₂ⱼ dⱼ (nⱼ − dⱼ) / (nⱼ² (nⱼ − 1)),
summed over strata; the statistic is Z = (O₁ − E₁)/√V (positive: more events in the first group than
expected), whose square is the usual 1-degree-of-freedom chi-square.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from planrunner.engines.statistics import Statistic, register

__all__ = [
    "Curve",
    "LEFT_REFUSED",
    "SurvivalCompute",
    "SurvivalFastPath",
    "SurvivalSpec",
    "curve",
    "flipped",
    "kaplan_meier",
    "logrank_parts",
    "quantile_allowance",
]

ROUNDING = 4.0 * 2.0 ** -52  # per factor of the Kaplan–Meier product (see the module notes)


def quantile_allowance(n: int) -> float:
    """The rounding allowance of ``S ≤ 1 − q`` for a group of n observations."""
    return ROUNDING * max(n, 1)


@dataclass(frozen=True)
class SurvivalSpec:
    """What a Kaplan–Meier statistic reads off each group's curve, and how groups are combined."""

    kind: str  # "quantile", "at", "rmst", "mean"
    value: float | None = None  # the quantile level, the time, or the horizon
    combine: str | None = None  # None (one group), "difference" or "ratio" (first over second)
    flip: float | None = None  # left censoring: the data are M − x with M = flip


def kaplan_meier(grid: np.ndarray, deaths: np.ndarray, total: np.ndarray) -> np.ndarray:
    """S after each grid time, rows of counts: ``deaths`` and ``total`` (events plus censorings) per
    grid time, shape (rows, K). At risk at t_j: the row's n minus those before t_j (whole numbers,
    exact); a time nobody reaches (at risk 0, hence no deaths) has hazard 0."""
    at_risk = total.sum(axis=1, keepdims=True) - np.cumsum(total, axis=1) + total
    return np.cumprod(1.0 - deaths / np.maximum(at_risk, 1), axis=1)


@dataclass(frozen=True)
class Curve:
    """The Kaplan–Meier curve of one sample: S after each distinct time, with the counts behind it."""

    times: np.ndarray  # distinct times, increasing
    survival: np.ndarray  # S(t) after each distinct time
    at_risk: np.ndarray  # observations with time ≥ t
    events: np.ndarray  # events at t
    censored: np.ndarray  # censorings at t


def curve(times: np.ndarray, events: np.ndarray) -> Curve:
    """The Kaplan–Meier curve of (time, 0/1 event) observations (the engines' own computation)."""
    t = np.asarray(times, dtype=np.float64)
    grid, codes = np.unique(t, return_inverse=True)
    coded = 2 * codes.reshape(1, -1).astype(np.int64) + (np.asarray(events) == 1).reshape(1, -1)
    deaths, total = _counts(coded, grid.shape[0])
    surv = kaplan_meier(grid, deaths, total)[0]
    at_risk = np.cumsum(total[0, ::-1])[::-1]
    return Curve(grid, surv, at_risk, deaths[0], total[0] - deaths[0])


def _last_index(total: np.ndarray) -> np.ndarray:
    """Index of each row's largest observed time."""
    return total.shape[1] - 1 - np.argmax(total[:, ::-1] > 0, axis=1)


def _read(spec: SurvivalSpec, grid: np.ndarray, surv: np.ndarray, total: np.ndarray, n: np.ndarray | int,
          level: float | None = None) -> np.ndarray:
    """The spec's value on the time scale for rows of curves (NaN where undefined, +∞ not reached)."""
    rows = surv.shape[0]
    if spec.kind == "quantile":
        chosen = spec.value if level is None else level
        assert chosen is not None  # a quantile statistic is bound to its level
        threshold = 1.0 - chosen
        hit = surv <= threshold + ROUNDING * np.maximum(np.reshape(n, (-1, 1)), 1)
        first = np.argmax(hit, axis=1)
        return np.where(hit.any(axis=1), grid[first], np.inf)
    last = _last_index(total)
    last_time = grid[last]
    last_surv = surv[np.arange(rows), last]
    if spec.kind == "mean":
        reach = last_time
    else:
        assert spec.value is not None
        reach = np.full(rows, spec.value)
    defined = (reach <= last_time) | (last_surv == 0.0)
    before = np.searchsorted(grid, reach, side="right") - 1  # last grid time ≤ reach (−1: none)
    at = np.where(before >= 0, surv[np.arange(rows), np.maximum(before, 0)], 1.0)
    if spec.kind == "at":
        return np.where(defined, at, np.nan)
    # area = reach·S(reach) + Σ_{t_j ≤ reach} t_j (S_{j−1} − S_j), summed in grid order
    previous = np.empty_like(surv)
    previous[:, 0] = 1.0
    previous[:, 1:] = surv[:, :-1]
    drops = (previous - surv) * grid
    drops[grid[None, :] > reach[:, None]] = 0.0
    area = np.cumsum(drops, axis=1)[:, -1] + reach * at
    return np.where(defined, area, np.nan)


def _on_scale(spec: SurvivalSpec, value: np.ndarray) -> np.ndarray:
    """Back from flipped times M − x to concentrations (left censoring)."""
    return value if spec.flip is None else spec.flip - value


def _level(spec: SurvivalSpec) -> float | None:
    # the q-quantile of x is M minus the (1 − q)-quantile of M − x
    if spec.kind == "quantile" and spec.flip is not None:
        assert spec.value is not None
        return 1.0 - spec.value
    return None


def _combine(spec: SurvivalSpec, values: list[np.ndarray]) -> np.ndarray:
    if spec.combine is None:
        return values[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        return values[0] - values[1] if spec.combine == "difference" else values[0] / values[1]


def _counts(coded: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray]:
    """Events and observations per (row, grid time) from codes 2·(grid index) + event, shape (rows, m):
    one ``bincount`` of the rows' cells (each row offset by 2·width)."""
    rows = coded.shape[0]
    cells = coded + (np.arange(rows, dtype=np.int64) * (2 * width))[:, None]
    both = np.bincount(cells.ravel(), minlength=rows * 2 * width).reshape(rows, width, 2)
    deaths = both[:, :, 1]
    return deaths, both[:, :, 0] + deaths


def _masked(codes: np.ndarray, mask: np.ndarray, width: int) -> np.ndarray:
    """Observations per (row, cell) among those where ``mask`` holds."""
    rows = codes.shape[0]
    cells = codes + (np.arange(rows, dtype=np.int64) * width)[:, None]
    return np.bincount(cells[mask], minlength=rows * width).reshape(rows, width).astype(np.float64)


class SurvivalCompute:
    """The plain computation of a Kaplan–Meier statistic (a class, so that it pickles)."""

    def __init__(self, spec: SurvivalSpec):
        self.spec = spec

    def group_value(self, xy: np.ndarray) -> np.ndarray:
        lead = xy.shape[:-2]
        n = xy.shape[-1]
        flat = xy.reshape(-1, 2, n)
        times, events = flat[:, 0, :], flat[:, 1, :] == 1.0
        grid = np.unique(times)  # the batch's distinct times (extra grid times change no bit)
        codes = np.searchsorted(grid, times)
        deaths, total = _counts(2 * codes + events, grid.shape[0])
        surv = kaplan_meier(grid, deaths, total)
        value = _read(self.spec, grid, surv, total, n, _level(self.spec))
        return _on_scale(self.spec, value).reshape(lead)

    def __call__(self, *groups: np.ndarray) -> np.ndarray:
        lead = np.broadcast_shapes(*(g.shape[:-2] for g in groups))
        values = [self.group_value(np.broadcast_to(g, lead + g.shape[-2:])) for g in groups]
        return _combine(self.spec, values)


class SurvivalFastPath:
    """Kaplan–Meier statistics over each group's once-sorted distinct times (DEVELOPERS.md: fast
    paths): a resample is turned into counts per distinct time by ``bincount`` of precomputed time
    codes, with no per-resample sort or float gather. Identical numbers to the plain computation."""

    def __init__(self, statistic: Statistic, groups: tuple[np.ndarray, ...]):
        compute = statistic.compute
        assert isinstance(compute, SurvivalCompute)
        self.spec = compute.spec
        self.grids, self.codes, self.events, self.coded = [], [], [], []
        for a in groups:
            grid, codes = np.unique(a[:, 0], return_inverse=True)
            self.grids.append(grid)
            self.codes.append(codes.reshape(-1).astype(np.int64))
            self.events.append(a[:, 1] == 1.0)
            self.coded.append(2 * self.codes[-1] + self.events[-1])  # grid index and event in one code

    @staticmethod
    def applies(statistic: Statistic, inner: str | None) -> bool:
        return inner is None and statistic.form == "survival" and isinstance(statistic.compute, SurvivalCompute)

    def _group(self, g: int, index: np.ndarray) -> np.ndarray:
        deaths, total = _counts(self.coded[g][index], self.grids[g].shape[0])
        return self.from_counts(g, deaths, total, index.shape[1])

    def from_counts(self, g: int, deaths: np.ndarray, total: np.ndarray, n: np.ndarray | int) -> np.ndarray:
        surv = kaplan_meier(self.grids[g], deaths, total)
        return _on_scale(self.spec, _read(self.spec, self.grids[g], surv, total, n, _level(self.spec)))

    def compute(self, index_by_group: list[np.ndarray]) -> np.ndarray:
        return _combine(self.spec, [self._group(g, idx) for g, idx in enumerate(index_by_group)])

    def compute_weighted(self, weights_by_group: list[np.ndarray]) -> np.ndarray:
        """The statistic when each observation is taken ``weights[r, i]`` times in resample r (clusters)."""
        values = []
        for g, w in enumerate(weights_by_group):
            rows, width = w.shape[0], self.grids[g].shape[0]
            cells = (self.codes[g][None, :] + (np.arange(rows, dtype=np.int64) * width)[:, None]).ravel()
            flat = w.ravel().astype(np.float64)
            total = np.bincount(cells, weights=flat, minlength=rows * width).reshape(rows, width)
            deaths = np.bincount(cells, weights=flat * np.tile(self.events[g], rows),
                                 minlength=rows * width).reshape(rows, width)
            values.append(self.from_counts(g, deaths, total, np.rint(w.sum(axis=1)).astype(np.int64)))
        return _combine(self.spec, values)


def flipped(statistic: Statistic, largest: float) -> Statistic:
    """The statistic of left-censored values x computed on the flipped times ``largest − x``."""
    compute = statistic.compute
    assert isinstance(compute, SurvivalCompute)
    return replace(statistic, compute=SurvivalCompute(replace(compute.spec, flip=float(largest))))


# ------------------------------------------------------------------ the log-rank statistic


def logrank_parts(first: np.ndarray, second: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(O₁ − E₁, V) of each row: ``first`` and ``second`` of shape (rows, 3, n) hold time, event and
    stratum code (see the module notes)."""
    pooled = np.concatenate([first, second], axis=-1)
    rows, _, n = pooled.shape
    n1 = first.shape[-1]
    times, events = pooled[:, 0, :], pooled[:, 1, :] == 1.0
    strata_values, strata = np.unique(pooled[:, 2, :], return_inverse=True)
    strata = strata.reshape(rows, n)
    grid = np.unique(times)
    width = grid.shape[0]
    codes = strata * width + np.searchsorted(grid, times)
    cells = strata_values.shape[0] * width
    in_first = np.zeros((rows, n), dtype=bool)
    in_first[:, :n1] = True
    deaths = _masked(codes, events, cells)
    total = _masked(codes, np.ones_like(events), cells)
    deaths1 = _masked(codes, events & in_first, cells)
    total1 = _masked(codes, in_first, cells)  # observations of the first group per cell
    shape = (rows, strata_values.shape[0], width)

    def at_risk(counts: np.ndarray) -> np.ndarray:
        # observations with time ≥ t_j within each stratum: reverse cumulative sums of each stratum's block
        return np.cumsum(counts.reshape(shape)[:, :, ::-1], axis=2)[:, :, ::-1].reshape(rows, cells)

    risk, risk1 = at_risk(total), at_risk(total1)
    with np.errstate(invalid="ignore", divide="ignore"):
        expected = np.where(risk > 0, risk1 * deaths / np.maximum(risk, 1.0), 0.0)
        spread = np.where(risk > 1, risk1 * (risk - risk1) * deaths * (risk - deaths)
                          / (np.maximum(risk, 1.0) ** 2 * np.maximum(risk - 1.0, 1.0)), 0.0)
    return (deaths1 - expected).sum(axis=1), spread.sum(axis=1)


def _logrank(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    lead = np.broadcast_shapes(first.shape[:-2], second.shape[:-2])
    a = np.broadcast_to(first, lead + first.shape[-2:]).reshape(-1, 3, first.shape[-1])
    b = np.broadcast_to(second, lead + second.shape[-2:]).reshape(-1, 3, second.shape[-1])
    difference, variance = logrank_parts(a, b)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (difference / np.sqrt(variance)).reshape(lead)


# ------------------------------------------------------------------ registry

# statistics that need S beyond a time or a horizon: meaningless on the flipped scale of left censoring
LEFT_REFUSED = frozenset({"survival_at", "rmst", "survival_difference", "rmst_difference", "rmst_ratio"})


class _Maker:
    """Makes the computable statistic for one parameter value (a class, so that it pickles)."""

    def __init__(self, kind: str, combine: str | None):
        self.kind, self.combine = kind, combine

    def __call__(self, value: float) -> SurvivalCompute:
        return SurvivalCompute(SurvivalSpec(self.kind, value, self.combine))


def _survival(name: str, label: str, samples: int, smooth: bool, kind: str, combine: str | None = None,
              parameter: str | None = None, value: float | None = None) -> None:
    compute = SurvivalCompute(SurvivalSpec(kind, value, combine))
    if parameter is None:
        register(Statistic(name, label, samples, smooth, "censored", compute, columns=2, form="survival"))
    else:
        register(Statistic(name, label, samples, smooth, "censored", compute, columns=2, form="survival",
                           parameter=parameter, maker=_Maker(kind, combine)))


_survival("km_median", "Kaplan–Meier median", 1, False, "quantile", value=0.5)
_survival("km_quantile", "Kaplan–Meier {value} quantile", 1, False, "quantile", parameter="quantile")
_survival("survival_at", "Kaplan–Meier survival (at {value})", 1, True, "at", parameter="at")
_survival("rmst", "restricted mean survival time (horizon {value})", 1, True, "rmst", parameter="horizon")
_survival("km_mean", "Kaplan–Meier mean (restricted to the largest time)", 1, True, "mean")
_survival("km_median_difference", "difference in Kaplan–Meier medians", 2, False, "quantile", "difference",
          value=0.5)
_survival("survival_difference", "difference in Kaplan–Meier survival (at {value})", 2, True, "at", "difference",
          parameter="at")
_survival("rmst_difference", "difference in restricted mean survival time (horizon {value})", 2, True, "rmst",
          "difference", parameter="horizon")
_survival("rmst_ratio", "ratio of restricted mean survival times (horizon {value})", 2, True, "rmst", "ratio",
          parameter="horizon")
_survival("km_mean_difference", "difference in Kaplan–Meier means (restricted to the largest time)", 2, True,
          "mean", "difference")
register(Statistic("logrank", "log-rank Z, (O1 - E1) / sqrt(V)", 2, True, "censored", _logrank, columns=3))
