"""Record adapters of the multiplicity families: adjusted p-values from the members' p-values
(Holm, Bonferroni, ...) or from the joint max-T run (`MaxTResult`, made in the execute stage).

Each family gives its record entry and, for its members, the adjusted p-value and any warning
that the family raises; the builder puts those into the members' entries.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from planrunner.engines.maxt import MaxTResult
from planrunner.engines.multiplicity import METHOD_NAMES, adjust


@dataclass(frozen=True)
class Member:
    """What a family needs of one of its analyses."""

    id: str
    p_value: float | None
    smallest_p: float | None  # the smallest p-value the test can give (permutation-type tests only)


@dataclass(frozen=True)
class FamilyFields:
    entry: dict[str, Any]  # the family's entry under `multiplicity`
    adjusted: tuple[tuple[str, dict[str, Any]], ...]  # (member id, {method, p_value}) in family order
    warnings: tuple[tuple[str, dict[str, str]], ...]  # (member id, {code, message})

    def for_member(self, analysis_id: str) -> tuple[list[dict[str, Any]], list[dict[str, str]]]:
        return ([a for i, a in self.adjusted if i == analysis_id],
                [w for i, w in self.warnings if i == analysis_id])


def adjusted_family_fields(method: str, members: list[Member], alpha: float) -> FamilyFields:
    """A family adjusted from its members' own p-values (a missing p-value counts as 1)."""
    raw = [m.p_value for m in members]
    adjusted = adjust([1.0 if p is None else p for p in raw], method)
    floors = _adjusted_floors(members, lambda filled: adjust(filled, method))
    return _family(method, members, adjusted, floors, alpha)


def max_t_family_fields(members: list[Member], alpha: float, result: MaxTResult) -> FamilyFields:
    """A max-T family: adjusted p-values from the joint run on the same permutations."""
    floors = _adjusted_floors(members, lambda _: list(result.smallest_adjusted))
    fields = _family("max-t", members, list(result.adjusted), floors, alpha)
    return FamilyFields({**fields.entry, "details": result.describe()}, fields.adjusted, fields.warnings)


def _family(method: str, members: list[Member], adjusted: list[float], floors: list[float] | None,
            alpha: float) -> FamilyFields:
    ids = [m.id for m in members]
    entry = {"method": method, "method_label": METHOD_NAMES[method], "family": ids,
             "unadjusted": dict(zip(ids, [m.p_value for m in members])), "adjusted": dict(zip(ids, adjusted))}
    warnings = []
    for member, floor_adj in zip(members, floors or []):
        if member.smallest_p is not None and floor_adj > alpha:
            warnings.append((member.id, {
                "code": "adjusted-p-floor-above-alpha",
                "message": f"after {method} adjustment over {len(members)} analyses the smallest attainable "
                           f"p-value is {floor_adj:.4g} (unadjusted {member.smallest_p:.4g}), above alpha = "
                           f"{alpha:g}: this analysis cannot reach significance in its family"}))
    return FamilyFields(entry, tuple((i, {"method": method, "p_value": p}) for i, p in zip(ids, adjusted)),
                        tuple(warnings))


def _adjusted_floors(members: list[Member],
                     adjust_floors: Callable[[list[float]], Sequence[float]]) -> list[float] | None:
    """Each member's smallest attainable p-value after adjustment with the family (None when no
    member has one; a member without one counts as 0)."""
    if all(m.smallest_p is None for m in members):
        return None
    return list(adjust_floors([0.0 if m.smallest_p is None else float(m.smallest_p) for m in members]))
