"""Resamples split into ranges (as an executor spreads them over workers) give identical numbers."""

from __future__ import annotations

import numpy as np
import pytest

from planrunner.engines.association import ResidualScheme, association_test
from planrunner.engines.blocks import map_resamples, mapping_ranges, resample_ranges
from planrunner.engines.bootstrap import BootstrapOptions, bootstrap
from planrunner.engines.clusters import cluster_test
from planrunner.engines.permcore import PermutationOptions
from planrunner.engines.permutation import permutation_test
from planrunner.engines.signflip import signflip_test
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for

RNG = np.random.default_rng(20261201)


def out_of_order(seen: list):
    """A mapper that cuts into three ranges and computes them last-first, on purpose."""
    def mapper(task, total):
        ranges = resample_ranges(total, 3)
        seen.append(ranges)
        return [task(a, b) for a, b in reversed(ranges)][::-1]
    return mapper


def test_resample_ranges_are_equal_shares():
    assert resample_ranges(4321, 3) == [(0, 1440), (1440, 2880), (2880, 4321)]
    for total, pieces in [(1, 4), (999, 2), (10_000, 7), (12_345, 1)]:
        ranges = resample_ranges(total, pieces)
        assert ranges[0][0] == 0 and ranges[-1][1] == total
        assert all(b == c for (_, b), (c, _) in zip(ranges, ranges[1:]))
        sizes = [b - a for a, b in ranges]
        assert len(ranges) == min(pieces, total) and max(sizes) - min(sizes) <= 1  # every worker equally busy
    assert map_resamples(lambda a, b: np.arange(a, b, dtype=float), 0).size == 0


@pytest.mark.parametrize("name, strata", [("mean", False), ("median", False), ("median_difference", True),
                                          ("mean_difference", False)])
def test_bootstrap_split_ranges_are_bit_identical(name, strata):
    statistic = get_statistic(name)
    groups = (RNG.normal(size=300),) if statistic.samples == 1 else (RNG.normal(size=200), RNG.normal(size=150))
    codes = tuple(RNG.integers(0, 3, size=g.size) for g in groups) if strata else None
    kwargs = dict(stream=stream_for(5, name), strata=codes)
    options = BootstrapOptions(4321, 0.95, ("percentile",))
    whole = bootstrap(groups, statistic, options, **kwargs)
    seen: list = []
    with mapping_ranges(out_of_order(seen)):
        split = bootstrap(groups, statistic, options, **kwargs)
    assert seen == [[(0, 1440), (1440, 2880), (2880, 4321)]]  # two ranges start inside a draw block
    assert split.distribution.tobytes() == whole.distribution.tobytes()


SERIES = np.cumsum(RNG.normal(size=90)) * 0.2 + 5.0  # invented, serially dependent


@pytest.mark.parametrize("name, options, design", [
    ("mean", dict(blocks=("moving", 7)), {}),
    ("median", dict(blocks=("stationary", 5)), {}),
    ("mean", dict(blocks=("circular", 4)), {}),
    ("mean", dict(parametric="normal", intervals=("percentile", "studentized")), {}),
    ("mean", dict(intervals=("studentized",), studentized_se="jackknife"), {}),
    ("mean", dict(intervals=("studentized",), studentized_se="bootstrap", inner_resamples=12), {}),
    ("mean", dict(intervals=("percentile",)), {"clusters": (np.arange(90) % 12,)}),
    ("mean", dict(exhaustive=True, intervals=("percentile", "studentized")), {"short": True}),
])
def test_every_bootstrap_scheme_split_ranges_are_bit_identical(name, options, design):
    """Blocks, parametric, studentized (inner jackknife, analytic, nested), clusters and exhaustive
    draws go through the range mapper and give the same numbers when split."""
    data = (SERIES[:6],) if design.pop("short", False) else (SERIES,)
    settings = BootstrapOptions(**{"resamples": 2100, "confidence": 0.9, "intervals": ("percentile",), **options})
    whole = bootstrap(data, get_statistic(name), settings, stream=stream_for(9, name), **design)
    seen: list = []
    with mapping_ranges(out_of_order(seen)):
        split = bootstrap(data, get_statistic(name), settings, stream=stream_for(9, name), **design)
    total = 462 if settings.exhaustive else 2100  # exhaustive: C(11, 6) distinct resamples (identity)
    assert seen == [resample_ranges(total, 3)]  # the scheme's draws went through the mapper
    assert split.distribution.tobytes() == whole.distribution.tobytes()
    assert [(i.lower, i.upper) for i in split.intervals] == [(i.lower, i.upper) for i in whole.intervals]
    assert all(i.lower is not None for i in whole.intervals)


