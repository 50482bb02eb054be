"""planrunner's SVG writer (report/canvas.py) checked against outside values (V-SVG): Heckbert's
nice-numbers rule, numpy.histogram counts, the record's numbers under the axes' linear map, XML
well-formedness and escaping, and the same bytes on every run."""

from __future__ import annotations

import copy
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import fixed_clock
from svg_reading import ROUNDING, linear, marks, parse, path_points, tick_maps

from planrunner.pipeline.run import run_plan
from planrunner.report import canvas, plots
from planrunner.report import digits as precision

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


# Heckbert, "Nice numbers for graph labels", Graphics Gems (1990): nicenum(x, round) keeps the
# leading fraction f of x in [1, 10) as 1, 2, 5 or 10: rounded, below 1.5 → 1, below 3 → 2, below 7 → 5;
# not rounded (the ceiling), up to 1 → 1, up to 2 → 2, up to 5 → 5 (the rule as published)
@pytest.mark.parametrize("x, rounded, nice", [
    (1.4, True, 1.0), (1.6, True, 2.0), (2.9, True, 2.0), (3.1, True, 5.0), (6.9, True, 5.0), (7.1, True, 10.0),
    (1.0, False, 1.0), (1.1, False, 2.0), (2.0, False, 2.0), (4.9, False, 5.0), (5.1, False, 10.0),
    (0.0031, True, 0.005), (438.0, False, 500.0), (125.0, True, 100.0),
])
def test_nice_number_follows_heckberts_thresholds(x, rounded, nice):
    assert canvas.nice_number(x, rounded) == pytest.approx(nice, rel=1e-12)


@pytest.mark.parametrize("low, high, count, ticks", [
    # the paper's worked example, data from 105 to 543 with 5 ticks: 100 to 600 by 100  # from memory
    (105.0, 543.0, 5, [100.0, 200.0, 300.0, 400.0, 500.0, 600.0]),
    # [0, 1] with 5 ticks: range 1, step nicenum(0.25, round) = 0.2 (the rule applied by hand)
    (0.0, 1.0, 5, [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]),
    # [-32.8, 11] with 10 ticks: range nicenum(43.8) = 50, step nicenum(50/9 = 5.6, round) = 5 (by hand)
    (-32.8, 11.0, 10, [-35.0, -30.0, -25.0, -20.0, -15.0, -10.0, -5.0, 0.0, 5.0, 10.0, 15.0]),
])
def test_loose_ticks_match_worked_examples(low, high, count, ticks):
    assert canvas.loose_ticks(low, high, count) == ticks


def test_ticks_inside_the_range_are_nice_and_whole_for_counts():
    assert canvas.ticks_within(0.0, 1340.0, whole=True) == [0.0, 200.0, 400.0, 600.0, 800.0, 1000.0, 1200.0]
    assert canvas.ticks_within(0.0, 3.2, whole=True) == [0.0, 1.0, 2.0, 3.0]  # never a step below 1 for counts
    assert canvas.log_ticks(0.001, 0.1) == [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1]


AWKWARD = ['a < b & "c"', "it's 5 µg/m³ > 3", "<script>x</script>", "Größe — ±1"]


def awkward_picture() -> canvas.Picture:
    pen = canvas.Pen("#000000", 1.0)
    panel = canvas.Panel(canvas.value_axis(0.0, 1.0, AWKWARD[1]), [
        canvas.Line([0.0, 1.0], [0.0, 1.0], pen, name=AWKWARD[2])])
    return canvas.Picture(504.0, 216.0, canvas.value_axis(0.0, 1.0, AWKWARD[0]), [panel],
                          [canvas.Key(AWKWARD[3], pen)])


def test_every_text_is_escaped_and_the_document_is_well_formed_xml():
    svg = awkward_picture().svg()
    root = parse(svg)  # xml.etree refuses a document that is not well-formed
    texts = ["".join(t.itertext()) for t in root.iter("{http://www.w3.org/2000/svg}text")]
    for label in (AWKWARD[0], AWKWARD[1], AWKWARD[3]):
        assert label in texts
    assert "<script>" not in svg and any(g.get("class") == AWKWARD[2] for g in root.iter())
    assert canvas.escape(AWKWARD[0]) == "a &lt; b &amp; &quot;c&quot;"


