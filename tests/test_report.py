"""The reports as files: content, escaping, byte stability, digits, Monte Carlo bands, figures."""

from __future__ import annotations

import copy
import hashlib
import json
import math
import re
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from conftest import fixed_clock
from scipy import stats

from planrunner.engines.intervals import INTERVAL_METHODS, Summary, quantile_band
from planrunner.pipeline.run import run_plan
from planrunner.record.bands import interval_bands
from planrunner.report import digits as precision
from planrunner.report import plots
from planrunner.report import render as report

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"
HOSTILE = '<script>alert("x")</script> [link](http://127.0.0.1:9/) ![img](http://127.0.0.1:9/a.png) | `tick` *em*'


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


@pytest.fixture(scope="module")
def files(demo):
    return report.render_all(demo.record)


def article(html: str, analysis_id: str) -> str:
    start = html.index(f'<article class="analysis" id="a-{analysis_id}">')
    return html[start:html.index("</article>", start)]


# --- what the run folder holds ------------------------------------------------------------------

def test_run_folder_holds_the_reports_and_the_figures_the_markdown_links_to(demo, files):
    on_disk = {str(p.relative_to(demo.folder)) for p in demo.folder.rglob("*") if p.is_file()}
    assert on_disk == set(files) | {"record.json", "results.csv", "results.parquet"}  # and the results dataset
    md = (demo.folder / "report.md").read_text(encoding="utf-8")
    linked = re.findall(r"\]\((figures/[^)]+\.svg)\)", md)
    assert sorted(linked) == sorted(k for k in files if k.startswith("figures/")) and len(linked) == 4
    for name in linked:
        root = ET.fromstring((demo.folder / name).read_text(encoding="utf-8").encode())  # well-formed SVG
        assert root.tag.endswith("svg")
        assert root.find("{http://www.w3.org/2000/svg}title").text.startswith(("Histogram of", "Spikes at the"))
    assert files["report.html"] == (demo.folder / "report.html").read_text(encoding="utf-8")


def test_reports_are_byte_stable_for_the_same_record(demo, files, tmp_path):
    report._plots.cache_clear()  # draw again, not from the cache
    assert report.render_all(copy.deepcopy(demo.record)) == files
    # and in a fresh interpreter (nothing carried over from this process)
    (tmp_path / "record.json").write_text(json.dumps(demo.record), encoding="utf-8")
    script = ("import hashlib, json, sys; from planrunner.report import render as report; "
              "r = json.load(open(sys.argv[1], encoding='utf-8')); "
              "print(json.dumps({k: hashlib.sha256(v.encode()).hexdigest() for k, v in report.render_all(r).items()}))")
    done = subprocess.run([sys.executable, "-c", script, str(tmp_path / "record.json")], capture_output=True,
                          text=True, cwd=ROOT, check=True)
    assert json.loads(done.stdout) == {k: hashlib.sha256(v.encode()).hexdigest() for k, v in files.items()}
    for name, text in files.items():
        if name.endswith(".svg"):
            assert "<dc:date>" not in text and "<metadata" not in text, name  # no date, no tool stamp
    changed = copy.deepcopy(demo.record)
    changed["analyses"][0]["distribution"]["histogram"]["counts"][5] += 1
    assert report.render_all(changed)["figures/primary-resampling.svg"] != files["figures/primary-resampling.svg"]


def test_html_is_self_contained(files):
    html = files["report.html"]
    assert "<script" not in html and "<link" not in html and "<img" not in html
    assert re.findall(r"https?://[^\s\"'<)]+", html) == ["http://www.w3.org/2000/svg"] * html.count("http://www")
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids)), "ids inside the inline pictures must not clash"


# --- content ------------------------------------------------------------------------------------

