"""planrunner's engines beside scipy.stats on the same data, in one process.

Run from the repository root (not part of the test suite; it takes a few minutes):

    python benchmarks/compare_scipy.py                 # every workload, 5 repeats
    python benchmarks/compare_scipy.py --repeats 3 --only W1,W4
    python benchmarks/compare_scipy.py --skip-large    # without L1 (n = 1e6)
    python benchmarks/compare_scipy.py --workers 2     # our resample ranges on 2 worker processes
    python benchmarks/compare_scipy.py --workers 2 --threads   # ... or on 2 threads
    python benchmarks/compare_scipy.py --end-to-end    # the command line: check and run, wall time and peak RSS
    python benchmarks/compare_scipy.py --scaling       # a bootstrap of the mean over a grid of n and B
    python benchmarks/compare_scipy.py --executors     # serial, threads, processes, dask side by side
                                                       # (benchmarks/executors.py, in a fresh interpreter)

For each workload the two computations are timed alternately (ours, scipy, ours, scipy, ...) so
that a busy machine slows both alike; the table shows the median time of each, their ratio
(scipy / ours: how many times faster planrunner is), and the peak extra memory of one call of each,
measured separately with tracemalloc (numpy reports its buffers to it) so that tracing does not
distort the times. With ``--workers N`` planrunner's resample ranges run on N worker processes, as
``planrunner run --workers N`` does (scipy stays single-threaded; the serial run is the headline
figure; the memory column then covers the parent process only). A check column shows that both
computed the same thing (standard errors within Monte Carlo error, the same exact p-value).

There is no public jackknife in scipy.stats; the J1/J2 reference is the delete-one construction that
scipy.stats.bootstrap uses for its BCa acceleration (every deletion as a row of an n × (n−1) index
array, then the vectorised statistic).
"""

from __future__ import annotations

import argparse
import concurrent.futures
import dataclasses
import functools
import gc
import math
import multiprocessing
import statistics
import sys
import time
import tracemalloc
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import scipy
import scipy.stats as st

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout without installing

from planrunner import __version__  # noqa: E402
from planrunner.engines.association import TER_BRAAK, ResidualScheme, association_test  # noqa: E402
from planrunner.engines.blocks import mapping_ranges, resample_ranges  # noqa: E402
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap  # noqa: E402
from planrunner.engines.clusters import cluster_test  # noqa: E402
from planrunner.engines.jackknife import jackknife  # noqa: E402
from planrunner.engines.permcore import PermutationOptions  # noqa: E402
from planrunner.engines.permutation import permutation_test  # noqa: E402
from planrunner.engines.signflip import signflip_test  # noqa: E402
from planrunner.engines.statistics import get_statistic  # noqa: E402
from planrunner.engines.streams import UniformRows, stream_for  # noqa: E402
from planrunner.execute import executors as execute  # noqa: E402,F401  (registered statistics then pickle by name)

MB = 2 ** 20


@dataclass(frozen=True)
class Workload:
    name: str
    words: str
    ours: Callable[[], Any] | None
    reference: Callable[[], Any] | None
    check: Callable[[Any, Any], str]
    target_ratio: float | None
    target_memory_mb: float
    missing: str = ""  # why our side cannot be measured yet


def _mean(x: np.ndarray, axis: int = -1) -> np.ndarray:
    return np.mean(x, axis=axis)


def _median(x: np.ndarray, axis: int = -1) -> np.ndarray:
    return np.median(x, axis=axis)


