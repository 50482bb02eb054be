"""`check` finds every refusal `run` makes, by the engine's own feasibility rule, before any draw:
here the two that used to fall back to Monte Carlo quietly under ``exact: always`` (the joint null
of a max-t family and the shift interval beyond the enumeration limit)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from planrunner.engines import inversion, maxt, permutation
from planrunner.engines.permcore import ENUMERATION_LIMIT, PermutationOptions
from planrunner.engines.statistics import get_statistic
from planrunner.engines.streams import stream_for
from planrunner.errors import EngineError

PLAN = """
plan: refusals
title: exact always beyond the enumeration limit
seed: 5
datasets:
  d:
    file: data.csv
    columns:
      g: {{type: category}}
      y: {{type: number}}
      w: {{type: number}}
analyses:
  - id: first
    data: d
    outcome: y
    groups: {{by: g, compare: [a, b]}}
    statistic: mean_difference
    method: permutation
    exact: always
{more}
  - id: second
    role: secondary
    data: d
    outcome: w
    groups: {{by: g, compare: [a, b]}}
    statistic: mean_difference
    method: permutation
    exact: always
{family}"""

MAX_T = "multiplicity:\n  - family: [first, second]\n    method: max-t\n"
SHIFT = "    intervals: [shift]\n    confidence: 0.95"
ARRANGEMENTS = math.comb(30, 15)  # identity 18: C(30, 15) = 155,117,520 splits of 15 + 15 rows


def _data() -> str:
    rng = np.random.default_rng(8)
    # integer outcomes: each test alone is exact by dynamic programming, so only the family's
    # joint null or the interval lacks an exact way
    rows = [f"{'a' if i < 15 else 'b'},{rng.integers(0, 9)},{rng.integers(0, 9)}" for i in range(30)]
    return "g,y,w\n" + "\n".join(rows) + "\n"


def _no_draws(monkeypatch) -> None:
    """Any Monte Carlo draw of the label-shuffle engines fails the test."""
    def refuse(*args, **kwargs):
        raise AssertionError("drew resamples before refusing")
    for module in (permutation, maxt, inversion):
        monkeypatch.setattr(module, "_random", refuse)


@pytest.mark.parametrize("case,more,family,where", [
    ("max-t", "", MAX_T, "multiplicity[0] (max-t family first, second)"),
    ("shift", SHIFT, "", "analysis 'first'"),
], ids=["max-t", "shift"])
def test_check_reports_what_run_refuses_before_any_draw(write_plan, tmp_path, capsys, monkeypatch,
                                                        case, more, family, where) -> None:
    from planrunner.cli import main as cli

    _no_draws(monkeypatch)
    plan = write_plan(PLAN.format(more=more, family=family), {"data.csv": _data()})
    assert cli.main(["check", str(plan)]) == 2
    checked = capsys.readouterr().err
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "out")]) == 2
    ran = capsys.readouterr().err
    assert checked.strip() == ran.strip()
    assert not (tmp_path / "out").exists()
    assert checked.count("exact enumeration asked for") == 1  # one message
    assert where in checked and f"{ARRANGEMENTS:,}" in checked and f"{ENUMERATION_LIMIT:,}" in checked
    assert "exact: auto" in checked  # the fix


def test_the_engines_themselves_refuse_instead_of_drawing(monkeypatch) -> None:
    _no_draws(monkeypatch)
    rng = np.random.default_rng(2)
    x, y = rng.integers(0, 9, 15).astype(float), rng.integers(0, 9, 15).astype(float)
    statistic = get_statistic("mean_difference")
    always = PermutationOptions(resamples=999, alternative="two-sided", exact="always", confidence=0.95,
                                intervals=("shift",))
    stream = stream_for(1, "refusal")
    with pytest.raises(EngineError, match=f"{ARRANGEMENTS:,} arrangements"):
        inversion.shift_interval(x, y, statistic, always, stream=stream)
    with pytest.raises(EngineError, match=f"{ARRANGEMENTS:,} arrangements"):
        maxt.max_t([([x, y], statistic, "two-sided"), ([y, x], statistic, "greater")], strata=None,
                   resamples=999, stream=stream, exact="always")
    # the same feasibility functions check calls give the same refusal, and the choice otherwise
    with pytest.raises(EngineError, match="shift interval has no exact shortcut"):
        inversion.computation(x, y, statistic, always)
    with pytest.raises(EngineError, match="joint max-T null"):
        maxt.computation([([x, y], statistic, "two-sided"), ([y, x], statistic, "less")], strata=None,
                         resamples=999, exact="always")
    assert maxt.computation([([x, y], statistic, "two-sided"), ([y, x], statistic, "less")], strata=None,
                            resamples=999, exact="auto") == "Monte Carlo"
    small = x[:6], y[:6]  # C(12, 6) = 924 arrangements: listed
    assert inversion.computation(*small, statistic, always) == "enumeration"
    assert maxt.computation([(list(small), statistic, "two-sided"), ([small[1], small[0]], statistic, "less")],
                            strata=None, resamples=999, exact="always") == "enumeration"
