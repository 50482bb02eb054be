"""The pictures: one style per interval method, discrete distributions at their support points,
probabilities for weighted distributions, lines of no effect and of the decision, plain tick
labels, and the same bytes for the same record."""

from __future__ import annotations

import copy
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.pipeline.run import run_plan
from planrunner.report import canvas, plots
from planrunner.report import digits as precision
from planrunner.report import render as report

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"
SVG = "{http://www.w3.org/2000/svg}"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


def entry_of(demo, analysis_id):
    return copy.deepcopy(next(a for a in demo.record["analyses"] if a["id"] == analysis_id))


def draw(entry):
    return plots.plots_for(entry, precision.significant, precision.p_value)[0]


def texts(svg: str) -> list[str]:
    return [t.text or "" for t in ET.fromstring(svg.encode()).iter(f"{SVG}text")]


def stroke_styles(svg: str, colour: str) -> set[str]:
    """The stroke attributes (colour, width, dashes) of every dashed or dotted line drawn in ``colour``."""
    return {f"{e.get('stroke')} {e.get('stroke-width')} {e.get('stroke-dasharray')}"
            for e in ET.fromstring(svg.encode()).iter(f"{SVG}path")
            if e.get("stroke") == colour and e.get("stroke-dasharray")}


def test_each_interval_method_keeps_its_style_and_its_name_whatever_its_position(demo):
    entry = entry_of(demo, "primary")
    assert [i["method"] for i in entry["intervals"]] == ["percentile", "bca"]
    swapped = copy.deepcopy(entry)
    swapped["intervals"].reverse()
    swapped["monte_carlo"]["intervals"].reverse()
    first, second = draw(entry).svg, draw(swapped).svg
    for method in ("percentile", "bca"):
        colour = plots.METHOD_STYLES[method].colour
        assert stroke_styles(first, colour) and stroke_styles(first, colour) == stroke_styles(second, colour)
    assert "BCa 95% interval" in texts(first) and not any(t.startswith("bca") for t in texts(first))
    assert [plots.method_name(m) for m in ("bca", "percentile", "basic", "normal", "studentized", "shift")] == [
        "BCa", "percentile", "basic", "normal", "studentized", "shift"]
    styles = [(s.colour, str(s.line)) for s in plots.METHOD_STYLES.values()]
    assert len(set(styles)) == len(styles)  # no two methods look alike
    assert plots.method_name("jackknife-after") == "jackknife-after"  # an unknown method keeps its own name


def test_an_exact_binary_null_is_drawn_at_its_support_points_with_their_probabilities(write_plan, tmp_path):
    # 0/1 outcome, 9 and 7 units, 8 events: the exact null of the difference in proportions is
    # the hypergeometric distribution of the first group's events (Fisher's exact test)
    first, second = [1, 1, 1, 1, 1, 1, 0, 0, 0], [1, 1, 0, 0, 0, 0, 0]
    rows = [f"a,{v}" for v in first] + [f"b,{v}" for v in second]
    plan = write_plan("""
        plan: binary-exact
        title: exact binary null
        seed: 5
        datasets:
          d:
            file: d.csv
            columns: {group: {type: category, levels: [a, b]}, event: {type: boolean}}
        analyses:
          - id: rate
            data: d
            outcome: event
            groups: {by: group, compare: [a, b]}
            statistic: risk_difference
            method: permutation
            exact: always
        """, {"d.csv": "group,event\n" + "\n".join(rows) + "\n"})
    entry = run_plan(plan, out=tmp_path / "runs", operator="t", clock=fixed_clock).record["analyses"][0]
    support = entry["distribution"]["support"]
    n1, n2, events = 9, 7, 8
    ks = range(max(0, events - n2), min(n1, events) + 1)
    # Source: scipy.stats.hypergeom.pmf (reference function); difference = k/n1 - (events - k)/n2
    expected = {k / n1 - (events - k) / n2: stats.hypergeom.pmf(k, n1 + n2, events, n1) for k in ks}
    assert len(support["values"]) == len(expected)
    for value, p in zip(support["values"], support["probabilities"]):
        match = min(expected, key=lambda v: abs(v - value))
        assert value == pytest.approx(match, abs=1e-12) and p == pytest.approx(expected[match], rel=1e-12)
    plot = draw(entry)
    words = texts(plot.svg)
    assert "probability" in words and not any("per bar" in w for w in words)
    assert plot.alt.startswith(f"Spikes at the {len(expected)} values")


