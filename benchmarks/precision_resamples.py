"""Resamples and time of a permutation test drawn to a decision risk, beside the fixed 9999.

W4-style data (two groups of 5000 normal values, difference of means), shifted so that the
two-sided p-value is about 0.5, 0.06 and 0.001 (rows P1–P3 of the README). The sequential rule
(engines.precision: Gandy 2009, ε = 0.001, at most 100 000 resamples) against a fixed 9999.

Run from the repository root:  python benchmarks/precision_resamples.py [--repeats 3]
Prints a Markdown table; nothing here is asserted (timings depend on the machine).
"""

from __future__ import annotations

import argparse
import functools
import time
from collections.abc import Callable

import numpy as np
from scipy import stats

from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.precision import PrecisionOutcome, TestPrecision
from planrunner.engines.results import PermutationResult
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

N = 5000
FIXED = 9999


def groups(p_target: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Two groups whose means differ by the amount that gives a two-sided normal-theory p of p_target."""
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=N), rng.normal(size=N)
    a, b = (a - a.mean()) / a.std(), (b - b.mean()) / b.std()
    shift = stats.norm.isf(p_target / 2) * np.sqrt(2.0 / N)
    return a + shift, b


def timed(call: Callable[[], PermutationResult]) -> tuple[float, PermutationResult]:
    start = time.perf_counter()
    out = call()
    return time.perf_counter() - start, out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=3, help="timed runs (median reported)")
    parser.add_argument("--seed", type=int, default=20261202)
    args = parser.parse_args(argv)
    statistic = get_statistic("mean_difference")
    print("| row | target p | p (fixed 9999) | s (fixed) | resamples (precision) | decision | s (precision) |")
    print("|---|---|---|---|---|---|---|")
    for row, p_target in (("P1", 0.5), ("P2", 0.06), ("P3", 0.001)):
        a, b = groups(p_target, args.seed)
        fixed = PermutationOptions(resamples=FIXED, alternative="two-sided", exact="never", alpha=0.05)
        precise = PermutationOptions(resamples=100_000, alternative="two-sided", exact="never", alpha=0.05,
                                     precision=TestPrecision(risk=0.001, max_resamples=100_000, alpha=0.05))
        stream = stream_for(args.seed, "precision-benchmark")
        runs_fixed = [timed(functools.partial(permutation_test, [a, b], statistic, fixed, stream=stream))
                      for _ in range(args.repeats)]
        runs_precise = [timed(functools.partial(permutation_test, [a, b], statistic, precise, stream=stream))
                        for _ in range(args.repeats)]
        result = runs_precise[0][1]
        outcome = result.precision
        assert isinstance(outcome, PrecisionOutcome)
        decision = outcome.decisions[0]["decision"]
        print(f"| {row} | {p_target:g} | {runs_fixed[0][1].p_value:.4f} | "
              f"{np.median([t for t, _ in runs_fixed]):.2f} | {outcome.resamples_used:,} | {decision} | "
              f"{np.median([t for t, _ in runs_precise]):.2f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
