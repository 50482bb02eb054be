"""Page layout: hashes and spawn keys in the provenance section, the comparison of two runs as a
template with the report's look."""

from __future__ import annotations

import copy
import re
from pathlib import Path

import pytest
from conftest import fixed_clock

from planrunner.pipeline.run import run_plan
from planrunner.report import compare
from planrunner.report import render as report

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


def section(html: str, anchor: str) -> str:
    start = html.index(f'<section id="{anchor}">')
    return html[start:html.index("</section>", start)]


@pytest.mark.parametrize("kind", ["html", "md"])
def test_spawn_keys_and_distribution_hashes_sit_in_the_provenance_section_only(demo, kind):
    text = report.render(demo.record, kind)
    if kind == "html":
        analyses, provenance = section(text, "analyses"), section(text, "provenance")
    else:
        analyses = text[text.index("## Analyses"):text.index("## Where these numbers came from")]
        provenance = text[text.index("## Where these numbers came from"):]
    for entry in demo.record["analyses"]:
        key = ", ".join(str(k) for k in entry["stream"]["spawn_key"])
        assert key not in analyses and entry["distribution"]["sha256"] not in analyses
        assert key in provenance and entry["distribution"]["sha256"] in provenance


def test_summary_intervals_are_kept_on_one_line_each(demo):
    html = report.render(demo.record, "html")
    summary = section(html, "summary")
    spans = re.findall(r'<span class="nowrap">(percentile|BCa) 95%: [^<]+</span>', summary)
    assert spans == ["percentile", "BCa"]
    assert "max-width: 80rem" in html


def test_comparison_page_is_the_report_look_escaped_and_self_contained(demo):
    other = copy.deepcopy(demo.record)
    other["operator"] = '<script>alert(1)</script>'
    other["analyses"][0]["estimate"] = -6.5
    page = compare.render_html(compare.compare_records(demo.record, other))
    assert "<script>" not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "Content-Security-Policy" in page and "--accent: #0072b2" in page  # the report's style sheet
    assert re.search(r'<th scope="row">primary</th><td>both</td><td class="n">-7.1</td><td class="n">-6.5</td>'
                     r'<td class="n">\+0\.6</td>', page)
    assert "<th scope=\"row\">primary</th><td>BCa</td>" in page
    assert "http" not in page.split("<body>")[1]