def test_summary_table_comes_first_and_labels_p_values(files, demo):
    html = files["report.html"]
    assert html.index('id="summary"') < html.index('id="analyses"') < html.index('id="provenance"')
    summary = html[html.index('id="summary"'):html.index('id="analyses"')]
    for entry in demo.record["analyses"]:
        assert f'href="#a-{entry["id"]}"' in summary
    assert summary.count("unadjusted") == 2 and summary.count("adjusted, holm") == 2
    # primary warns bca-non-smooth; the excursion test is exact (a dynamic-programming null over its
    # 0/1 scores), so it carries no Monte Carlo warning
    assert summary.count("⚠ 1") == 1
    md = files["report.md"]
    assert "| Analysis | Role | Estimate | Interval(s) | p-value | Decision | n | Warnings |" in md
    assert md.count("adjusted (holm)") == 2


def test_warnings_sit_beside_the_numbers_they_concern(files):
    primary = article(files["report.html"], "primary")
    assert primary.index("BCa interval, 95%") < primary.index("bca-non-smooth") < primary.index("Observations")
    assert primary.index("percentile interval, 95%") < primary.index("BCa interval, 95%")
    rate = article(files["report.html"], "excursion-rate-test")
    assert rate.index("p-value, two-sided, unadjusted") < rate.index("p-value, adjusted")


def test_each_analysis_shows_question_design_scheme_and_plot(files, demo):
    html = files["report.html"]
    for entry in demo.record["analyses"]:
        part = article(html, entry["id"])
        assert f"<strong>Question.</strong> {entry['question']}" in part
        assert entry["scheme"].replace("×", "×") in part and "Seed and random streams" in part
        assert part.count("<svg") == 1 and 'role="img"' in part and "<figcaption>" in part
    primary = article(html, "primary")
    assert "replicates per bar" in primary and "difference in medians (minutes)" in primary
    assert "permutations per bar" in article(html, "mean-shift-test")
    assert "pseudo-value, difference in means (minutes)" in article(html, "mean-jackknife")


def test_provenance_lists_plan_data_exclusions_seed_environment(files, demo):
    html, md = files["report.html"], files["report.md"]
    record = demo.record
    for text in (html, md):
        assert record["plan"]["sha256"] in text and record["datasets"][0]["sha256"] in text
        assert str(record["seed"]["root"]) in text and "No lock was used for this run." in text
        assert record["environment"]["packages"]["numpy"] in text and "jinja2" in text
        assert record["caution"] in text
    assert "rows_where: minutes_above_8c &lt; 1440" in html and "104, 209, 218, 219" in html
    assert "rows\\_where: minutes\\_above\\_8c &lt; 1440" in md
    assert "seed: 20261201" in md and "seed: 20261201" in html  # the plan text as run
    assert record["methods_text"]  # every record now carries its methods paragraph
    assert "Methods paragraph" in html and "Methods paragraph" in md


def test_lock_deviations_and_methods_paragraph_are_rendered_when_present(demo):
    record = copy.deepcopy(demo.record)
    record["plan"]["lock"] = {"file": "plan.lock.json", "sha256": "ab" * 32,
                              "deviations": [{"path": "analyses[0].resamples", "locked": 9999, "now": 999},
                                             {"path": "datasets.shipments.rows_where", "locked": "x < 1", "now": None}]}
    record["methods_text"] = "First paragraph about <b>methods</b>.\n\nSecond paragraph."
    html, md = report.render(record, "html"), report.render(record, "md")
    assert "2 deviation(s) from the lock" in html and "<code>analyses[0].resamples</code>" in html
    assert "<td><code>9999</code></td><td><code>999</code></td>" in html and "ab" * 32 in html
    assert "| `analyses[0].resamples` | `9999` | `999` |" in md
    assert "<p>First paragraph about &lt;b&gt;methods&lt;/b&gt;.</p>" in html and "<p>Second paragraph.</p>" in html
    assert "## Methods paragraph" in md and "First paragraph about &lt;b&gt;methods&lt;/b&gt;." in md
    record["plan"]["lock"]["deviations"] = []
    assert "No deviation from the locked plan." in report.render(record, "html")
    assert "No deviation from the locked plan." in report.render(record, "md")