def test_same_picture_same_bytes_in_a_fresh_interpreter():
    code = ("import sys; sys.path.insert(0, 'tests'); from test_canvas import awkward_picture; "
            "sys.stdout.buffer.write(awkward_picture().svg().encode())")
    runs = [subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, check=True).stdout
            for _ in range(2)]
    assert runs[0] == runs[1] == awkward_picture().svg().encode()


def test_bars_are_numpy_histogram_counts_of_the_pseudo_values(write_plan, tmp_path):
    # exact identity: the jackknife pseudo-values of a mean are the observations themselves,
    # n·mean − (n − 1)·mean without i = x_i; so numpy.histogram of the data over the record's edges
    # gives the count of every bar. Whole numbers from 0 to 239 (invented demo data): the bar edges,
    # 239/bins apart, then stay away from every value, so the pseudo-values' rounding error (about
    # 1e-13) cannot move one into the next bar
    data = np.concatenate([[0, 239], np.random.default_rng(7).integers(0, 240, size=300)]).astype(float)
    plan = write_plan("""
        plan: jackknife-bars
        title: jackknife bars
        seed: 3
        datasets:
          d:
            file: d.csv
            columns: {y: {type: number}}
        analyses:
          - id: mean
            data: d
            outcome: y
            statistic: mean
            method: jackknife
        """, {"d.csv": "y\n" + "\n".join(f"{v:.2f}" for v in data) + "\n"})
    entry = run_plan(plan, out=tmp_path / "runs", operator="t", clock=fixed_clock).record["analyses"][0]
    edges = entry["distribution"]["histogram"]["edges"]
    counts, _ = np.histogram(data, bins=edges)
    assert min(abs(v - e) for v in data for e in edges[1:-1]) > 1e-6
    root = parse(plots.plots_for(entry, precision.significant, precision.p_value)[0].svg)
    x_map, y_map = (linear(pairs) for pairs in tick_maps(root))
    bars = marks(root, "bars")
    assert len(bars) == int(np.count_nonzero(counts))
    bottom = y_map(0.0)
    drawn = {}
    for bar in bars:
        left = float(bar.get("x"))
        k = min(range(len(counts)), key=lambda j: abs(x_map(edges[j]) - left))
        assert left == pytest.approx(x_map(edges[k]), abs=4 * ROUNDING)
        assert left + float(bar.get("width")) == pytest.approx(x_map(edges[k + 1]), abs=4 * ROUNDING)
        drawn[k] = bottom - float(bar.get("y"))
        assert float(bar.get("y")) + float(bar.get("height")) == pytest.approx(bottom, abs=4 * ROUNDING)
    scale = (bottom - y_map(1.0))
    for k, count in enumerate(counts):
        assert drawn.get(k, 0.0) == pytest.approx(count * scale, abs=4 * ROUNDING)


def test_estimate_interval_and_observed_marks_sit_at_the_record_values(demo):
    by_id = {a["id"]: copy.deepcopy(a) for a in demo.record["analyses"]}
    primary = by_id["primary"]
    root = parse(plots.plots_for(primary, precision.significant, precision.p_value)[0].svg)
    x_map, _ = (linear(pairs) for pairs in tick_maps(root))
    [estimate] = marks(root, "estimate")
    assert path_points(estimate.get("d").replace("V", "L0 "))[0][0] == pytest.approx(
        x_map(primary["estimate"]), abs=4 * ROUNDING)
    for interval in primary["intervals"]:
        [line] = marks(root, f"interval-{interval['method']}")
        (x0, _), (x1, _) = path_points(line.get("d"))
        assert (x0, x1) == (pytest.approx(x_map(interval["lower"]), abs=4 * ROUNDING),
                            pytest.approx(x_map(interval["upper"]), abs=4 * ROUNDING))
        [ends] = marks(root, f"interval-{interval['method']}-ends")
        xs = sorted({x for x, _ in path_points(ends.get("d"))})
        assert xs == [pytest.approx(x_map(v), abs=4 * ROUNDING) for v in (interval["lower"], interval["upper"])]
    test = by_id["mean-shift-test"]
    root = parse(plots.plots_for(test, precision.significant, precision.p_value)[0].svg)
    x_map, _ = (linear(pairs) for pairs in tick_maps(root))
    [observed] = marks(root, "observed")
    assert float(observed.get("d")[1:].split()[0]) == pytest.approx(x_map(test["estimate"]), abs=4 * ROUNDING)
