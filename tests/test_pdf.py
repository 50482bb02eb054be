"""`planrunner pdf RUN` and `run --pdf`: the report printed by headless Chromium, every section in
the PDF's text, the run id and page numbers in each footer, A4 and Letter; one message without a
browser."""

from __future__ import annotations

import io
import shutil
from pathlib import Path

import pytest
from conftest import fixed_clock

from planrunner.cli.main import main
from planrunner.pipeline.run import run_plan
from planrunner.report import pdf

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "plans" / "liner-trial" / "plan.yaml"
ARTIFACTS = ROOT / "test-artifacts"
SECTIONS = ["Results at a glance", "Analyses", "Families of tests", "Methods paragraph",
            "Where these numbers came from", "How the digits were chosen"]
# Source: ISO 216 (A4 is 210 × 297 mm) and ANSI/ASME Y14.1 (Letter is 8.5 × 11 in), in points of 1/72 in
PAPER_POINTS = {"A4": (210 / 25.4 * 72, 297 / 25.4 * 72), "Letter": (612.0, 792.0)}


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_plan(DEMO, out=tmp_path_factory.mktemp("runs"), operator="tester", clock=fixed_clock)


def have_browser() -> bool:
    try:
        pdf.find_browser()
    except Exception:
        return False
    return True


needs_browser = pytest.mark.skipif(not have_browser(), reason="no Chromium or Chrome here (see test_report_browser)")


@needs_browser
@pytest.mark.parametrize("paper", ["A4", "Letter"])
def test_every_section_is_in_the_pdf_with_run_id_and_page_numbers(demo, paper, capsys, tmp_path):
    pypdf = pytest.importorskip("pypdf")
    out = tmp_path / f"demo-{paper}.pdf"
    assert main(["pdf", str(demo.folder), "--paper", paper, "--out", str(out)]) == 0
    assert f"PDF written to {out}" in capsys.readouterr().out
    reader = pypdf.PdfReader(io.BytesIO(out.read_bytes()))
    pages = [page.extract_text() for page in reader.pages]
    text = "\n".join(pages)
    for heading in SECTIONS + [a["id"] for a in demo.record["analyses"]]:
        assert heading in text, heading
    for number, page_text in enumerate(pages, start=1):
        assert f"planrunner run {demo.record['run_id']}" in page_text
        assert f"page {number} of {len(pages)}" in page_text
    width, height = PAPER_POINTS[paper]
    for page in reader.pages:
        assert float(page.mediabox.width) == pytest.approx(width, abs=1.0)
        assert float(page.mediabox.height) == pytest.approx(height, abs=1.0)
    ARTIFACTS.mkdir(exist_ok=True)
    shutil.copyfile(out, ARTIFACTS / f"report-demo-cli-{paper}.pdf")
    # never over an existing file
    assert main(["pdf", str(demo.folder), "--paper", paper, "--out", str(out)]) == 2
    assert "never overwrites" in capsys.readouterr().err


@needs_browser
def test_run_with_pdf_writes_it_in_the_run_folder(write_plan, tmp_path, capsys):
    plan = write_plan("""
        plan: tiny
        title: tiny
        seed: 1
        datasets:
          d: {file: d.csv, columns: {g: {type: category, levels: [a, b]}, y: {type: number}}}
        analyses:
          - id: diff
            data: d
            outcome: y
            groups: {by: g, compare: [a, b]}
            statistic: mean_difference
            method: permutation
            resamples: 99
        """, {"d.csv": "g,y\na,1\na,2\na,4\nb,3\nb,5\nb,6\n"})
    assert main(["run", str(plan), "--out", str(tmp_path / "runs"), "--pdf", "--paper", "Letter"]) == 0
    out = capsys.readouterr().out
    [folder] = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    assert f"PDF written to {folder / 'report-Letter.pdf'}" in out
    assert (folder / "report-Letter.pdf").read_bytes()[:5] == b"%PDF-"


def test_without_a_browser_one_message_says_how_to_get_one(demo, write_plan, tmp_path, capsys, monkeypatch):
    monkeypatch.delenv(pdf.ENVIRONMENT_VARIABLE, raising=False)
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    monkeypatch.setattr(pdf, "CANDIDATES", tuple(n for n in pdf.CANDIDATES if "/" not in n))
    assert main(["pdf", str(demo.folder)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no Chromium or Chrome was found" in err[0] and "apt-get install chromium" in err[0]
    assert pdf.ENVIRONMENT_VARIABLE in err[0]
    # run --pdf says so before computing: no run folder is written
    runs = tmp_path / "runs"
    assert main(["run", str(DEMO), "--out", str(runs), "--pdf"]) == 2
    assert "no Chromium or Chrome was found" in capsys.readouterr().err and not runs.exists()
    monkeypatch.setenv(pdf.ENVIRONMENT_VARIABLE, str(tmp_path / "no-such-browser"))
    assert main(["pdf", str(demo.folder)]) == 2
    assert "PLANRUNNER_CHROMIUM names no executable file" in capsys.readouterr().err


def test_the_footer_shows_the_run_id_as_text():
    footer = pdf.footer('<script>x</script>')
    assert "<script>" not in footer and "&lt;script&gt;x&lt;/script&gt;" in footer
    assert '<span class="pageNumber"></span> of <span class="totalPages"></span>' in footer