def test_a_weighted_null_shows_probabilities_never_counts_or_an_axis_multiplier(demo):
    entry = entry_of(demo, "excursion-rate-test")  # every arrangement, 3.16 × 10^66 of them
    assert entry["distribution"]["weighted"] and entry["distribution"]["support"]
    words = texts(draw(entry).svg)
    assert "probability" in words
    assert not any(re.search(r"1e\+?\d|×\s*10|per bar", w) for w in words), words
    del entry["distribution"]["support"]  # a record from before `support` existed: bars of probability
    shape = plots.distribution_shape(entry, "arrangements")
    assert shape is not None and shape.ylabel == "probability per bar" and not shape.spikes
    assert sum(shape.heights) == pytest.approx(1.0, rel=1e-12)
    assert not any(re.search(r"1e\+?\d|×\s*10|arrangements per bar", w) for w in texts(draw(entry).svg))


@pytest.mark.parametrize("values, expected", [
    ([0.0, 0.25, 0.5, 0.75], ["0", "0.25", "0.50", "0.75"]),
    ([-30.0, -20.0, -10.0, 0.0, 10.0], ["\u221230", "\u221220", "\u221210", "0", "10"]),
    ([1e65, 2e65, 3e65], ["1e65", "2e65", "3e65"]),
    ([1000000.1, 1000000.2], ["1.0000001e6", "1.0000002e6"]),
    ([2e-5, 4e-5], ["2e\u22125", "4e\u22125"]),
])
def test_tick_labels_carry_their_whole_value(values, expected):
    labels = canvas.tick_labels(values)
    assert labels == expected
    for label, value in zip(labels, values):  # every label reads back as its tick, to a thousandth of a step
        assert float(label.replace("\u2212", "-")) == pytest.approx(value, rel=1e-6)


@pytest.mark.parametrize("statistic, value", [
    ("mean_difference", 0.0), ("median_difference", 0.0), ("risk_difference", 0.0), ("correlation", 0.0),
    ("ratio_of_means", 1.0), ("risk_ratio", 1.0), ("odds_ratio", 1.0), ("mean", None), ("rank_sum", None),
])
def test_no_effect_value_comes_from_the_statistics_kind(statistic, value):
    assert plots.null_value(statistic) == value


def test_a_ratio_gets_its_line_at_one_and_a_mean_none(demo):
    entry = entry_of(demo, "primary")
    assert "a thin grey line marks no effect (0)" in draw(entry).alt
    ratio = copy.deepcopy(entry)
    ratio["statistic"] = "ratio_of_means"
    assert "no effect (1)" in draw(ratio).alt and "no effect (0)" not in draw(ratio).alt
    mean = copy.deepcopy(entry)
    mean["statistic"] = "mean"
    assert "no effect" not in draw(mean).alt


def test_decision_margin_and_limits_are_drawn_when_the_record_has_them(demo):
    # estimate -7.1, percentile interval -21.9 to -0.6; the demo's own decision (below 0) taken away
    entry = {k: v for k, v in entry_of(demo, "primary").items() if k != "decision"}
    assert "decision" not in draw(entry).alt  # as before decisions existed
    with_margin = copy.deepcopy(entry)
    with_margin["decision"] = {"rule": "non-inferiority", "margin": 5.0, "limits": None, "limit": None,
                               "compared": "upper", "verdict": "not shown"}
    plot = draw(with_margin)
    assert "long dashes mark the decision margin 5" in plot.alt
    assert "decision margin 5" in texts(plot.svg)
    equivalence = copy.deepcopy(entry)
    equivalence["decision"] = {"rule": "equivalence", "limits": [-10.0, 10.0]}
    assert "long dashes mark the decision limits -10 and 10" in draw(equivalence).alt
    for broken in ({"rule": "x", "margin": "five"}, {"limits": [None, "a"]}, "equivalence", None,
                   {"margin": float("nan")}, {"limit": True}):
        damaged = copy.deepcopy(entry)
        damaged["decision"] = broken
        assert "decision" not in draw(damaged).alt  # read defensively: no line, no failure
    far = copy.deepcopy(entry)
    far["decision"] = {"rule": "below-limit", "limit": 1e6}
    assert "the decision limit 1e+06 lies partly outside the drawn range" in draw(far).alt


def test_pictures_are_byte_stable_for_the_same_record(demo):
    record = copy.deepcopy(demo.record)
    record["analyses"][0]["decision"] = {"rule": "superiority", "margin": 0.0}
    report._plots.cache_clear()
    first = report.render_all(record)
    report._plots.cache_clear()
    second = report.render_all(copy.deepcopy(record))
    figures = [k for k in first if k.startswith("figures/")]
    assert len(figures) == 4 and all(first[k] == second[k] for k in figures)
    assert first["report.html"] == second["report.html"]
