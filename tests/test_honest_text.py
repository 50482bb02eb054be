"""What the tool says about a run is what ran: the methods paragraph, labels and messages."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import fixed_clock

from planrunner.pipeline.run import run_plan
from planrunner.record.methods import methods_text, readable_count

PLAN = """
plan: honest-text
title: Labels and sentences
seed: 7
datasets:
  d:
    file: data.csv
    columns:
      g: {{type: category}}
      y: {{type: number}}
analyses:
{analyses}
"""


def run(write_plan, tmp_path, groups: dict[str, list[float]], analyses: str) -> dict:
    csv = "\n".join(["g,y"] + [f"{g},{v:g}" for g, vs in groups.items() for v in vs]) + "\n"
    plan = write_plan(PLAN.format(analyses=analyses), {"data.csv": csv})
    return run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record


def test_readable_count_is_exact_at_any_size() -> None:
    assert readable_count(11440) == "11,440"  # identity 18: C(16, 7)
    assert readable_count(str(math.comb(230, 115))) == "9.07 × 10^67"  # math.comb(230, 115) = 9.068...e67
    assert readable_count(10**999) == "1.00 × 10^999"


def test_methods_paragraph_states_the_dynamic_programming_it_used(write_plan, tmp_path) -> None:
    rng = np.random.default_rng(3)
    groups = {"a": list(rng.integers(0, 20, 115)), "b": list(rng.integers(0, 20, 115))}
    record = run(write_plan, tmp_path, groups, """
  - id: big
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: permutation
    resamples: 999
""")
    entry = record["analyses"][0]
    assert entry["details"]["computation"] == "dynamic programming"
    text = methods_text(record)
    assert "dynamic programming" in text and "9.07 × 10^67 arrangements" in text  # math.comb(230, 115)
    assert "complete enumeration" not in text and "906" not in text  # no 68-digit number
    absolute = json.loads(json.dumps(record))
    absolute["analyses"][0]["details"]["two_sided_rule"] = "absolute"
    assert "twice the smaller" not in methods_text(absolute) and "far from the centre" in methods_text(absolute)


LABEL_PLAN = """
plan: honest-labels
title: Labels
seed: 9
datasets:
  d:
    file: data.csv
    columns:
      g: {type: category}
      ward: {type: text}
      y: {type: number, unit: N}
analyses:
  - id: ranks
    data: d
    outcome: y
    groups: {by: g, compare: [foam, standard]}
    statistic: rank_sum
    method: permutation
    alternative: less
    intervals: [shift]
    resamples: 999
  - id: ratio
    role: secondary
    data: d
    outcome: y
    groups: {by: g, compare: [foam, standard]}
    statistic: ratio_of_means
    method: bootstrap
    resamples: 200
  - id: wards
    role: secondary
    data: d
    outcome: y
    groups: {by: g, compare: [foam, standard]}
    clusters: ward
    statistic: mean_difference
    method: permutation