def _mean_difference(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
    return np.mean(x, axis=axis) - np.mean(y, axis=axis)


def _delete_one(x: np.ndarray, statistic: Callable[..., np.ndarray]) -> float:
    """Jackknife SE as scipy.stats.bootstrap builds its delete-one resamples (batch=None)."""
    n = x.shape[0]
    keep = np.ones((n, n), dtype=bool)
    np.fill_diagonal(keep, False)
    index = np.broadcast_to(np.arange(n), (n, n))[keep].reshape(n, n - 1)
    theta = statistic(x[index], axis=-1)
    return float(math.sqrt((n - 1) / n * np.sum((theta - theta.mean()) ** 2)))


def _draws_only(seed: int, resamples: int, width: int) -> Callable[[], Any]:
    """Reading W1's uniform rows from its stream, in cache-sized takes: the floor that any engine
    under the draw contract pays before it computes anything."""
    def draw() -> None:
        reader = UniformRows(stream_for(seed, "benchmark"), width)
        rows = max(1, 131_072 // width)
        buffer = np.empty((rows, width))
        for start in range(0, resamples, rows):
            take = min(rows, resamples - start)
            reader.take(take, out=buffer[:take])
    return draw


def _same_se(ours: Any, ref: Any) -> str:
    a, b = ours.standard_error, ref.standard_error
    return f"SE {a:.4g} vs {b:.4g}"


def _same_p(ours: Any, ref: Any) -> str:
    return f"p {ours.p_value:.4g} vs {ref.pvalue:.4g}"


def workloads(seed: int) -> list[Workload]:
    rng = np.random.default_rng(seed)
    x = rng.gamma(2.0, 10.0, size=10_000)  # a skewed outcome, as the demo's minutes above 8 °C
    a, b = rng.gamma(2.0, 10.0, size=5000), rng.gamma(2.0, 10.5, size=5000)
    pairs = rng.normal(0.1, 1.0, size=10_000)
    small_a, small_b = rng.integers(0, 40, size=10).astype(float), rng.integers(5, 45, size=10).astype(float)
    big = rng.gamma(2.0, 10.0, size=1_000_000)
    mean, median = get_statistic("mean"), get_statistic("median")
    mean_difference = get_statistic("mean_difference")
    B = 10_000

    def boot(data, statistic, intervals):
        return lambda: bootstrap(data, statistic, BootstrapOptions(B, 0.95, tuple(intervals)),
                                 stream=stream_for(seed, "benchmark"))

    def sboot(data, statistic, method):
        return lambda: st.bootstrap(data, statistic, n_resamples=B, method=method, vectorized=True,
                                    rng=np.random.default_rng(seed))

    def ours_jack(statistic):
        return lambda: jackknife([x], statistic)

    class _SE:  # the reference's answer in the shape `_same_se` reads
        def __init__(self, value: float):
            self.standard_error = value

    return [
        Workload("W1", "bootstrap mean, n = 1e4, B = 1e4, percentile", boot([x], mean, ["percentile"]),
                 sboot((x,), _mean, "percentile"), _same_se, 10, 200),
        Workload("W2", "bootstrap mean, n = 1e4, B = 1e4, BCa", boot([x], mean, ["bca"]),
                 sboot((x,), _mean, "BCa"), _same_se, 3, 200),
        Workload("W3", "bootstrap median, n = 1e4, B = 1e4, BCa", boot([x], median, ["bca"]),
                 sboot((x,), _median, "BCa"), _same_se, 10, 200),
        Workload("W4", "permutation, mean difference, 5000 + 5000, 1e4 permutations",
                 lambda: permutation_test([a, b], mean_difference,
                                          PermutationOptions(resamples=B, alternative="two-sided", exact="never"),
                                          stream=stream_for(seed, "benchmark")),
                 lambda: st.permutation_test((a, b), _mean_difference, permutation_type="independent",
                                             vectorized=True, n_resamples=B, rng=np.random.default_rng(seed)),
                 _same_p, 10, 200),
        Workload("W5", "paired sign-flip test, 1e4 pairs, 1e4 resamples",
                 # the differences d against pairs of zeros: the mean difference is the mean of d
                 lambda: signflip_test(pairs, np.zeros_like(pairs), mean_difference,
                                       PermutationOptions(resamples=B, alternative="two-sided", exact="never"),
                                       stream=stream_for(seed, "benchmark")),
                 lambda: st.permutation_test((pairs,), _mean, permutation_type="samples", vectorized=True,
                                             n_resamples=B, rng=np.random.default_rng(seed)),
                 _same_p, 50, 200),
        Workload("W6", "exact two-group test, 10 + 10 integers (184,756 splits)",
                 lambda: permutation_test([small_a, small_b], mean_difference,
                                          PermutationOptions(resamples=B, alternative="two-sided", exact="always"),
                                          stream=stream_for(seed, "benchmark")),
                 lambda: st.permutation_test((small_a, small_b), _mean_difference, permutation_type="independent",
                                             vectorized=True, n_resamples=np.inf),
                 _same_p, 100, 200),
        Workload("J1", "jackknife SE of the mean, n = 1e4", ours_jack(mean),
                 lambda: _SE(_delete_one(x, _mean)), _same_se, 100, 200),
        Workload("J2", "jackknife SE of the median, n = 1e4", ours_jack(median),
                 lambda: _SE(_delete_one(x, _median)), _same_se, 100, 200),
        Workload("F1", "the 1e8 uniforms of W1 drawn and nothing else, one core (ratio: W1's ceiling)",
                 _draws_only(seed, B, x.size), sboot((x,), _mean, "percentile"), lambda o, r: "", None, 200),
        # schemes scipy does not offer: the rows show what --workers 2 gains over a serial run
        Workload("S1", "moving-block bootstrap mean, n = 1e4, length 20, B = 1e4 (planrunner only)",
                 lambda: bootstrap([x], mean, BootstrapOptions(B, 0.95, ("percentile",), blocks=("moving", 20)),
                                   stream=stream_for(seed, "benchmark")),
                 None, lambda o, r: f"SE {o.standard_error:.4g}", None, 200),
        Workload("S2", "parametric (normal) bootstrap mean, n = 2000, B = 1e4 (planrunner only)",
                 lambda: bootstrap([x[:2000]], mean, BootstrapOptions(B, 0.95, ("percentile",), parametric="normal"),
                                   stream=stream_for(seed, "benchmark")),
                 None, lambda o, r: f"SE {o.standard_error:.4g}", None, 200),
        Workload("S3", "studentized bootstrap mean, inner jackknife, n = 100, B = 1e4 (planrunner only)",
                 lambda: bootstrap([x[:100]], mean, BootstrapOptions(B, 0.95, ("studentized",),
                                                                     studentized_se="jackknife"),
                                   stream=stream_for(seed, "benchmark")),
                 None, lambda o, r: f"SE {o.standard_error:.4g}", None, 200),
        Workload("S4", "studentized bootstrap mean, nested M = 50, n = 200, B = 1e4 (planrunner only)",
                 lambda: bootstrap([x[:200]], mean, BootstrapOptions(B, 0.95, ("studentized",),
                                                                     studentized_se="bootstrap"),
                                   stream=stream_for(seed, "benchmark")),
                 None, lambda o, r: f"SE {o.standard_error:.4g}", None, 200),
        Workload("L1", "bootstrap mean, n = 1e6, B = 1e4 (planrunner only)",
                 lambda: bootstrap([big], mean, BootstrapOptions(B, 0.95, ("percentile",)),
                                   stream=stream_for(seed, "benchmark")),
                 None, lambda o, r: f"SE {o.standard_error:.4g}", None, 1024),
    ]


def design_workloads(seed: int) -> list[Workload]:
    """The permutation designs beyond two groups, planrunner only (scipy.stats has none of them):
    run with and without ``--workers 2`` to see what spreading their resample ranges gains."""
    rng = np.random.default_rng(seed + 1)
    clusters = np.repeat(np.arange(100), 20)  # 100 clusters of 20 rows, 50 in each group
    effect = rng.normal(0.0, 0.5, size=100)[clusters]
    rows = rng.gamma(2.0, 10.0, size=clusters.size) + effect
    first = clusters < 50
    predictor, covariates = rng.normal(size=2000), rng.normal(size=(2000, 2))
    outcome = 0.1 * predictor + covariates @ [0.5, -0.3] + rng.normal(size=2000)
    strata = np.arange(2000) % 20  # 20 strata of 100 rows (residuals permuted within each)
    B = 10_000

    def options(alternative: str) -> PermutationOptions:
        return PermutationOptions(resamples=B, alternative=alternative, exact="never")

    def p_only(ours: Any, ref: Any) -> str:
        return f"p {ours.p_value:.4g}"

    return [
        Workload("D1", "sign-flip test, median difference (plain computation), 2000 pairs, 1e4 resamples",
                 lambda: signflip_test(outcome, predictor, get_statistic("median_difference"), options("two-sided"),
                                       stream=stream_for(seed, "benchmark")), None, p_only, None, 200),
        Workload("D2", "cluster permutation, median difference, 100 clusters of 20 rows, 1e4 resamples",
                 lambda: cluster_test(rows[first], rows[~first], clusters[first], clusters[~first],
                                      get_statistic("median_difference"), options("two-sided"),
                                      stream=stream_for(seed, "benchmark")), None, p_only, None, 200),
        Workload("D3", "association, Freedman–Lane partial slope, n = 2000, 2 covariates, 1e4 resamples",
                 lambda: association_test(np.column_stack([predictor, outcome]), get_statistic("slope"),
                                          options("two-sided"), stream=stream_for(seed, "benchmark"),
                                          covariates=covariates), None, p_only, None, 200),
        Workload("D3T", "association, ter Braak partial slope, n = 2000, 2 covariates, 1e4 resamples",
                 lambda: association_test(np.column_stack([predictor, outcome]), get_statistic("slope"),
                                          options("two-sided"), stream=stream_for(seed, "benchmark"),
                                          covariates=covariates, residuals=ResidualScheme(TER_BRAAK)),
                 None, p_only, None, 200),
        Workload("D3S", "association, Freedman–Lane within 20 strata, n = 2000, 2 covariates, 1e4 resamples",
                 lambda: association_test(np.column_stack([predictor, outcome]), get_statistic("slope"),
                                          options("two-sided"), stream=stream_for(seed, "benchmark"),
                                          covariates=covariates, residuals=ResidualScheme(strata=strata)),
                 None, p_only, None, 200),
        Workload("D4", "association, Spearman correlation, n = 500, 1e4 resamples",
                 lambda: association_test(np.column_stack([predictor[:500], outcome[:500]]), get_statistic("spearman"),
                                          options("two-sided"), stream=stream_for(seed, "benchmark")),
                 None, p_only, None, 200),
    ]


def _timed(call: Callable[[], Any]) -> tuple[float, Any]:
    gc.collect()
    start = time.perf_counter()
    out = call()
    return time.perf_counter() - start, out


def _peak_extra_mb(call: Callable[[], Any]) -> float:
    gc.collect()
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        call()
        return (tracemalloc.get_traced_memory()[1] - base) / MB
    finally:
        tracemalloc.stop()


def _on_pool(call: Callable[[], Any], pool: Any, workers: int) -> Callable[[], Any]:
    """``call`` with its resample ranges computed on ``pool`` (the executors' split): a process
    pool (``apply_async``) or a thread pool (``submit``)."""
    def mapper(task, total):
        ranges = resample_ranges(total, execute.RANGES_PER_WORKER * workers)
        if hasattr(pool, "submit"):
            return [f.result() for f in [pool.submit(task, *r) for r in ranges]]
        return [r.get() for r in [pool.apply_async(task, r) for r in ranges]]

    def run() -> Any:
        with mapping_ranges(mapper):
            return call()

    return run


def _cell(value: float | None, fmt: str) -> str:
    return "n/a" if value is None else format(value, fmt)


def _command(argv: list[str]) -> tuple[float, float, float]:
    """Wall seconds, CPU seconds (user + system) and peak RSS (MB) of one planrunner command in a
    fresh interpreter.

    The peak is measured by GNU time, whose child starts from its small image: a child forked from
    this (large) process would report this process's peak as its own (Linux keeps the high-water
    mark of the image a child replaces on exec). The command runs with Python's bytecode cache, as an
    installed planrunner does (pip compiles the package's modules when it installs them): an
    environment that sets PYTHONDONTWRITEBYTECODE on a source checkout would otherwise make every
    command compile planrunner's modules from source again (measured: about 0.25 s of CPU for `check`)."""
    import os
    import shutil
    import subprocess

    timer = shutil.which("time", path="/usr/bin:/bin")
    if timer is None:
        raise RuntimeError("the end-to-end section needs GNU time (/usr/bin/time) to measure the peak RSS")
    env = {name: value for name, value in os.environ.items() if name != "PYTHONDONTWRITEBYTECODE"}
    start = time.perf_counter()
    done = subprocess.run([timer, "-f", "%U %S %M", sys.executable, "-m", "planrunner", *argv],
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=env)
    wall = time.perf_counter() - start
    if done.returncode not in (0, 1):  # 1: a run whose warnings ask for attention
        raise RuntimeError(f"planrunner {' '.join(argv)} exited with {done.returncode}: {done.stderr[-500:]}")
    user, system, peak = done.stderr.strip().splitlines()[-1].split()
    return wall, float(user) + float(system), int(peak) / 1024


def _large_plan(folder: Path, rows: int = 1_000_000) -> Path:
    """A plan on a CSV of `rows` rows and 6 columns (about 50 MB): integer id, category, two numbers,
    a boolean and a date; one bootstrap of a difference of means (B = 1000)."""
    rng = np.random.default_rng(7)
    data = folder / "large.csv"
    site = np.where(rng.random(rows) < 0.5, "north", "south")
    days = np.array([f"2026-01-{d:02d}" for d in range(1, 29)])[rng.integers(0, 28, rows)]
    with data.open("w") as out:
        out.write("id,site,y,x,flag,day\n")
        for i, (s, y, x, f, d) in enumerate(zip(site, rng.normal(10, 2, rows).tolist(),
                                                 rng.exponential(1, rows).tolist(), rng.random(rows) < 0.3, days)):
            out.write(f"{i},{s},{y!r},{x:.6f},{'yes' if f else 'no'},{d}\n")
    plan = folder / "large.yaml"
    plan.write_text("""plan: large-file
title: A large file, read, checked and resampled
seed: 7
datasets:
  d:
    file: large.csv
    columns:
      id: {type: integer}
      site: {type: category, levels: [north, south]}
      y: {type: number}
      x: {type: number, min: 0}
      flag: {type: boolean}
      day: {type: date}
analyses:
  - id: difference
    data: d
    outcome: y
    groups: {by: site, compare: [north, south]}
    statistic: mean_difference
    method: bootstrap
    resamples: 1000
""")
    return plan


def end_to_end(repeats: int) -> int:
    """`check` and `run` from the command line, each in a fresh interpreter, repeated alternately;
    median wall time and the largest peak RSS."""
    import tempfile

    demo = Path(__file__).resolve().parent.parent / "plans" / "liner-trial" / "plan.yaml"
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        plans = {"demo": demo, "1e6 rows": _large_plan(folder)}
        commands = [(f"{verb} {name}", [verb, str(plan)] + (["--out", str(folder / "runs")] if verb == "run" else []))
                    for name, plan in plans.items() for verb in ("check", "run")]
        times: dict[str, list[float]] = {label: [] for label, _ in commands}
        cpus: dict[str, list[float]] = {label: [] for label, _ in commands}
        peaks: dict[str, float] = dict.fromkeys(times, 0.0)
        for _, argv in commands[:2]:  # check and run on the demo, untimed: they write the bytecode cache
            _command(argv)
        for _ in range(repeats):
            for label, argv in commands:
                wall, cpu, peak = _command(argv)
                times[label].append(wall)
                cpus[label].append(cpu)
                peaks[label] = max(peaks[label], peak)
    print(f"planrunner {__version__}, Python {sys.version.split()[0]}, repeats {repeats}; {_load()}")
    print(f"{'command':<16} {'wall s (median)':>16} {'CPU s (median)':>15} {'peak RSS MB':>12}")
    for label in times:
        print(f"{label:<16} {statistics.median(times[label]):>16.2f} {statistics.median(cpus[label]):>15.2f} "
              f"{peaks[label]:>12.0f}")
    print(_load())
    return 0


def _load() -> str:
    import os

    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def scaling(repeats: int, seed: int) -> int:
    """A bootstrap of the mean (percentile interval) over n and B: seconds per call, median of the
    repeats; the time should grow as n × B."""
    rng = np.random.default_rng(seed)
    sizes, counts = (1_000, 10_000, 100_000), (1_000, 10_000)
    print(f"bootstrap of the mean, seconds (median of {repeats}); ns per draw in brackets")
    print(f"{'n':>8} " + " ".join(f"{'B = ' + format(b, ','):>22}" for b in counts))
    for n in sizes:
        data = rng.normal(0, 1, n)
        cells = []
        for b in counts:
            options = BootstrapOptions(b, 0.95, ("percentile",))
            call = functools.partial(bootstrap, [data], get_statistic("mean"), options,
                                     stream=stream_for(seed, f"scaling-{n}-{b}"))
            seconds = statistics.median(_timed(call)[0] for _ in range(repeats))
            cells.append(f"{seconds:>10.3f} [{seconds / (n * b) * 1e9:5.2f} ns]")
        print(f"{n:>8,} " + " ".join(f"{c:>22}" for c in cells))
    return 0


def executors_section(repeats: int) -> int:
    """benchmarks/executors.py in a fresh interpreter: its worker processes are spawned, and a
    spawned worker runs its parent's main module's imports again (this module's scipy.stats among
    them), which a `planrunner run` worker never pays."""
    import subprocess

    script = Path(__file__).resolve().parent / "executors.py"
    return subprocess.run([sys.executable, str(script), "--repeats", str(repeats)]).returncode


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5, help="timed runs of each side (median reported)")
    parser.add_argument("--only", help="comma-separated workload names, e.g. W1,W4")
    parser.add_argument("--skip-large", action="store_true", help="leave out L1 (about a minute)")
    parser.add_argument("--seed", type=int, default=20261201)
    parser.add_argument("--workers", type=int, default=1, help="workers for planrunner's side")
    parser.add_argument("--threads", action="store_true",
                        help="the workers are threads of this process (planrunner run --executor threads)")
    parser.add_argument("--end-to-end", action="store_true",
                        help="time `planrunner check` and `planrunner run` on the demo plan and a 1e6-row plan "
                             "(wall time and peak RSS of each command), then stop")
    parser.add_argument("--scaling", action="store_true",
                        help="time a bootstrap of the mean over a grid of n and B, then stop")
    parser.add_argument("--executors", action="store_true",
                        help="run benchmarks/executors.py (the issue's bootstrap and permutation workloads on "
                             "serial, 2 threads, 2 processes and dask, wall and CPU time), then stop")
    args = parser.parse_args(argv)
    if args.executors:
        return executors_section(args.repeats)
    if args.end_to_end:
        return end_to_end(args.repeats)
    if args.scaling:
        return scaling(args.repeats, args.seed)
    pool: Any = None  # a thread pool or a process pool
    if args.workers > 1 and args.threads:
        pool = concurrent.futures.ThreadPoolExecutor(args.workers)
    elif args.workers > 1:
        pool = multiprocessing.get_context("spawn").Pool(args.workers)
        # warm up: the workers import planrunner on their first task, which no workload should pay
        warm = np.arange(50.0)
        _on_pool(lambda: bootstrap([warm], get_statistic("mean"), BootstrapOptions(4000 * args.workers, 0.95,
                                   ("percentile",)), stream=stream_for(1, "warm-up")), pool, args.workers)()
    chosen = None if args.only is None else set(args.only.upper().split(","))

    print(f"planrunner {__version__}, numpy {np.__version__}, scipy {scipy.__version__}, "
          f"Python {sys.version.split()[0]}, repeats {args.repeats}, planrunner workers {args.workers}"
          f"{' (threads)' if args.threads and args.workers > 1 else ' (processes)' if args.workers > 1 else ''}")
    header = ("work", "ours s", "scipy s", "ratio", "target", "ours MB", "scipy MB", "check", "")
    print("  ".join(f"{h:>8}" if i and i < 7 else h for i, h in enumerate(header)))
    for w in workloads(args.seed) + design_workloads(args.seed):
        if (chosen is not None and w.name not in chosen) or (args.skip_large and w.name == "L1"):
            continue
        repeats = 1 if w.name == "L1" else args.repeats
        if pool is not None and w.ours is not None:
            w = dataclasses.replace(w, ours=_on_pool(w.ours, pool, args.workers))
        ours_t, ref_t = [], []
        ours_out = ref_out = None
        for _ in range(repeats):  # interleaved: a busy machine slows both sides alike
            if w.ours is not None:
                t, ours_out = _timed(w.ours)
                ours_t.append(t)
            if w.reference is not None:
                t, ref_out = _timed(w.reference)
                ref_t.append(t)
        ours_s = statistics.median(ours_t) if ours_t else None
        ref_s = statistics.median(ref_t) if ref_t else None
        ratio = ref_s / ours_s if ours_s and ref_s else None
        ours_mb = _peak_extra_mb(w.ours) if w.ours is not None else None
        ref_mb = _peak_extra_mb(w.reference) if w.reference is not None else None
        check = w.check(ours_out, ref_out) if ours_out is not None and ref_out is not None else (
            w.check(ours_out, None) if ours_out is not None and w.reference is None else "")
        verdict = []
        if w.missing:
            verdict.append(f"not measurable: {w.missing}")
        if ratio is not None and w.target_ratio is not None:
            verdict.append("speed met" if ratio >= w.target_ratio else "speed NOT met")
        if ours_mb is not None:
            verdict.append("memory met" if ours_mb <= w.target_memory_mb else "memory NOT met")
        target = f">={w.target_ratio:g}x" if w.target_ratio is not None else f"<={w.target_memory_mb:g}MB"
        print(f"{w.name:<4}  {_cell(ours_s, '8.3f')}  {_cell(ref_s, '8.3f')}  {_cell(ratio, '7.1f')}x  "
              f"{target:>8}  {_cell(ours_mb, '8.1f')}  {_cell(ref_mb, '8.1f')}  {check}  [{'; '.join(verdict)}]"
              f"  {w.words}")
        sys.stdout.flush()
    if isinstance(pool, concurrent.futures.ThreadPoolExecutor):
        pool.shutdown()
    elif pool is not None:
        pool.close()
        pool.join()
    return 0


if __name__ == "__main__":
    sys.exit(main())