# --- escaping -----------------------------------------------------------------------------------

def hostile_record(demo) -> dict:
    record = copy.deepcopy(demo.record)
    first = record["analyses"][0]
    first["title"] = HOSTILE
    first["unit"] = "<script>u</script>"
    first["n"]["groups"] = {"<b>foam</b>": 117, "standard|x": 117}
    record["datasets"][0]["excluded"][0]["reason"] = HOSTILE
    record["plan"]["text"] = "title: x\n```\n<script>plan</script>\n"
    return record


def test_script_in_a_title_is_text_in_html(demo):
    html = report.render(hostile_record(demo), "html")
    assert "<script" not in html and "<b>foam" not in html
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;" in html
    assert "&lt;script&gt;u&lt;/script&gt;" in html  # the unit inside the picture too


def test_script_in_a_title_is_neutralised_in_markdown(demo):
    record = hostile_record(demo)
    md = report.render(record, "md")
    fence = "````"  # the plan text holds ``` so the fence must be longer
    assert f"{fence}yaml\ntitle: x\n```\n<script>plan</script>\n{fence}" in md  # inert inside the fence
    outside = md.replace(f"{fence}yaml\ntitle: x\n```\n<script>plan</script>\n{fence}", "")
    assert "<script" not in outside and "<b>" not in outside
    assert "&lt;script&gt;alert(\"x\")&lt;/script&gt;" in md
    assert "](http" not in outside.replace("\\](http", "")  # no live link or image
    assert "\\[link\\]" in md and "\\!" not in md and "\\|" in md and "\\`tick\\`" in md and "\\*em\\*" in md
    svg = report.render_all(record)["figures/primary-resampling.svg"]
    assert "<script" not in svg and "&lt;script&gt;u&lt;/script&gt;" in svg


def test_markdown_table_rows_keep_their_cell_count(demo):
    md = report.render(hostile_record(demo), "md")
    lines = md.splitlines()
    header = lines.index("| Analysis | Role | Estimate | Interval(s) | p-value | Decision | n | Warnings |")
    for row in lines[header + 2: header + 6]:
        assert len(re.findall(r"(?<!\\)\|", row)) == 9, row  # the demo's primary analysis carries a decision


# --- digits (planrunner/precision.py) -----------------------------------------------------------

@pytest.mark.parametrize("value, sd, shown", [
    (5.7390177881955955, 0.03631710754558016, "5.74"),   # rule 1: leading digit of s is in the 2nd decimal
    (-3.13942394239424, 0.05739304760608115, "-3.14"),
    (-21.9, 0.15, "-21.9"),
    (1234.5, 50.0, "1230"),                              # rounded to tens
    (12.0, 7.0, "12"),
    (-0.04, 0.3, "0.0"),                                 # never "-0.0"
    (2.5, None, "2.5"), (2.123456, 0.0, "2.123"),        # rule 2: no Monte Carlo error
    (1.23456789, 1e-12, "1.23457"),                      # at most 6 significant digits
])
def test_numbers_are_rounded_by_their_monte_carlo_error(value, sd, shown):
    # Source: the rules written in planrunner/precision.py (common practice: quote a result to the
    # first significant digit of its uncertainty)
    assert precision.with_mc(value, sd) == shown


def test_p_values_follow_their_monte_carlo_error_and_are_never_zero():
    # Source: precision.py rule 4; s = sqrt(p(1-p)/m) from V-TOL
    assert precision.p_value(0.0486, math.sqrt(0.0486 * 0.9514 / 9999)) == "0.049"
    assert precision.p_value(0.0065, math.sqrt(0.0065 * 0.9935 / 9999)) == "0.0065"
    assert precision.p_value(1 / 10000, math.sqrt(1e-4 * (1 - 1e-4) / 9999)) == "0.0001"
    assert precision.p_value(0.004, 0.03) == "0.004"  # rounding would give 0: one significant digit
    assert precision.p_value(3184 / 11440, 0.0) == "0.2783"  # exact: 4 significant digits (V-CONV-P)
    assert precision.mc_sd(0.0021504107576560028) == "0.0022"