"""

# invented data: 4 wards per arm, unequal sizes
WARDS = {"w1": ("foam", [5.1, 6.0, 5.5]), "w2": ("foam", [7.2, 6.8]), "w3": ("foam", [6.1, 5.9, 6.4, 6.6]),
         "w4": ("foam", [8.0]), "w5": ("standard", [4.2, 5.0]), "w6": ("standard", [5.3, 4.8, 5.1]),
         "w7": ("standard", [6.0, 5.2]), "w8": ("standard", [4.4, 4.9, 4.0])}


def test_labels_say_direction_effect_clusters_and_ratio(write_plan, tmp_path, capsys) -> None:
    from scipy import stats

    from planrunner.cli import main as cli
    from planrunner.report.render import render

    csv = "g,ward,y\n" + "".join(f"{g},{w},{v}\n" for w, (g, vs) in WARDS.items() for v in vs)
    plan = write_plan(LABEL_PLAN, {"data.csv": csv})
    record = run_plan(plan, out=tmp_path / "out", clock=fixed_clock).record
    by_id = {a["id"]: a for a in record["analyses"]}
    foam = [v for g, vs in WARDS.values() if g == "foam" for v in vs]
    standard = [v for g, vs in WARDS.values() if g == "standard" for v in vs]
    hodges_lehmann = float(np.median(np.subtract.outer(foam, standard)))  # definition (Hodges & Lehmann 1963)
    assert by_id["ranks"]["details"]["shift_estimate"] == hodges_lehmann
    # the ratio's question relates the groups by a quotient
    assert "foam over standard" in by_id["ratio"]["question"] and "minus" not in by_id["ratio"]["question"]
    assert by_id["wards"]["n"]["clusters"] == {"foam": 4, "standard": 4}

    w = stats.mannwhitneyu(foam, standard).statistic + len(foam) * (len(foam) + 1) / 2  # scipy: U; W = U + n1(n1+1)/2
    for kind in ("md", "html"):
        text = render(record, kind)
        glance = text[text.rindex("Results at a glance"):].split("Analyses")[0]
        assert "one-sided, foam &lt; standard" in glance or "one-sided, foam < standard" in glance, kind
        assert f"{hodges_lehmann:.4g}" in glance and "shift, Hodges–Lehmann" in glance, kind
        assert f"W = {w:g}" in glance, kind
        assert "foam 10 rows in 4 clusters" in glance and "standard 10 rows in 4 clusters" in glance, kind
        assert "foam over standard" in text, kind

    assert cli.main(["run", str(plan), "--out", str(tmp_path / "again")]) == 0
    table = capsys.readouterr().out
    ranks_row = next(line for line in table.splitlines() if line.startswith("ranks"))
    assert "(one-sided, foam < standard)" in ranks_row and f"W = {w:g}" in ranks_row
    assert f"{hodges_lehmann:.4g} (shift, Hodges–Lehmann)" in ranks_row
    assert "foam 10 rows in 4 clusters" in next(line for line in table.splitlines() if line.startswith("wards"))


def _family_record(p_a: float, sd_a: float, p_b: float, sd_b: float, method: str = "holm") -> dict:
    from planrunner.engines.multiplicity import adjust

    adjusted = adjust([p_a, p_b], method)
    return {"analyses": [{"id": "a", "monte_carlo": {"p_value_sd": sd_a}, "settings": {"alpha": 0.05}},
                         {"id": "b", "monte_carlo": {"p_value_sd": sd_b}, "settings": {"alpha": 0.05}}],
            "multiplicity": [{"method": method, "family": ["a", "b"], "unadjusted": {"a": p_a, "b": p_b},
                              "adjusted": {"a": adjusted[0], "b": adjusted[1]}}]}


def test_an_exact_adjusted_p_is_never_rounded_with_another_members_error() -> None:
    from planrunner.report.render import _adjusted_view

    # Holm: b's adjusted p is its own exact 0.05022 (2 × a's 0.0065 ± 2 s.d. stays below it)
    view = _adjusted_view(_family_record(0.0065, 0.0008, 0.05022, 0.0))
    assert view["b"][0]["text"] == "0.05022" and view["b"][0]["sd_bound"] is None  # 4 significant digits, exact
    assert view["a"][0]["sd_bound"] == pytest.approx(2 * 0.0008)  # rule 5: F = 2 for Holm
    # when b's adjusted value does come from a's Monte Carlo p, a's error applies to it
    view = _adjusted_view(_family_record(0.03, 0.004, 0.031, 0.0))
    assert view["b"][0]["sd_bound"] == pytest.approx(2 * 0.004)


def test_a_p_value_is_never_printed_rounded_across_alpha() -> None:
    from planrunner.report import digits

    assert digits.p_value(0.05022, 0.002) == "0.050"  # rule 4 alone would cross alpha
    assert digits.p_value(0.05022, 0.002, 0.05) == "0.0502"
    assert digits.p_value(0.04996, 0.002, 0.05) == "0.050"  # 0.050 ≤ 0.05: same side, kept
    assert digits.p_value(0.050004, None, 0.05) == "0.050004"  # exact: 4 digits would read 0.05
    assert digits.p_value(0.0123, 0.002, 0.05) == "0.012"


REFUSED = """
plan: refused-at-check
title: exact always beyond the limit
seed: 3
datasets:
  d:
    file: data.csv
    columns:
      g: {{type: category}}
      unit: {{type: text}}
      x: {{type: number}}
      y: {{type: number}}
analyses:
  - id: refused
    data: d
    outcome: y
{design}
    method: permutation
    exact: always
"""

DESIGNS = {  # each beyond 5,000,000 arrangements with no exact shortcut for its statistic
    "pairs": "    groups: {by: g, compare: [a, b]}\n    pairs: unit\n    statistic: t_welch",  # 2^30 sign patterns
    "clusters": "    groups: {by: g, compare: [a, b]}\n    clusters: unit\n    statistic: t_welch",  # C(30, 15)
    "association": "    predictor: x\n    statistic: kendall",  # 60! pairings
}


@pytest.mark.parametrize("design", sorted(DESIGNS))
def test_check_refuses_what_run_refuses(write_plan, tmp_path, capsys, design: str) -> None:
    from planrunner.cli import main as cli

    rng = np.random.default_rng(1)
    rows = ["g,unit,x,y"]
    for i in range(30):
        unit = f"u{i:02d}"
        if design == "pairs":
            rows += [f"{arm},{unit},{rng.normal():.4f},{rng.normal():.4f}" for arm in ("a", "b")]
        else:
            group = "a" if i < 15 else "b"
            rows += [f"{group},{unit},{rng.normal():.4f},{rng.normal():.4f}" for _ in range(2)]
    plan = write_plan(REFUSED.format(design=DESIGNS[design]), {"data.csv": "\n".join(rows) + "\n"})
    assert cli.main(["check", str(plan)]) == 2
    checked = capsys.readouterr().err
    assert cli.main(["run", str(plan), "--out", str(tmp_path / "out")]) == 2
    ran = capsys.readouterr().err
    assert "exact enumeration asked for" in checked and checked.strip() == ran.strip()
