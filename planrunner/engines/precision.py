"""Resamples chosen to a stated precision, fixed in the plan before the data are seen.

Two published rules, both drawing whole blocks of :data:`~planrunner.engines.streams.DRAW_BLOCK`
resamples from the analysis's own stream, so that a run stopping after block k holds exactly the
first k blocks of any longer run (deterministic, the same on every executor, and re-run by
``verify`` to the same stop):

**Permutation tests: a sequential Monte Carlo test with bounded resampling risk** (Gandy 2009,
JASA 104:1504–1511). A Monte Carlo p-value counts S_n draws as extreme as the observed value among
n; S_n is binomial(n, p) with p the exact p-value. The test stops with "p > α" when S_n reaches an
upper boundary U_n and with "p ≤ α" when it falls to a lower boundary L_n. The boundaries are
computed once, under p = α, so that the probability of ever crossing each of them is at most ε:

    U_n = min{ j : P_α(not stopped before n, S_n ≥ j) + P_α(stopped above before n) ≤ ε_n },
    L_n = max{ j : P_α(not stopped before n, S_n ≤ j) + P_α(stopped below before n) ≤ ε_n },

with the spending sequence ε_n = ε · n / (n + 1000) (the paper's suggestion; from memory). Since the
number of exceedances grows stochastically with p, a p above α crosses L (the wrong way) with
probability at most P_α(crossing L) ≤ ε, and a p at or below α crosses U with probability at most
ε: the resampling risk, the chance that the decision differs from the exact p-value's, is at most ε
for every p. Here the boundaries are looked at only after each block of 1000 draws (n = 1000,
2000, ...): the argument holds for any fixed schedule of looks, and the null's mass between looks
is carried forward exactly by convolution with the binomial(1000, α) law. A run that reaches
``max_resamples`` without crossing is **unresolved**, and says so.

Several decisions at once: the doubled two-sided p-value is below α exactly when one one-sided
p-value is below α/2, so both sides are tested at α/2; a member of a multiplicity family is placed
against every level its family's adjustment may compare it with (``family_levels``). Each of these
K sequential tests gets risk ε/K (Bonferroni's inequality), so the chance that any decision is wrong
stays below ε.

**Bootstrap: the number of resamples for a target accuracy** (Andrews & Buchinsky 2000,
Econometrica 68:23–51, the three-step method). The Monte Carlo relative s.d. of the bootstrap SE
is sqrt((2 + γ₂)/(4B)), γ₂ the excess kurtosis of the replicates; for a target r it needs
B = (2 + γ₂)/(4r²). Step 1 takes B₁ = 1/(2r²) (γ₂ = 0); step 2 estimates γ₂ from those B₁
replicates and computes B₂; step 3 uses max(B₁, B₂). For an interval end the Monte Carlo s.d. is
sqrt(q(1 − q)/B)/f(x_q), so B₂ = B₁ · (s.d. at B₁ / target)² with the s.d. read from the B₁
replicates by the record's own band rule. Every B is rounded up to whole blocks of 1000 and
capped at ``max_resamples``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from planrunner.engines.blocks import bind, map_resamples
from planrunner.engines.lazy import stats
from planrunner.engines.streams import DRAW_BLOCK
from planrunner.errors import EngineError

__all__ = ["GANDY", "ANDREWS_BUCHINSKY", "SPENDING", "PrecisionOutcome", "SequentialTest", "TestPrecision",
           "BootstrapPrecision", "andrews_buchinsky_resamples", "boundaries", "draw_sequentially",
           "family_levels", "whole_blocks"]

GANDY = "sequential Monte Carlo test with bounded resampling risk (Gandy 2009)"
ANDREWS_BUCHINSKY = "three-step choice of the number of bootstrap resamples (Andrews & Buchinsky 2000)"
SPENDING = 1000  # k of the spending sequence ε_n = ε n / (n + k)
_NEGLIGIBLE = 1e-300  # null mass below this is dropped at the ends of the carried distribution


@dataclass(frozen=True)
class TestPrecision:
    """A permutation test's target: the resampling risk ``risk`` of its decisions at ``levels``
    (alpha, or a family's levels), with at most ``max_resamples`` draws."""

    risk: float
    max_resamples: int
    alpha: float
    levels: tuple[float, ...] = ()  # every level decided; alpha is always among them

    def __post_init__(self) -> None:
        if not 0.0 < self.risk < 1.0 or not 0.0 < self.alpha < 1.0:
            raise EngineError("the decision risk and alpha must lie strictly between 0 and 1")
        if self.max_resamples < DRAW_BLOCK or self.max_resamples % DRAW_BLOCK:
            raise EngineError(f"max_resamples must be a whole number of blocks of {DRAW_BLOCK}")

    def all_levels(self) -> tuple[float, ...]:
        return tuple(sorted({self.alpha, *self.levels}))


@dataclass(frozen=True)
class BootstrapPrecision:
    """A bootstrap's targets: the relative Monte Carlo s.d. of its SE and/or the Monte Carlo s.d.
    of the pre-specified interval's ends (statistic units), with at most ``max_resamples``."""

    max_resamples: int
    se_relative: float | None = None
    interval_end_sd: float | None = None

    def __post_init__(self) -> None:
        if self.se_relative is None and self.interval_end_sd is None:
            raise EngineError("a bootstrap precision needs se_relative or interval_end_sd")
        if self.max_resamples < DRAW_BLOCK or self.max_resamples % DRAW_BLOCK:
            raise EngineError(f"max_resamples must be a whole number of blocks of {DRAW_BLOCK}")


@dataclass(frozen=True)
class PrecisionOutcome:
    """What the record states: the rule, its parameters, the resamples drawn, why it stopped,
    and what was achieved (decisions of a test; the precision of a bootstrap)."""

    rule: str
    parameters: dict[str, Any]
    resamples_used: int
    stopped_because: str
    decisions: tuple[dict[str, Any], ...] = ()
    achieved: dict[str, Any] = field(default_factory=dict)


def whole_blocks(resamples: float) -> int:
    """``resamples`` rounded up to whole blocks (at least one)."""
    return max(1, math.ceil(resamples / DRAW_BLOCK)) * DRAW_BLOCK


def family_levels(method: str, size: int, alpha: float) -> tuple[float, ...]:
    """The levels a family's adjustment may compare a member's unadjusted p-value with: α/m for
    Bonferroni; α/j (j = 1..m) for Holm and Hochberg; jα/m for Benjamini–Hochberg; jα/(m·c_m),
    c_m = Σ 1/i, for Benjamini–Yekutieli. Knowing on which side of each the p-value lies fixes every
    adjusted decision at α."""
    m = size
    if method == "bonferroni":
        return (alpha / m,)
    if method in ("holm", "hochberg"):
        return tuple(alpha / j for j in range(1, m + 1))
    if method == "benjamini-hochberg":
        return tuple(j * alpha / m for j in range(1, m + 1))
    if method == "benjamini-yekutieli":
        c = sum(1.0 / i for i in range(1, m + 1))
        return tuple(j * alpha / (m * c) for j in range(1, m + 1))
    raise EngineError(f"no sequential levels for the multiplicity method {method!r}")


_BOUNDARIES: dict[tuple[float, float, int], tuple[tuple[int, ...], tuple[int, ...]]] = {}


def boundaries(level: float, risk: float, looks: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """(U, L) at the looks n = 1000, 2000, ..., 1000·looks (Gandy's recursion under p = ``level``):
    stop with "p > level" when S_n ≥ U_n, with "p ≤ level" when S_n ≤ L_n. An unreachable
    boundary is n + 1 (upper) or −1 (lower). Computed once per (level, risk, looks)."""
    key = (level, risk, looks)
    if key not in _BOUNDARIES:
        _BOUNDARIES[key] = _boundaries(level, risk, looks)
    return _BOUNDARIES[key]


def _boundaries(level: float, risk: float, looks: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
    pmf = stats.binom.pmf(np.arange(DRAW_BLOCK + 1), DRAW_BLOCK, level)
    keep = np.flatnonzero(pmf > _NEGLIGIBLE * pmf.max())
    step_offset, step = int(keep[0]), pmf[keep[0]:keep[-1] + 1]
    mass, offset = np.array([1.0]), 0  # mass[i] = P(not stopped, S_n = offset + i)
    spent_upper = spent_lower = 0.0
    upper, lower = [], []
    for look in range(1, looks + 1):
        n = look * DRAW_BLOCK
        mass, offset = np.convolve(mass, step), offset + step_offset
        allowed = risk * n / (n + SPENDING)
        tail = np.cumsum(mass[::-1])[::-1]  # tail[i] = P(not stopped, S_n ≥ offset + i)
        fits = np.flatnonzero(spent_upper + tail <= allowed)
        u = int(fits[0]) if fits.size else mass.size
        spent_upper += float(tail[u]) if u < mass.size else 0.0
        mass[u:] = 0.0
        head = np.cumsum(mass)  # head[i] = P(not stopped, S_n ≤ offset + i)
        fits = np.flatnonzero(spent_lower + head <= allowed)
        lo = int(fits[-1]) if fits.size else -1
        spent_lower += float(head[lo]) if lo >= 0 else 0.0
        mass[:lo + 1] = 0.0
        upper.append(min(offset + u, n + 1))
        lower.append(offset + lo if lo >= 0 else -1)
        alive = np.flatnonzero(mass > _NEGLIGIBLE)
        if alive.size == 0:  # every path has stopped: later looks are never reached
            mass, offset = np.array([0.0]), offset
            continue
        mass, offset = mass[alive[0]:alive[-1] + 1].copy(), offset + int(alive[0])
    return tuple(upper), tuple(lower)


@dataclass
class SequentialTest:
    """One sequential test of "p ≤ level" on one count (a side of the p-value)."""

    side: str  # "greater", "less" or "absolute": which count it reads
    level: float
    risk: float
    decided: str | None = None  # "p > level" or "p <= level"
    at: int | None = None  # resamples when it was decided

    def look(self, look: int, count: int, looks: int) -> None:
        if self.decided is not None:
            return
        upper, lower = boundaries(self.level, self.risk, looks)
        if count >= upper[look - 1]:
            self.decided, self.at = "p > level", look * DRAW_BLOCK
        elif count <= lower[look - 1]:
            self.decided, self.at = "p <= level", look * DRAW_BLOCK


def _tests_for(levels: Sequence[float], alternative: str, two_sided: str, risk: float) -> list[SequentialTest]:
    sides = ([alternative] if alternative in ("greater", "less")
             else ["absolute"] if two_sided == "absolute" else ["greater", "less"])
    doubled = len(sides) == 2
    share = risk / (len(levels) * len(sides))
    return [SequentialTest(side, level / 2.0 if doubled else level, share) for level in levels for side in sides]


def _level_decision(tests: list[SequentialTest]) -> tuple[str, int | None]:
    """A level's decision from its tests (two sides for the doubled rule: rejected when either
    side's p is at most half the level, not rejected when both exceed it)."""
    if any(t.decided == "p <= level" for t in tests):
        return "rejected", max(t.at or 0 for t in tests if t.decided == "p <= level")
    if all(t.decided == "p > level" for t in tests):
        return "not rejected", max(t.at or 0 for t in tests)
    return "unresolved", None


def _offset_task(task: Callable[[int, int], np.ndarray], first: int, start: int, stop: int) -> np.ndarray:
    return task(first + start, first + stop)


def draw_sequentially(task: Callable[[int, int], np.ndarray], target: TestPrecision, *, alternative: str,
                      two_sided: str, counts: Callable[[np.ndarray], dict[str, int]]) -> tuple[np.ndarray,
                                                                                             PrecisionOutcome]:
    """Draw blocks of the null with ``task`` (a range task) until every decision is made or
    ``max_resamples`` are drawn; ``counts(values)`` gives the exceedances of the values drawn so far
    per side ("greater", "less", "absolute"). Returns the values and the outcome."""
    levels = target.all_levels()
    tests = _tests_for(levels, alternative, two_sided, target.risk)
    looks = target.max_resamples // DRAW_BLOCK
    parts: list[np.ndarray] = []
    drawn = 0
    for look in range(1, looks + 1):
        # each block through the executor's mapper: the same numbers on every executor
        parts.append(map_resamples(bind(_offset_task, task, drawn), DRAW_BLOCK))
        drawn += DRAW_BLOCK
        found = counts(np.concatenate(parts))
        for t in tests:
            t.look(look, found[t.side], looks)
        if all(t.decided is not None for t in tests) or all(
                _level_decision([t for t in tests if _level_of(t, two_sided, alternative) == level])[0] != "unresolved"
                for level in levels):
            break
    decisions = []
    for level in levels:
        decision, at = _level_decision([t for t in tests if _level_of(t, two_sided, alternative) == level])
        decisions.append({"level": level, "decision": decision, "resamples": at,
                          "is_alpha": level == target.alpha})
    resolved = all(d["decision"] != "unresolved" for d in decisions)
    outcome = PrecisionOutcome(
        rule=GANDY,
        parameters={"decision_risk": target.risk, "max_resamples": target.max_resamples, "alpha": target.alpha,
                    "levels": list(levels), "spending": f"epsilon_n = epsilon * n / (n + {SPENDING})",
                    "risk_per_sequential_test": tests[0].risk, "sequential_tests": len(tests),
                    "look_every": DRAW_BLOCK},
        resamples_used=drawn,
        stopped_because="decided" if resolved else "max_resamples",
        decisions=tuple(decisions))
    return np.concatenate(parts), outcome


def _level_of(test: SequentialTest, two_sided: str, alternative: str) -> float:
    doubled = alternative == "two-sided" and two_sided == "doubled"
    return test.level * 2.0 if doubled else test.level


def andrews_buchinsky_resamples(target: BootstrapPrecision, *, first_stage: Callable[[int], Any],
                                se_and_kurtosis: Callable[[Any], tuple[float | None, float | None]],
                                end_sds: Callable[[Any], Sequence[float | None]]) -> tuple[int, int, dict[str, Any]]:
    """(B₁, B, facts): the first-stage and final numbers of resamples of the three-step rule.

    ``first_stage(B₁)`` runs the bootstrap with B₁ resamples; ``se_and_kurtosis(result)`` gives its
    SE and the replicates' kurtosis κ (so 2 + γ₂ = κ − 1); ``end_sds(result)`` the Monte Carlo s.d.
    of the pre-specified interval's ends at B₁."""
    b1 = whole_blocks(1.0 / (2.0 * target.se_relative ** 2)) if target.se_relative is not None else DRAW_BLOCK
    b1 = min(b1, target.max_resamples)
    first = first_stage(b1)
    needed: list[float] = [b1]
    facts: dict[str, Any] = {"first_stage_resamples": b1}
    if target.se_relative is not None:
        se, kurtosis = se_and_kurtosis(first)
        if se is None or kurtosis is None or not math.isfinite(kurtosis):
            raise EngineError("the bootstrap SE or the kurtosis of its replicates is not finite at the first stage",
                              hint="use a fixed resamples for this analysis")
        b_se = (kurtosis - 1.0) / (4.0 * target.se_relative ** 2)  # (2 + γ₂)/(4 r²)
        facts.update({"first_stage_kurtosis": kurtosis, "resamples_for_se": math.ceil(b_se)})
        needed.append(b_se)
    if target.interval_end_sd is not None:
        sds = [s for s in end_sds(first) if s is not None and math.isfinite(s)]
        if not sds:
            raise EngineError("the pre-specified interval's ends have no Monte Carlo s.d. at the first stage",
                              hint="use se_relative, or a fixed resamples for this analysis")
        b_end = b1 * (max(sds) / target.interval_end_sd) ** 2
        facts.update({"first_stage_end_sd": max(sds), "resamples_for_interval_ends": math.ceil(b_end)})
        needed.append(b_end)
    wanted = whole_blocks(max(needed))
    facts["resamples_wanted"] = wanted
    return b1, min(wanted, target.max_resamples), facts