def test_adjusted_p_value_bound():
    # Source: precision.py rule 5 with identity 19 (BY = BH·Σ1/i)
    assert precision.adjusted_sd("holm", [0.001, 0.002]) == pytest.approx(0.004)
    assert precision.adjusted_sd("benjamini-yekutieli", [0.001, 0.002, None]) == pytest.approx(
        3 * (1 + 1 / 2 + 1 / 3) * 0.002)
    assert precision.adjusted_sd("holm", [0.0, 0.0]) is None


# --- Monte Carlo bands of interval ends (planrunner/mcerror.py) ---------------------------------

def test_quantile_band_sd_and_coverage_match_the_normal_reference():
    """Against V-TOL: s.d. of a quantile endpoint = sqrt(q(1-q)/B) / f(x_q), with f, x_q
    the standard normal density and quantile (scipy reference); 400 independent runs."""
    q, b, runs = 0.025, 2000, 400
    ideal = stats.norm.ppf(q)  # scipy reference
    sd_formula = math.sqrt(q * (1 - q) / b) / stats.norm.pdf(ideal)  # scipy reference
    rng = np.random.default_rng(20261201)
    ends, sds, covered = [], [], 0
    for _ in range(runs):
        ordered = np.sort(rng.standard_normal(b))
        low, high, sd = quantile_band(ordered, q)
        ends.append(ordered[math.ceil(q * b) - 1])
        sds.append(sd)
        covered += low <= ideal <= high
    # the empirical s.d. of the endpoint over the runs: relative s.d. about 1/sqrt(2(runs-1)); 4 of them
    assert abs(np.std(ends, ddof=1) - sd_formula) <= 4 * sd_formula / math.sqrt(2 * (runs - 1))
    # the mean of the estimated s.d.: 4 standard errors of that mean
    assert abs(np.mean(sds) - sd_formula) <= 4 * np.std(sds, ddof=1) / math.sqrt(runs)
    # coverage of the band about 95%: 4 binomial s.d. (the rank rounding only widens it)
    assert abs(covered / runs - 0.95) <= 4 * math.sqrt(0.95 * 0.05 / runs)


def test_one_band_rule_for_every_interval_end_and_both_record_fields():
    values = np.arange(1.0, 1001.0)  # replicate values 1..1000: the quantile of rank k is k
    t = np.arange(1.0, 1001.0) / 100.0  # studentized replicates 0.01..10
    summary = Summary(estimate=500.0, ordered=values, cumulative=None, confidence=0.95, standard_error=2.0,
                      bias=0.0, standard_error_sd=0.1, bias_sd=0.05, t_ordered=t, se_hat=3.0)
    made = {name: INTERVAL_METHODS[name](summary) for name in ("percentile", "basic", "normal", "studentized")}
    bands = {b["method"]: b for b in interval_bands(list(made.values()))}
    step = math.ceil(1.959963984540054 * math.sqrt(1000 * 0.025 * 0.975))  # identity: ranks k ± step
    s = math.sqrt(1000 * 0.025 * 0.975)  # identity: unit spacing gives sd = s exactly
    assert bands["percentile"]["lower_band"] == [25.0 - step, 25.0 + step]
    assert bands["percentile"]["upper_band"] == [975.0 - step, 975.0 + step]
    assert bands["percentile"]["lower_sd"] == pytest.approx(s)
    assert bands["basic"]["lower_band"] == [25.0 - step, 25.0 + step]  # 2·500 − (975 ± step)
    assert bands["basic"]["upper_sd"] == bands["percentile"]["lower_sd"]
    # studentized: end θ̂ − ŝe·t, so the t band maps by ŝe (the end at t = 9.75 is 500 − 29.25)
    expected = [500 - 3 * (9.75 + step / 100), 500 - 3 * (9.75 - step / 100)]
    assert bands["studentized"]["lower_band"] == pytest.approx(expected)
    assert bands["studentized"]["lower_sd"] == pytest.approx(3 * s / 100)
    # normal: sd = sqrt(sd_bias² + z²·sd_se²) (delta method), band ± 1.96 sd
    z = 1.959963984540054
    assert bands["normal"]["upper_sd"] == pytest.approx(math.sqrt(0.05 ** 2 + (z * 0.1) ** 2))
    for name, interval in made.items():  # the record's two fields are one computation
        band = bands[name]
        assert interval.monte_carlo == (tuple(band["lower_band"]), tuple(band["upper_band"])), name
        assert band["lower_band"][0] <= interval.lower <= band["lower_band"][1], name
        assert band["upper_band"][0] <= interval.upper <= band["upper_band"][1], name