def test_monte_carlo_permutation_split_ranges_are_bit_identical():
    statistic = get_statistic("mean_difference")
    groups = (RNG.normal(size=40), RNG.normal(0.3, size=35))
    kwargs = dict(options=PermutationOptions(resamples=4321, alternative="two-sided", exact="never"),
                  stream=stream_for(6, "perm"))
    whole = permutation_test(groups, statistic, **kwargs)
    seen: list = []
    with mapping_ranges(out_of_order(seen)):
        split = permutation_test(groups, statistic, **kwargs)
    assert seen == [[(0, 1440), (1440, 2880), (2880, 4321)]]  # two ranges start inside a draw block
    assert split.null.tobytes() == whole.null.tobytes() and split.p_value == whole.p_value


def _split_equals_whole(run) -> None:
    whole = run()
    seen: list = []
    with mapping_ranges(out_of_order(seen)):
        split = run()
    assert seen == [[(0, 1440), (1440, 2880), (2880, 4321)]]  # two ranges start inside a draw block
    assert split.null.tobytes() == whole.null.tobytes() and split.p_value == whole.p_value


@pytest.mark.parametrize("name", ["mean_difference", "signed_rank", "median_difference"])
def test_sign_flip_split_ranges_are_bit_identical(name):
    x, y = RNG.normal(size=70), RNG.normal(0.2, size=70)
    options = PermutationOptions(4321, "two-sided", exact="never")
    _split_equals_whole(lambda: signflip_test(x, y, get_statistic(name), options, stream=stream_for(7, name),
                                              batch_elements=999))


@pytest.mark.parametrize("name", ["mean_difference", "median_difference"])
def test_cluster_split_ranges_are_bit_identical(name):
    x, y = RNG.normal(size=60), RNG.normal(0.3, size=50)
    cx, cy = np.repeat(np.arange(12), 5), np.repeat(np.arange(12, 22), 5)
    options = PermutationOptions(4321, "greater", exact="never")
    _split_equals_whole(lambda: cluster_test(x, y, cx, cy, get_statistic(name), options,
                                             stream=stream_for(8, name), batch_elements=999))


@pytest.mark.parametrize("covariates", [False, True])
def test_association_split_ranges_are_bit_identical(covariates):
    x = RNG.normal(size=40)
    z = RNG.normal(size=(40, 2))
    xy = np.column_stack([x, 0.4 * x + z @ [0.5, -0.2] + RNG.normal(size=40)])
    statistic = get_statistic("slope" if covariates else "spearman")
    options = PermutationOptions(4321, "two-sided", exact="never")
    _split_equals_whole(lambda: association_test(xy, statistic, options, stream=stream_for(9, "assoc"),
                                                 covariates=z if covariates else None, batch_elements=999))


@pytest.mark.parametrize("method", ["freedman-lane", "ter-braak"])
@pytest.mark.parametrize("design", ["rows", "strata", "clusters"])
def test_residual_permutation_split_ranges_are_bit_identical(method, design):
    # ter Braak and the residuals permuted within strata or as whole clusters' blocks read their
    # draws from the range's start like every other scheme
    x = np.repeat(RNG.integers(0, 2, size=10), 4).astype(float)  # constant within the 10 clusters
    z = RNG.normal(size=(40, 2))
    xy = np.column_stack([x, 0.4 * x + z @ [0.5, -0.2] + RNG.normal(size=40)])
    scheme = ResidualScheme(method, strata=np.arange(40) % 3 if design == "strata" else None,
                            clusters=np.repeat(np.arange(10), 4) if design == "clusters" else None)
    options = PermutationOptions(4321, "two-sided", exact="never")
    _split_equals_whole(lambda: association_test(xy, get_statistic("slope"), options, stream=stream_for(9, design),
                                                 covariates=z, residuals=scheme, batch_elements=999))
