"""The index page beside the run folders: rewritten after each run from the history and the records
alone, every run in order with its facts, each analysis across runs, changed plans or locks flagged;
`planrunner history --html/--markdown` writes the same view."""

from __future__ import annotations

import json
import re
import shutil
from pathlib import Path

import pytest
from conftest import two_group_plan

from planrunner.cli.main import main
from planrunner.trail.index import INDEX_FILE, gather_runs, render_index_of

ROOT = Path(__file__).resolve().parent.parent
MONTHLY = ROOT / "plans" / "monthly-fill"


@pytest.fixture(scope="module")
def months(tmp_path_factory):
    """Three runs of the monthly plan: October, November, then November again after the plan was
    locked and its resamples changed (a deviation), with a hostile reason."""
    folder = tmp_path_factory.mktemp("monthly") / "monthly-fill"
    shutil.copytree(MONTHLY, folder, ignore=shutil.ignore_patterns("runs"))
    plan = folder / "plan.yaml"
    runs = folder / "runs"
    assert main(["run", str(plan), "--quiet", "--param", "month=2026-10", "--reason", "October extract",
                 "--operator", "ana"]) == 0
    assert main(["run", str(plan), "--quiet", "--param", "month=2026-11", "--reason", "November extract",
                 "--operator", "ben"]) == 0
    assert main(["lock", str(plan), "--param", "month=2026-11", "--operator", "ana"]) == 0
    plan.write_text(plan.read_text(encoding="utf-8").replace("resamples: 4999", "resamples: 2999"), encoding="utf-8")
    assert main(["run", str(plan), "--quiet", "--param", "month=2026-11", "--reason",
                 "<script>alert(1)</script> rerun", "--operator", "ben"]) == 0
    return runs


def records(runs: Path) -> list[dict]:
    entries = [json.loads(line) for line in (runs / "history.jsonl").read_text(encoding="utf-8").splitlines()]
    return [json.loads((runs / e["folder"] / "record.json").read_text(encoding="utf-8")) for e in entries]


def test_each_run_rewrites_the_index_with_every_run_in_order(months, capsys):
    page = (months / INDEX_FILE).read_text(encoding="utf-8")
    recs = records(months)
    assert len(recs) == 3
    positions = [page.index(r["run_id"][:8]) for r in recs]
    assert positions == sorted(positions)
    for r in recs:
        assert r["datasets"][0]["sha256"][:12] in page and r["plan"]["sha256"][:12] in page
    for text in ("October extract", "November extract", "month=2026-10", "month=2026-11", "ana", "ben",
                 "no lock", "1 deviation(s)", "defaults.resamples", "plan and lock changed since the run before"):
        assert text in page, text
    assert "<script>alert(1)</script>" not in page and "&lt;script&gt;alert(1)&lt;/script&gt; rerun" in page
    assert 'http-equiv="Content-Security-Policy"' in page and "<script" not in page.split("<body>")[1]
    # one trend per analysis of the monthly demo (four since its equivalence and action-level analyses)
    assert page.count('<section id="t-') == 4 and page.count('role="img"') == 4
    # no staging file left beside it
    assert [p.name for p in months.iterdir() if p.name.startswith(".") and p.name.endswith(".tmp")] == []


def test_the_numbers_across_runs_are_the_records_own(months):
    runs, _ = gather_runs(months)
    recs = records(months)
    assert [r["changed"] for r in runs] == [False, False, True] and runs[2]["changes"] == ["plan", "lock"]
    md = render_index_of(months, "md")
    from planrunner.report.digits import significant
    for rec in recs:
        head = next(a for a in rec["analyses"] if a["id"] == "head-difference")
        first = head["intervals"][0]  # the pre-specified interval is the first one the plan lists
        assert first["method"] == "percentile"
        assert (f"{significant(head['estimate'])} | percentile 95%: {significant(first['lower'])} to "
                f"{significant(first['upper'])}") in md
    html = render_index_of(months, "html")
    alt = re.search(r"<figcaption>(head-test across 3 run\(s\).*?)</figcaption>", html).group(1)
    assert "p-value on a log scale" in alt and "(plan or lock changed)" in alt


def test_the_index_is_byte_stable_and_a_view_of_the_log_alone(months, tmp_path):
    first, second = render_index_of(months, "html"), render_index_of(months, "html")
    assert first == second
    copy = tmp_path / "copy"
    shutil.copytree(months, copy)
    folder = next(p for p in copy.iterdir() if p.is_dir() and (p / "record.json").is_file())
    data = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    data["operator"] = "someone else"
    (folder / "record.json").write_text(json.dumps(data), encoding="utf-8")
    assert "the record is not the one logged" in render_index_of(copy, "html")


def test_history_writes_the_same_view_as_html_and_markdown(months, tmp_path, capsys):
    html, md = tmp_path / "index.html", tmp_path / "index.md"
    assert main(["history", str(months), "--html", str(html), "--markdown", str(md)]) == 0
    out = capsys.readouterr().out
    assert f"index of the runs (HTML) written to {html}" in out and f"(Markdown) written to {md}" in out
    assert html.read_text(encoding="utf-8") == render_index_of(months, "html")
    text = md.read_text(encoding="utf-8")
    assert text.startswith("# Runs of plan `monthly-fill`") and "\\<script" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt; rerun" in text  # inert in Markdown
    assert main(["history", str(months), "--html", str(html)]) == 2  # never over an existing file
    assert "never overwrites" in capsys.readouterr().err