def test_demo_record_keeps_bands_that_hold_each_end(demo):
    primary = demo.record["analyses"][0]
    bands = primary["monte_carlo"]["intervals"]
    assert [b["method"] for b in bands] == [i["method"] for i in primary["intervals"]]
    for interval, band in zip(primary["intervals"], bands):
        for end in ("lower", "upper"):
            low, high = band[f"{end}_band"]
            assert low <= interval[end] <= high and band[f"{end}_sd"] >= 0
    assert "order-statistic" in primary["monte_carlo"]["interval_rule"]


# --- pictures -----------------------------------------------------------------------------------

def test_null_plot_shades_the_tail_that_makes_the_p_value(demo):
    by_id = {a["id"]: a for a in demo.record["analyses"]}
    assert plots.tail_side(by_id["mean-shift-test"]) == "less"  # alternative: less
    rate = by_id["excursion-rate-test"]  # two-sided, doubled: the smaller tail is the lower one
    # exact counts past 2**53 are written as their decimal digits
    assert int(rate["details"]["count_less_equal"]) < int(rate["details"]["count_greater_equal"])
    assert plots.tail_side(rate) == "less"
    [plot] = plots.plots_for(rate, precision.significant, precision.p_value)
    # an exact DP null: its counts are beyond any integer type and are printed in powers of ten
    below = precision.count(rate["details"]["count_less_equal"])
    assert "× 10^" in below
    assert f"the {below} values at or below the observed value, doubled" in plot.alt
    assert f"(p = {precision.p_value(rate['p_value'])})" in plot.alt
    flipped = copy.deepcopy(by_id["mean-shift-test"])
    flipped["alternative"] = "greater"
    assert plots.tail_side(flipped) == "greater"
    assert plots.plots_for(flipped, precision.significant, precision.p_value)[0].svg != plots.plots_for(
        by_id["mean-shift-test"], precision.significant, precision.p_value)[0].svg


def test_no_picture_without_a_finite_distribution(demo):
    entry = copy.deepcopy(demo.record["analyses"][0])
    entry["distribution"]["histogram"] = {"edges": [], "counts": []}
    assert plots.plots_for(entry, precision.significant, precision.p_value) == []
    record = copy.deepcopy(demo.record)
    record["analyses"][0] = entry
    assert "figures/primary-resampling.svg" not in report.render_all(record)


def test_ci_installs_chromium_before_the_readme_test_command():
    lines = (ROOT / ".ci" / "run").read_text(encoding="utf-8").splitlines()
    install = next(i for i, line in enumerate(lines) if "apt-get install" in line and "chromium" in line)
    tests = next(i for i, line in enumerate(lines) if line.startswith("python3 -m venv .venv"))
    assert install < tests


