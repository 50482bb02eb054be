"""Simulated data sets against the families' exact distributions (scipy.stats as the reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from planrunner.plan.schema import Column, Dataset
from planrunner.simulate.generate import generate, largest_remainder
from planrunner.simulate.schema import ColumnModel, DatasetModel, Distribution, GroupRows, Rows

N = 100_000  # rows for moment and shape checks: Monte Carlo sd of a mean is sd/316


def _dataset(**types: str) -> Dataset:
    return Dataset(file="x.csv", columns={name: Column(type=kind) for name, kind in types.items()})  # type: ignore


def _column(family: str, n: int = N, column_type: str = "number", **parameters) -> np.ndarray:
    model = DatasetModel(rows=Rows(count=n),
                         columns={"y": ColumnModel(model=Distribution(family=family, **parameters))})
    return generate(model, _dataset(y=column_type), np.random.default_rng(20261203))["y"]


@pytest.mark.parametrize(("family", "parameters", "reference", "column_type"), [
    ("normal", {"mean": 10.0, "sd": 2.0}, stats.norm(10, 2), "number"),
    ("bernoulli", {"p": 0.3}, stats.bernoulli(0.3), "integer"),
])
def test_moments_match_the_family(family, parameters, reference, column_type):
    y = _column(family, column_type=column_type, **parameters).astype(float)
    mean, var = reference.mean(), reference.var()  # scipy reference
    kurtosis = float(reference.stats(moments="k"))
    # V-TOL: 4 Monte Carlo standard deviations of the sample mean and of the sample variance
    assert abs(y.mean() - mean) < 4 * np.sqrt(var / y.size)
    assert abs(y.var(ddof=1) - var) < 4 * var * np.sqrt((kurtosis + 2) / y.size)


def test_normal_shape_by_kolmogorov_smirnov():
    y = _column("normal", mean=10.0, sd=2.0)
    assert stats.kstest(y, stats.norm(10, 2).cdf).pvalue > 0.001  # scipy reference


def test_groups_take_their_own_parameters_and_the_plans_level_order():
    model = DatasetModel(rows=Rows(groups=GroupRows(column="arm", sizes={"active": 3, "control": 2})),
                         columns={"y": ColumnModel(model=Distribution(family="normal", mean=0, sd=1e-9),
                                                   by_group={"active": {"mean": 5}})})
    ds = Dataset(file="x.csv", columns={"arm": Column(type="category", levels=["control", "active"]),
                                        "y": Column(type="number"), "id": Column(type="text")})
    out = generate(model, ds, np.random.default_rng(1))
    assert out["arm"].tolist() == ["control"] * 2 + ["active"] * 3
    assert np.allclose(out["y"], [0, 0, 5, 5, 5], atol=1e-6)
    assert out["id"].tolist() == ["id-1", "id-2", "id-3", "id-4", "id-5"]
    assert list(out) == ["arm", "y", "id"]


def test_largest_remainder_keeps_each_count_within_one_of_its_quota():
    # identity: counts sum to the total and each lies in [floor(quota), floor(quota) + 1]
    assert largest_remainder(10, [1 / 3, 1 / 3, 1 / 3]).tolist() == [4, 3, 3]
    assert largest_remainder(80, [0.3, 0.2, 0.3, 0.2]).tolist() == [24, 16, 24, 16]
    assert largest_remainder(7, [0.5, 0.25, 0.25]).tolist() == [3, 2, 2]  # quotas 3.5, 1.75, 1.75


def test_same_generator_gives_the_same_bytes():
    a, b = _column("normal", n=1000, mean=0, sd=1), _column("normal", n=1000, mean=0, sd=1)
    assert a.tobytes() == b.tobytes()
