"""The corpus of invalid plans: each file's first line says where the error is and what it says."""

from __future__ import annotations

from pathlib import Path

import pytest

from planrunner.errors import PlanError
from planrunner.plan.load import read_plan

CORPUS = Path(__file__).resolve().parent / "invalid_plans"
CASES = sorted(CORPUS.glob("*.yaml"))


def expectation(path: Path) -> tuple[str, str]:
    first = path.read_text(encoding="utf-8").splitlines()[0]
    assert first.startswith("# expect: "), f"{path.name} lacks its '# expect: LINE:COL fragment' line"
    where, _, fragment = first.removeprefix("# expect: ").partition(" ")
    return where, fragment


def test_corpus_is_not_empty():
    assert len(CASES) >= 30


@pytest.mark.parametrize("path", CASES, ids=[p.stem for p in CASES])
def test_invalid_plan_is_reported_where_and_what(path: Path):
    where, fragment = expectation(path)
    with pytest.raises(PlanError) as caught:
        read_plan(path)
    message = str(caught.value)
    lines = message.splitlines()
    matching = [line for line in lines if line.startswith(f"{path}:{where}:")]
    assert matching, f"no problem reported at {where}:\n{message}"
    assert any(fragment in line for line in matching), f"'{fragment}' not in:\n{message}"