def test_unit_only_on_statistics_measured_in_it(demo):
    by_id = {a["id"]: a for a in demo.record["analyses"]}
    assert plots.axis_label(by_id["mean-shift-test"]) == "difference in means (minutes)"
    correlation = dict(by_id["mean-shift-test"], statistic="correlation", statistic_label="Pearson correlation")
    assert plots.axis_label(correlation) == "Pearson correlation"  # a correlation has no unit
    proportion = dict(by_id["mean-shift-test"], statistic="proportion", statistic_label="proportion of 1s")
    assert plots.axis_label(proportion) == "proportion of 1s"


def test_markdown_renders_without_live_html_links_or_images(demo):
    """Through a CommonMark parser with GFM tables (markdown-it-py), as a code-review page would."""
    markdown_it = pytest.importorskip("markdown_it")
    record = hostile_record(demo)
    html = markdown_it.MarkdownIt("commonmark", {"html": True}).enable("table").render(report.render(record, "md"))
    assert "<script" not in html and "<b>" not in html  # raw HTML in the source would pass through here
    assert "&lt;script&gt;alert" in html
    links = re.findall(r'<a href="([^"]*)"', html)
    assert links == []
    images = re.findall(r'<img src="([^"]*)"', html)
    assert images == [f"figures/{a['id']}-{kind}.svg" for a, kind in zip(
        record["analyses"], ("resampling", "null", "null", "pseudo-values"))]
    summary = html[html.index("Results at a glance"):]
    summary = summary[:summary.index("</table>")]
    assert summary.count("<tr>") == 1 + len(record["analyses"])
    assert all(row.count("<td") == 8 for row in summary.split("<tr>")[2:])  # with the Decision column


def test_bands_and_figures_do_not_depend_on_order_other_analyses_or_batch_size(write_plan, tmp_path, monkeypatch):
    import test_reproducibility as repro  # the same small plan as the numbers' own invariance tests

    def run(order, name):
        plan = write_plan(repro.HEADER + "".join(repro.ANALYSES[k] for k in order),
                          {"mice.csv": repro.csv_of_groups("days", {"treatment": repro.TREATMENT,
                                                                    "control": repro.CONTROL})},
                          name=f"{name}.yaml")
        outcome = run_plan(plan, out=tmp_path / f"out-{name}", clock=fixed_clock)
        entries = {a["id"]: a for a in outcome.record["analyses"]}
        figures = {p.name: p.read_bytes() for p in (outcome.folder / "figures").iterdir()}
        return entries, figures

    a, figures_a = run(["boot", "perm"], "a")
    b, figures_b = run(["perm", "extra", "boot"], "b")
    import planrunner.execute.executors as execute
    import planrunner.execute.permutation as permrun

    real_bootstrap, real_permutation = execute.bootstrap, permrun.permutation_test
    monkeypatch.setattr(execute, "bootstrap", lambda *x, **k: real_bootstrap(*x, batch_elements=17, **k))
    monkeypatch.setattr(permrun, "permutation_test", lambda *x, **k: real_permutation(*x, batch_elements=17, **k))
    c, figures_c = run(["boot", "perm"], "c")
    assert a["boot"]["monte_carlo"]["intervals"][0]["lower_band"] is not None
    for other, figures in ((b, figures_b), (c, figures_c)):
        assert other["boot"]["monte_carlo"] == a["boot"]["monte_carlo"]
        for name in ("boot-resampling.svg", "perm-null.svg"):
            assert figures[name] == figures_a[name], name


def test_counts_are_written_as_people_read_them():
    assert precision.count(11440) == "11,440"  # identity 18: C(16, 7) mouse splits
    assert precision.count(11440.0) == "11,440"
    assert precision.count(3.1610932081300164e66) == "3.16 × 10^66"
    # an exact count of any size, as an integer or a string of digits: C(230, 115) ≈ 9.07e67 (math.comb)
    assert precision.count(math.comb(230, 115)) == "9.07 × 10^67" == precision.count(str(math.comb(230, 115)))
    assert precision.count(10**400) == "1.00 × 10^400"  # past the float range: no overflow
    assert precision.count(None) == "—"
