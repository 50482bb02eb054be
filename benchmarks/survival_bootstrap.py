"""Bootstrap of the difference in Kaplan–Meier medians: planrunner's counting engine beside a loop
that fits statsmodels' SurvfuncRight to every resample.

Run from the repository root (not part of the test suite):

    python benchmarks/survival_bootstrap.py                       # n = 1e4 rows, B = 1e4
    python benchmarks/survival_bootstrap.py --n 2000 --resamples 1000 --reference-resamples 1000

Both sides use the SAME resamples: the loop rebuilds each resample's row indices from planrunner's
draw contract (cells: position j takes row floor(u_j · n_g) of its group, u from the analysis
stream), so the replicates must agree; the check column gives the largest difference (statsmodels
asks S < 0.5 where planrunner asks S ≤ 0.5, which differs only on an exact plateau at 0.5, not met
by continuous times). ``--reference-resamples`` times the loop on the first R resamples only and
scales its time to B (the loop's cost per resample is constant). Prints seconds; nothing asserted.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout without installing

from planrunner.engines import schemes  # noqa: E402
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap  # noqa: E402
from planrunner.engines.statistics import get_statistic  # noqa: E402
from planrunner.engines.streams import UniformRows, stream_for  # noqa: E402


def data(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Two groups of n/2 rows: exponential event times (means 10 and 7), uniform censoring times."""
    rng = np.random.default_rng(seed)
    groups = []
    for mean in (10.0, 7.0):
        event = rng.exponential(mean, n // 2)
        censor = rng.uniform(0.0, 30.0, n // 2)
        groups.append(np.column_stack([np.minimum(event, censor), (event <= censor).astype(float)]))
    return groups[0], groups[1]


def reference_loop(x: np.ndarray, y: np.ndarray, resamples: int, seed: int) -> np.ndarray:
    """statsmodels fitted to every resample (the same resamples as planrunner's cells draw)."""
    from statsmodels.duration.survfunc import SurvfuncRight

    lay = schemes.layout((x, y), None)
    reader = UniformRows(stream_for(seed, "km"), int(lay.cell_start.shape[0]), 0)
    out = np.empty(resamples)
    (a0, a1), (b0, b1) = lay.bounds
    for r in range(resamples):
        index = lay.cell_start + (reader.take(1)[0] * lay.cell_size).astype(np.int64)
        first, second = x[index[a0:a1]], y[index[b0:b1]]
        medians = [SurvfuncRight(g[:, 0], g[:, 1]).quantile(0.5) for g in (first, second)]
        out[r] = medians[0] - medians[1]
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=10_000, help="rows in all (half per group)")
    parser.add_argument("--resamples", type=int, default=10_000)
    parser.add_argument("--reference-resamples", type=int, default=None,
                        help="time the statsmodels loop on this many resamples and scale to --resamples")
    parser.add_argument("--seed", type=int, default=2026)
    args = parser.parse_args(argv)
    x, y = data(args.n, args.seed)
    options = BootstrapOptions(resamples=args.resamples, confidence=0.95, intervals=("percentile",))
    statistic = get_statistic("km_median_difference")
    start, cpu = time.perf_counter(), time.process_time()
    ours = bootstrap([x, y], statistic, options, stream=stream_for(args.seed, "km"))
    ours_s, ours_cpu = time.perf_counter() - start, time.process_time() - cpu
    lay = schemes.layout((x, y), None)
    start = time.perf_counter()
    plain, _ = schemes.draw_cells(lay, statistic, min(args.resamples, 500), stream_for(args.seed, "km"),
                                  2_000_000, None, fast=False)
    plain_s = (time.perf_counter() - start) * args.resamples / min(args.resamples, 500)
    r = args.reference_resamples or args.resamples
    start, cpu = time.perf_counter(), time.process_time()
    reference = reference_loop(x, y, r, args.seed)
    reference_s = (time.perf_counter() - start) * args.resamples / r
    reference_cpu = (time.process_time() - cpu) * args.resamples / r
    difference = float(np.max(np.abs(reference - ours.distribution[:r])))
    same_plain = bool(np.array_equal(plain, ours.distribution[:plain.shape[0]]))
    print(f"bootstrap of km_median_difference, n = {args.n} rows, B = {args.resamples}")
    print(f"  planrunner (counts per distinct time)   {ours_s:9.2f} s  (CPU {ours_cpu:.2f} s)")
    print(f"  planrunner plain gather (scaled from 500) {plain_s:7.2f} s   same replicates: {same_plain}")
    print(f"  statsmodels SurvfuncRight loop{' (scaled from ' + str(r) + ')' if r != args.resamples else ''}"
          f"  {reference_s:9.2f} s  (CPU {reference_cpu:.2f} s)")
    print(f"  ratio loop / planrunner {reference_s / ours_s:8.1f} (CPU {reference_cpu / ours_cpu:.1f})"
          "   largest |difference| of the replicates "
          f"{difference:.3g}; standard error {ours.standard_error}, percentile interval "
          f"{ours.intervals[0].lower} to {ours.intervals[0].upper}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
