"""The demo report in a real browser: headless Chromium over the DevTools protocol.

Checks: the page loads with no console error or warning and no network request besides the file
itself, every analysis section and every plot is there and drawn, nothing overflows the printable
width of A4 or Letter in print layout, and a title with `<script>` is shown as text. A full-page
screenshot and the two PDFs are saved under test-artifacts/.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path

import pytest
from chromium_cdp import Browser, find_chromium
from conftest import fixed_clock

from planrunner.pipeline.run import run_plan
from planrunner.report import render as report

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"
ARTIFACTS = ROOT / "test-artifacts"

SKIP_MESSAGE = ("Chromium is not installed here (looked for chromium, chromium-browser, google-chrome and "
                "$PLANRUNNER_CHROMIUM); .ci/run installs Debian's 'chromium' package with apt-get, and the "
                "browser checks of the report run wherever that install succeeds")

PAGE_FACTS = """(() => {
  const svgFacts = (s) => { const r = s.getBoundingClientRect(); const t = s.querySelector('title');
    return {width: r.width, height: r.height, title: t ? t.textContent : '',
            marks: s.querySelectorAll('path').length}; };
  return {
    title: document.title,
    sections: [...document.querySelectorAll('body > section')].map(s => s.id),
    articles: [...document.querySelectorAll('article.analysis')].map(a => ({
      id: a.id, heading: a.querySelector('h3').textContent,
      plots: [...a.querySelectorAll('figure svg[role=img]')].map(svgFacts),
      captions: a.querySelectorAll('figure figcaption').length})),
    summaryRows: document.querySelectorAll('#summary tbody tr').length,
    scripts: document.scripts.length, images: document.images.length,
  };
})()"""

OVERFLOW = """(() => {
  const w = document.documentElement.clientWidth;
  return {page: document.documentElement.scrollWidth - w,
          wide: [...document.querySelectorAll('table, figure, pre, p, dl')]
                  .filter(e => e.getBoundingClientRect().right > w + 1).map(e => e.outerHTML.slice(0, 80))};
})()"""


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


@pytest.fixture(scope="module")
def browser():
    binary = find_chromium()
    if binary is None:
        pytest.skip(SKIP_MESSAGE)
    pytest.importorskip("websocket", reason="websocket-client (a test dependency) is needed to drive Chromium")
    session = Browser(binary)
    yield session
    session.close()


def test_demo_report_loads_cleanly_with_every_section_and_plot(demo, browser):
    page = demo.folder / "report.html"
    browser.open(page.as_uri())
    assert browser.problems() == []
    assert [url for url in browser.requests() if url != page.as_uri()] == []
    facts = browser.evaluate(PAGE_FACTS)
    ids = [a["id"] for a in demo.record["analyses"]]
    assert [a["id"] for a in facts["articles"]] == [f"a-{i}" for i in ids]
    assert facts["summaryRows"] == len(ids)
    assert facts["sections"] == ["summary", "estimands", "analyses", "families", "methods", "provenance", "digits"]
    assert facts["scripts"] == 0 and facts["images"] == 0
    for article, entry in zip(facts["articles"], demo.record["analyses"]):
        assert entry["id"] in article["heading"]
        assert len(article["plots"]) == 1 and article["captions"] == 1, article
        plot = article["plots"][0]
        assert plot["width"] > 300 and plot["height"] > 100, plot  # drawn, not collapsed
        assert plot["marks"] > 10 and len(plot["title"]) > 40, plot  # bars and axes; a text alternative
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "report-demo.png"
    browser.screenshot(shot)
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


# printable width at 96 px per inch: paper width less the 12 mm side margins of the print style sheet
@pytest.mark.parametrize("paper, width_mm, size_in", [("A4", 210.0, (8.27, 11.69)), ("Letter", 215.9, (8.5, 11.0))])
def test_demo_report_fits_the_page_when_printed(demo, browser, paper, width_mm, size_in):
    browser.open((demo.folder / "report.html").as_uri())
    width_px = int((width_mm - 24.0) / 25.4 * 96)
    browser.call("Emulation.setEmulatedMedia", media="print")
    browser.call("Emulation.setDeviceMetricsOverride", width=width_px, height=1000, deviceScaleFactor=1, mobile=False)
    try:
        overflow = browser.evaluate(OVERFLOW)
        assert overflow["page"] <= 0 and overflow["wide"] == [], overflow
        assert browser.evaluate("getComputedStyle(document.querySelector('nav')).display") == "none"
        pdf = browser.pdf(*size_in)
    finally:
        browser.call("Emulation.setEmulatedMedia", media="")
        browser.call("Emulation.clearDeviceMetricsOverride")
    assert pdf[:5] == b"%PDF-"
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / f"report-demo-{paper}.pdf").write_bytes(pdf)
    assert browser.problems() == []


def test_script_in_a_title_is_shown_as_text(demo, browser, tmp_path):
    record = copy.deepcopy(demo.record)
    hostile = '<script>document.title = "run"</script><img src="http://127.0.0.1:9/x.png">'
    record["analyses"][0]["title"] = hostile
    page = tmp_path / "report.html"
    page.write_text(report.render(record, "html"), encoding="utf-8")
    browser.open(page.as_uri())
    facts = browser.evaluate(PAGE_FACTS)
    assert facts["scripts"] == 0 and facts["images"] == 0
    assert hostile in facts["articles"][0]["heading"]
    assert facts["title"] != "run"  # the script never ran
    assert [url for url in browser.requests() if url != page.as_uri()] == []
    assert browser.problems() == []


def test_a_long_unbroken_level_still_fits_the_printed_page(demo, browser, tmp_path):
    # a level of 60 characters without a space once widened the tables beyond A4's printable width
    long_level = "polyurethane" + "x" * 48
    record = json.loads(json.dumps(demo.record).replace("foam", long_level))
    page = tmp_path / "report.html"
    page.write_text(report.render(record, "html"), encoding="utf-8")
    browser.open(page.as_uri())
    width_px = int((210.0 - 24.0) / 25.4 * 96)  # A4 less the print style sheet's 12 mm margins
    browser.call("Emulation.setEmulatedMedia", media="print")
    browser.call("Emulation.setDeviceMetricsOverride", width=width_px, height=1000, deviceScaleFactor=1, mobile=False)
    try:
        assert long_level in browser.evaluate("document.body.textContent")
        overflow = browser.evaluate(OVERFLOW)
        assert overflow["page"] <= 0 and overflow["wide"] == [], overflow
    finally:
        browser.call("Emulation.setEmulatedMedia", media="")
        browser.call("Emulation.clearDeviceMetricsOverride")


# --- the other pages: the comparison of two runs and the index of a plan's runs ---------------------

def check_page(browser, page: Path, artefact: str) -> dict:
    """What every page planrunner writes must pass in the browser: no console message, no request
    besides the file, nothing wider than the screen or than A4's printable width, every picture
    drawn; the full-page screenshot is saved as a test artefact."""
    browser.open(page.as_uri())
    assert browser.problems() == []
    assert [url for url in browser.requests() if url != page.as_uri()] == []
    pictures = browser.evaluate("""[...document.querySelectorAll('svg')].map(s => {
        const r = s.getBoundingClientRect(); return {width: r.width, height: r.height,
        marks: s.querySelectorAll('path, line, polyline, circle, rect').length,
        title: (s.querySelector('title') || {}).textContent || ''}; })""")
    for picture in pictures:
        assert picture["width"] > 200 and picture["height"] > 80 and picture["marks"] > 5, picture
        assert len(picture["title"]) > 20, picture
    assert browser.evaluate("document.scripts.length + document.images.length") == 0
    for media, width in (("screen", 1100), ("print", int((210.0 - 24.0) / 25.4 * 96))):
        browser.call("Emulation.setEmulatedMedia", media=media)
        browser.call("Emulation.setDeviceMetricsOverride", width=width, height=1000, deviceScaleFactor=1, mobile=False)
        try:
            overflow = browser.evaluate(OVERFLOW)
            assert overflow["page"] <= 0 and overflow["wide"] == [], (media, overflow)
        finally:
            browser.call("Emulation.setEmulatedMedia", media="")
            browser.call("Emulation.clearDeviceMetricsOverride")
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / artefact
    browser.screenshot(shot)
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    return {"pictures": pictures}


def test_index_page_loads_cleanly_and_fits(browser, tmp_path):
    import shutil

    from planrunner.cli.main import main

    folder = tmp_path / "monthly-fill"
    shutil.copytree(ROOT / "plans" / "monthly-fill", folder, ignore=shutil.ignore_patterns("runs"))
    for month in ("2026-10", "2026-11"):
        assert main(["run", str(folder / "plan.yaml"), "--quiet", "--param", f"month={month}",
                     "--reason", f"<i>{month}</i> extract"]) == 0
    facts = check_page(browser, folder / "runs" / "index.html", "index-demo.png")
    assert len(facts["pictures"]) == 4  # one per analysis of the monthly demo, each drawn
    assert browser.evaluate("document.querySelectorAll('#runs tbody tr').length") == 2
    assert "<i>2026-10</i> extract" in browser.evaluate("document.body.textContent")


def test_comparison_page_loads_cleanly_and_fits(demo, browser, tmp_path):
    from planrunner.report import compare

    other = copy.deepcopy(demo.record)
    other["run_id"], other["operator"] = "b" * 16, "<b>second</b> operator"
    other["analyses"][0]["estimate"] = -6.5
    page = tmp_path / "comparison.html"
    page.write_text(compare.render_html(compare.compare_records(demo.record, other)), encoding="utf-8")
    check_page(browser, page, "comparison-demo.png")
    assert "<b>second</b> operator" in browser.evaluate("document.body.textContent")