def test_a_run_is_complete_even_when_the_index_cannot_be_written(tmp_path, capsys):
    folder = tmp_path / "monthly-fill"
    shutil.copytree(MONTHLY, folder, ignore=shutil.ignore_patterns("runs"))
    (folder / "runs" / INDEX_FILE).mkdir(parents=True)  # a folder where the page should go
    (folder / "runs" / INDEX_FILE / "keep").write_text("x", encoding="utf-8")
    assert main(["run", str(folder / "plan.yaml"), "--param", "month=2026-10"]) == 0
    out = capsys.readouterr().out
    assert "index of the runs NOT updated" in out and "cannot write the index page" in out
    assert main(["history", str(folder / "runs")]) == 0  # the run and its history entry are whole
    capsys.readouterr()
    shutil.rmtree(folder / "runs" / INDEX_FILE)
    (folder / "runs" / INDEX_FILE).write_text("an old page", encoding="utf-8")
    assert main(["run", str(folder / "plan.yaml"), "--param", "month=2026-10", "--quiet"]) == 0
    page = (folder / "runs" / INDEX_FILE).read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>") and page.count("<tr>\n<td class=\"n\">") == 2  # replaced, both runs


# --- the last verify of each run, from the verify log beside the history ------------------------------



def test_the_index_shows_each_runs_last_verify_from_a_hash_chained_log(write_plan, tmp_path, capsys):
    from planrunner.record.canonical import self_hash
    from planrunner.trail.history import ENTRY_HASH_FIELD, GENESIS, VERIFY_FILE

    plan = write_plan(*two_group_plan("permutation", 199))
    runs = tmp_path / "runs"
    for reason in ("first", "second"):
        assert main(["run", str(plan), "--quiet", "--reason", reason]) == 0
    first, second = (runs / e["folder"] for e in map(json.loads, (runs / "history.jsonl").read_text().splitlines()))
    page = (runs / INDEX_FILE).read_text(encoding="utf-8")
    assert page.count("not verified") == 2  # no verify yet: said, never left blank
    capsys.readouterr()

    assert main(["verify", str(first), "--operator", "Ana Lima"]) == 0
    out = capsys.readouterr().out
    assert f"verify result logged: entry 1 of {runs / VERIFY_FILE}" in out and f"index of the runs: {runs}" in out
    text = plan.read_text(encoding="utf-8")
    plan.write_text(text + "# edited after the runs\n", encoding="utf-8")  # the plan is no longer the recorded one
    assert main(["verify", str(second)]) == 3
    plan.write_text(text, encoding="utf-8")
    entries = [json.loads(line) for line in (runs / VERIFY_FILE).read_text(encoding="utf-8").splitlines()]
    head = entries[0]
    assert (head["seq"], head["folder"], head["passed"], head["operator"]) == (1, first.name, True, "Ana Lima")
    assert entries[0]["summary"] == "identical" and entries[0]["comparison"] == "same environment"
    assert entries[1]["passed"] is False and entries[1]["problems"] == ["plan.sha256"]
    # chained as the run history is: each entry's hash over its content, linked to the one before
    assert [e["previous_sha256"] for e in entries] == [GENESIS, entries[0][ENTRY_HASH_FIELD]]
    assert all(e[ENTRY_HASH_FIELD] == self_hash(e, ENTRY_HASH_FIELD) for e in entries)

    runs_seen, _ = gather_runs(runs)
    assert [(r["verified"]["status"], r["verified"]["utc"]) for r in runs_seen] == [
        ("verified: PASSED", entries[0]["verified_utc"]), ("verified: FAILED", entries[1]["verified_utc"])]
    page = (runs / INDEX_FILE).read_text(encoding="utf-8")  # rewritten by the second verify
    assert page == render_index_of(runs, "html")
    assert "verified: PASSED" in page and "⚠ verified: FAILED" in page and "1 problem(s): plan.sha256" in page
    assert entries[0]["verified_utc"][:10] in page and "verified: PASSED" in render_index_of(runs, "md")
    assert main(["history", str(runs)]) == 0
    assert "verify log: 2 verify result(s)" in capsys.readouterr().out

    # a pass written over the failure without its hash: the history is broken and the index shows no pass
    forged = dict(entries[1], passed=True, summary="identical")
    (runs / VERIFY_FILE).write_text("\n".join(json.dumps(e) for e in (entries[0], forged)) + "\n", encoding="utf-8")
    assert main(["history", str(runs)]) == 3
    assert f"{VERIFY_FILE} line 2: the entry was changed after it was written" in capsys.readouterr().out
    assert [r["verified"]["status"] for r in gather_runs(runs)[0]] == [
        "verified: PASSED", "verify log changed: its result is not shown"]


def test_a_verify_of_a_record_no_history_logs_writes_nothing(write_plan, tmp_path, capsys):
    plan = write_plan(*two_group_plan("permutation", 199))
    assert main(["run", str(plan), "--quiet"]) == 0
    (folder,) = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    copy = tmp_path / "elsewhere" / folder.name
    shutil.copytree(folder, copy)
    capsys.readouterr()
    assert main(["verify", str(copy), "--plan", str(plan)]) == 0
    assert "verify result not logged: no run history beside the run folder logs this run" in capsys.readouterr().out
    assert sorted(p.name for p in (tmp_path / "elsewhere").iterdir()) == [folder.name]
    assert main(["verify", str(folder), "--operator", "a\u202eb"]) == 2  # refused before the re-run
    assert not (tmp_path / "runs" / "verifications.jsonl").exists()
