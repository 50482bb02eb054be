"""Benchmark of the bootstrap fast paths beside the plain computation and scipy.stats.bootstrap.

Run from the repository root:  python benchmarks/bootstrap_fast_paths.py
Prints seconds and ratios; nothing here is asserted (timings depend on the machine).
"""

from __future__ import annotations

import functools
import time

import numpy as np
from scipy import stats

from planrunner.engines import schemes
from planrunner.engines.jackknife import jackknife
from planrunner.engines.statistics import bind, get_statistic
from planrunner.engines.streams import stream_for


def seconds(work) -> float:
    start = time.perf_counter()
    work()
    return time.perf_counter() - start


def _quantile(q: float, a: np.ndarray, axis: int) -> np.ndarray:
    return np.quantile(a, q, axis=axis)


def main() -> None:
    rng = np.random.default_rng(2026)
    b = 9999
    for n in (50, 1000, 20000):
        x = rng.normal(size=n)
        lay = schemes.layout((x,), None)
        for stat in (get_statistic("median"), bind(get_statistic("quantile"), 0.9)):
            # functools.partial binds this iteration's values (a lambda would see the loop's last ones)
            draw = functools.partial(schemes.draw_cells, lay, stat, b, stream_for(1, "bench"), 2_000_000, None)
            plain = seconds(functools.partial(draw, fast=False))
            fast = seconds(draw)
            q = 0.5 if stat.value is None else stat.value
            scipy_time = seconds(functools.partial(
                stats.bootstrap, (x,), functools.partial(_quantile, q), n_resamples=b, method="percentile",
                vectorized=True, rng=np.random.default_rng(1)))
            print(f"n={n:>6} {stat.label:<14} plain {plain:7.3f} s  fast {fast:7.3f} s  "
                  f"scipy {scipy_time:7.3f} s  fast/scipy {fast / scipy_time:5.2f}")
    x = rng.normal(size=1_000_000)
    for stat in (get_statistic("mean"), get_statistic("median"), bind(get_statistic("quantile"), 0.9)):
        print(f"jackknife n=1e6 {stat.label:<14} {seconds(functools.partial(jackknife, [x], stat)):7.3f} s")


if __name__ == "__main__":
    main()
