"""The record is built once from the results: one record adapter per result type, families from
their members' fields (planrunner/record/build.py, families.py)."""

from __future__ import annotations

import dataclasses

import pytest
from statsmodels.stats.multitest import multipletests

from planrunner.engines import results
from planrunner.record.build import ADAPTERS
from planrunner.record.families import Member, adjusted_family_fields


def test_every_result_type_has_one_record_adapter():
    result_types = {getattr(results, name) for name in results.__all__
                    if name.endswith("Result") and dataclasses.is_dataclass(getattr(results, name))}
    assert result_types and set(ADAPTERS) == result_types


def test_holm_family_matches_statsmodels_and_reaches_its_members():
    p = [0.01, 0.04, 0.03]
    members = [Member(f"a{i}", value, None) for i, value in enumerate(p)]
    family = adjusted_family_fields("holm", members, alpha=0.05)
    expected = multipletests(p, method="holm")[1]  # statsmodels reference
    assert list(family.entry["adjusted"].values()) == pytest.approx(expected, rel=1e-12)
    assert family.entry["unadjusted"] == {"a0": 0.01, "a1": 0.04, "a2": 0.03}
    adjusted, warnings = family.for_member("a1")
    assert adjusted == [{"method": "holm", "p_value": pytest.approx(expected[1], rel=1e-12)}] and warnings == []


def test_family_warns_members_whose_smallest_p_cannot_reach_alpha():
    # three permutation tests whose smallest attainable p is 0.02; Bonferroni multiplies by 3 (its
    # definition): 0.06 > 0.05, so each member is told it cannot reach significance in the family
    members = [Member(f"t{i}", 0.02, 0.02) for i in range(3)] + [Member("boot", None, None)]
    family = adjusted_family_fields("bonferroni", members, alpha=0.05)
    floors_adjusted = 0.02 * 4  # four members; the bootstrap's missing floor counts as 0
    for i in range(3):
        _, warnings = family.for_member(f"t{i}")
        assert [w["code"] for w in warnings] == ["adjusted-p-floor-above-alpha"]
        assert f"{floors_adjusted:.4g}" in warnings[0]["message"]
    assert family.for_member("boot") == ([{"method": "bonferroni", "p_value": 1.0}], [])
