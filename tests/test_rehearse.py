"""`planrunner rehearse`: every demo plan end to end on dummy data made from its declarations alone
(only plan.yaml is copied: the real data are not there to be read), stamped as a rehearsal on every
page, re-run by verify, named by compare, refused where a real run is expected; and the dummy-data
rules checked against exact identities (counts per level, events, pairs, clusters)."""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
from collections import Counter
from pathlib import Path

import jsonschema
import numpy as np
import pytest

from planrunner.cli import main as cli
from planrunner.data.dummy import MARKER, ROWS_PER_CLUSTER, _balanced, dummy_data, stream_of
from planrunner.data.tables import read_table
from planrunner.errors import OutputError, PlanError
from planrunner.pipeline.check import load_plan
from planrunner.pipeline.rehearse import DUMMY_FOLDER, rehearse_plan
from planrunner.record.rehearsal import STAMP
from planrunner.record.schemas import record_schema
from planrunner.report.pdf import header
from tests.conftest import fixed_clock

ROOT = Path(__file__).resolve().parent.parent
DEMOS = sorted(p.parent.name for p in (ROOT / "plans").glob("*/plan.yaml"))
UNITS = 12  # small dummy datasets and 99 resamples keep the five rehearsals to seconds


def plan_only(source: Path, target: Path) -> Path:
    """A copy of a demo plan without its data folder, with 99 resamples wherever it states a number."""
    target.mkdir(parents=True)
    text = re.sub(r"resamples: \d+", "resamples: 99", (source / "plan.yaml").read_text(encoding="utf-8"))
    (target / "plan.yaml").write_text(text, encoding="utf-8")
    return target / "plan.yaml"


@pytest.fixture(scope="module")
def rehearsed(tmp_path_factory) -> dict[str, Path]:
    """Each demo plan rehearsed once through the command line: name -> rehearsal folder."""
    folders = {}
    for name in DEMOS:
        plan = plan_only(ROOT / "plans" / name, tmp_path_factory.mktemp("rehearse") / name)
        assert cli.main(["rehearse", str(plan), "--units", str(UNITS), "--quiet"]) == 0
        [folder] = (plan.parent / "rehearsals").iterdir()
        folders[name] = folder
    return folders


@pytest.mark.parametrize("name", DEMOS)
def test_every_demo_plan_rehearses_end_to_end_into_rehearsals_and_never_into_runs(rehearsed, name):
    folder = rehearsed[name]
    record = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    plan_folder = folder.parent.parent
    assert not (plan_folder / "runs").exists() and not (plan_folder / "data").exists()
    assert not list(folder.parent.glob("history*"))  # never appended to a run history
    jsonschema.Draft202012Validator(record_schema()).validate(record)
    assert record["rehearsal"]["stamp"] == STAMP and record["rehearsal"]["units"] == UNITS
    assert record["methods_text"].startswith(STAMP)
    loaded, _ = load_plan(plan_folder / "plan.yaml")
    assert record["rehearsal"]["seed"] == loaded.plan.seed  # the default seed is the plan's
    assert len(record["analyses"]) == len(loaded.plan.analyses)
    assert all(a["estimate"] is not None for a in record["analyses"])
    # the dummy files kept in the folder are the ones the record's datasets name (same bytes)
    for kept, used in zip(record["rehearsal"]["datasets"], record["datasets"]):
        path = folder / DUMMY_FOLDER / kept["file"]
        assert kept["sha256"] == used["sha256"]
        assert path.is_file() and __import__("hashlib").sha256(path.read_bytes()).hexdigest() == kept["sha256"]
    assert (folder / DUMMY_FOLDER / MARKER).read_text(encoding="utf-8").startswith(STAMP)


@pytest.mark.parametrize("name", DEMOS)
def test_the_stamp_is_on_every_page_and_every_results_row(rehearsed, name):
    folder = rehearsed[name]
    page = (folder / "report.html").read_text(encoding="utf-8")
    body = page[page.index("<body>"):]
    assert body.count(STAMP) >= 3  # the banner first, the print banner that repeats on each page, the last
    assert body.index(STAMP) < body.index("<h1>")
    assert re.search(r'class="rehearsal-page"[^>]*>' + re.escape(STAMP), page)
    assert "position: fixed" in page  # the print banner repeats on every printed page
    assert f"<title>{STAMP}" in page
    markdown = (folder / "report.md").read_text(encoding="utf-8")
    assert markdown.startswith(f"> **{STAMP}.**") and markdown.rstrip().splitlines()[-3] == f"**{STAMP}.**"
    rows = list(csv.DictReader(io.StringIO((folder / "results.csv").read_text(encoding="utf-8"))))
    assert rows and {r["rehearsal"] for r in rows} == {"true"}
    if (folder / "results.parquet").exists():
        import pyarrow.parquet as pq
        assert set(pq.read_table(folder / "results.parquet").column("rehearsal").to_pylist()) == {True}


def test_the_pdf_header_carries_the_stamp_on_every_page_and_a_run_has_none():
    assert STAMP in header(STAMP) and header(None) == "<span></span>"


def _browser() -> bool:
    from planrunner.report.pdf import find_browser
    try:
        find_browser()
    except OutputError:
        return False
    return True


@pytest.mark.skipif(not _browser(), reason="no Chromium or Chrome here (see test_report_browser)")
def test_every_page_of_a_rehearsals_pdf_carries_the_stamp(rehearsed, tmp_path):
    pypdf = pytest.importorskip("pypdf")
    out = tmp_path / "rehearsal.pdf"
    assert cli.main(["pdf", str(rehearsed["ward-hygiene"]), "--out", str(out)]) == 0
    pages = [page.extract_text() for page in pypdf.PdfReader(io.BytesIO(out.read_bytes())).pages]
    assert len(pages) > 1
    for page in pages:
        assert "REHEARSAL" in page and "dummy data, not a result" in page


@pytest.mark.parametrize("name", DEMOS)
def test_dummy_data_respect_the_declarations_and_balance_the_groups(rehearsed, name):
    folder = rehearsed[name]
    loaded, _ = load_plan(folder.parent.parent / "plan.yaml")
    for ds_name, spec in loaded.plan.datasets.items():
        # the reader of real data reads them: types, levels and ranges hold (it raises otherwise)
        table = read_table(ds_name, spec, loaded.folder, data_root=folder / DUMMY_FOLDER)
        rows = list(csv.DictReader(io.StringIO((folder / DUMMY_FOLDER / spec.file).read_text(encoding="utf-8"))))
        assert list(rows[0]) == list(spec.columns)
        for column, declared in spec.columns.items():
            values = [r[column] for r in rows]
            if declared.levels:
                assert set(values) <= set(declared.levels)
            if declared.type in ("number", "integer"):
                numbers = np.array(values, dtype=float)
                assert numbers.min() >= (declared.min if declared.min is not None else -np.inf)
                assert numbers.max() <= (declared.max if declared.max is not None else np.inf)
        # every row passes the plan's own filter: none is excluded
        assert table.rows_used == table.rows_read == len(rows)
        for a in (a for a in loaded.plan.analyses if a.data == ds_name and a.groups is not None):
            by, strata = a.groups.by, a.strata
            unit = a.clusters or a.pairs
            seen = {(r.get(unit, i), r.get(strata) if strata else None, r[by]) for i, r in enumerate(rows)}
            if a.pairs:  # a pair holds every level once
                assert Counter(r[a.pairs] for r in rows) == {u: 2 for u in {r[a.pairs] for r in rows}}
                continue
            cells = Counter((s, g) for _, s, g in seen)  # units per stratum and group
            overall = Counter(g for _, _, g in seen)
            assert max(overall.values()) - min(overall.values()) <= 1, (a.id, overall)
            for s in {s for _, s, _ in seen}:
                counts = [cells[(s, level)] for level in spec.columns[by].levels or a.groups.compare]
                assert max(counts) - min(counts) <= 1, (a.id, s, counts)


@pytest.mark.parametrize("name", DEMOS)
def test_verify_re_runs_a_rehearsal_bit_for_bit_and_says_it_is_never_a_result(rehearsed, name, capsys):
    assert cli.main(["verify", str(rehearsed[name])]) == 0
    out = capsys.readouterr().out
    assert out.splitlines()[1].startswith(f"*** {STAMP}")
    assert "every one equal bit for bit" in out
    assert "verify: PASSED (a rehearsal: never a valid result)" in out
    assert out.rstrip().endswith("it re-ran to the same numbers, which proves the pipeline, and it is never a "
                                 "valid result ***")


def test_verify_fails_when_a_kept_dummy_file_was_changed(rehearsed, capsys, tmp_path):
    folder = tmp_path / "copy"
    shutil.copytree(rehearsed["monthly-fill"].parent.parent, folder)
    [run] = (folder / "rehearsals").iterdir()
    [kept] = (run / DUMMY_FOLDER / "data").iterdir()
    kept.write_text(kept.read_text(encoding="utf-8").replace(",A,", ",B,", 1), encoding="utf-8")
    assert cli.main(["verify", str(run)]) == 3
    out = capsys.readouterr().out
    assert "is not the one the recorded seed makes (changed after the rehearsal)" in out and "verify: FAILED" in out


def test_verify_names_the_generator_when_an_older_one_made_the_dummy_files(rehearsed, capsys, tmp_path):
    # a rehearsal made before Parquet dummy files came from our own writer (dummy-data generator /1)
    # has other Parquet bytes from the same seed: verify says so instead of "changed after"
    folder = tmp_path / "copy"
    shutil.copytree(rehearsed["monthly-fill"].parent.parent, folder)
    [run] = (folder / "rehearsals").iterdir()
    [kept] = (run / DUMMY_FOLDER / "data").iterdir()
    kept.write_bytes(kept.read_bytes() + b"\n")
    record = json.loads((run / "record.json").read_text(encoding="utf-8"))
    record["rehearsal"]["generator"] = "planrunner.dummy/1"
    (run / "record.json").write_text(json.dumps(record), encoding="utf-8")
    assert cli.main(["verify", str(run)]) == 3
    out = capsys.readouterr().out
    assert ("made by dummy-data generator planrunner.dummy/1, this planrunner has planrunner.dummy/2: "
            "rehearse again") in out


def test_compare_names_the_rehearsal_first_and_last(rehearsed, capsys, tmp_path):
    one = rehearsed["monthly-fill"]
    html, markdown = tmp_path / "c.html", tmp_path / "c.md"
    assert cli.main(["compare", str(one), str(one), "--html", str(html), "--markdown", str(markdown)]) == 0
    out = capsys.readouterr().out
    assert out.startswith(f"*** {STAMP}: both records are rehearsals")
    assert f"*** {STAMP} ***" in out
    assert STAMP in markdown.read_text(encoding="utf-8").splitlines()[0]
    page = html.read_text(encoding="utf-8")
    assert page.count(STAMP) >= 3 and page.index(STAMP) < page.index("<h1>")


def test_compare_of_a_run_with_a_rehearsal_names_the_rehearsal_side(rehearsed):
    from planrunner.report.compare import compare_records, render_text
    rehearsal = json.loads((rehearsed["monthly-fill"] / "record.json").read_text(encoding="utf-8"))
    real = {k: v for k, v in rehearsal.items() if k != "rehearsal"}
    assert render_text(compare_records(real, rehearsal)).startswith(f"*** {STAMP}: record B is a rehearsal")
    assert compare_records(real, real)["rehearsal"] is None


def test_a_rehearsal_is_never_signed_as_executed_or_approved(rehearsed, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("PR_PASS", "invented passphrase")
    key = tmp_path / "ana.key"
    assert cli.main(["keygen", str(key), "--name", "ana", "--passphrase-env", "PR_PASS"]) == 0
    folder = rehearsed["ward-hygiene"]
    for meaning in ("executed", "approved", "authored"):
        assert cli.main(["sign", str(folder), "--meaning", meaning, "--key", str(key), "--name", "ana",
                         "--passphrase-env", "PR_PASS"]) == 2
        err = capsys.readouterr().err
        assert f"{folder / 'record.json'}: this record is a rehearsal" in err and f"signed as {meaning}" in err
    assert cli.main(["sign", str(folder), "--meaning", "reviewed", "--key", str(key), "--name", "ana",
                     "--passphrase-env", "PR_PASS"]) == 0
    assert not list(folder.glob("*.executed.*"))


def test_a_run_or_a_lock_refuses_a_rehearsals_dummy_files_as_data(rehearsed, tmp_path, capsys):
    folder = rehearsed["monthly-fill"]
    plan = folder.parent.parent / "plan.yaml"
    assert cli.main(["run", str(plan), "--data-root", str(folder / DUMMY_FOLDER), "--out", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "fills-2026-10.csv: this file is dummy data written by 'planrunner rehearse'" in err
    assert not list(tmp_path.iterdir())
    data = plan.parent / "data"
    shutil.copytree(folder / DUMMY_FOLDER / "data", data)
    (data / MARKER).write_text(STAMP, encoding="utf-8")
    try:
        assert cli.main(["lock", str(plan)]) == 2
        assert "dummy data written by 'planrunner rehearse'" in capsys.readouterr().err
    finally:
        shutil.rmtree(data)


def test_a_rehearsal_is_never_written_among_the_runs(tmp_path):
    plan = plan_only(ROOT / "plans" / "monthly-fill", tmp_path / "m")
    (plan.parent / "runs").mkdir()
    with pytest.raises(OutputError, match="never written among real runs"):
        rehearse_plan(plan, out=plan.parent / "runs", units=UNITS)
    elsewhere = tmp_path / "logged"
    elsewhere.mkdir()
    (elsewhere / "history.jsonl").write_text("", encoding="utf-8")
    with pytest.raises(OutputError, match="history"):
        rehearse_plan(plan, out=elsewhere, units=UNITS)


def test_a_rehearsal_with_a_fixed_clock_is_the_same_record_twice(tmp_path):
    plan = plan_only(ROOT / "plans" / "ward-hygiene", tmp_path / "w")
    first = rehearse_plan(plan, out=tmp_path / "a", units=6, seed=7, clock=fixed_clock)
    second = rehearse_plan(plan, out=tmp_path / "b", units=6, seed=7, clock=fixed_clock)
    assert (first.folder / "record.json").read_bytes() == (second.folder / "record.json").read_bytes()
    other = rehearse_plan(plan, out=tmp_path / "c", units=6, seed=8, clock=fixed_clock)
    assert other.record["rehearsal"]["datasets"][0]["sha256"] != first.record["rehearsal"]["datasets"][0]["sha256"]


# --- the dummy-data rules, against exact identities -------------------------------------------------

PLAN = """\
plan: rules
title: Dummy-data rules
seed: 11
datasets:
  d:
    file: d.csv
    columns:
      site: {{type: category, levels: [s1, s2, s3]}}
      arm: {{type: category, levels: [a, b]}}
      colour: {{type: category, levels: [red, green, blue]}}
      flag: {{type: boolean}}
      dead: {{type: integer, min: 0, max: 1}}
      t: {{type: number, min: 0}}
      score: {{type: number, min: 10, max: 20}}
      count: {{type: integer, max: 5}}
{extra}
analyses:
  - id: km
    data: d
    outcome: t
    event: dead
    groups: {{by: arm, compare: [a, b]}}
    strata: site
    statistic: rmst_difference
    horizon: 300
    method: bootstrap
    intervals: [percentile]
"""


def _dummy(write_plan, units: int, extra: str = "", seed: int = 11) -> dict[str, np.ndarray]:
    loaded, _ = load_plan(write_plan(PLAN.format(extra=extra)))
    [dummy] = dummy_data(loaded, seed=seed, units=units)
    rows = list(csv.DictReader(io.StringIO(dummy.data.decode("utf-8"))))
    return {c: np.array([r[c] for r in rows]) for c in rows[0]}


@pytest.mark.parametrize("n, k", [(10, 3), (7, 2), (12, 4), (5, 5)])
def test_balanced_allocation_counts_are_n_div_k_plus_one_for_the_first_n_mod_k_levels(n, k):
    levels = [f"L{i}" for i in range(k)]
    counts = Counter(_balanced(levels, n, stream_of(1, "d", "c").generator(0)))
    # exact identity (identity 23): level i appears n // k + (i < n % k) times
    assert [counts[level] for level in levels] == [n // k + (i < n % k) for i in range(k)]


@pytest.mark.parametrize("units", [9, 14, 40])
def test_strata_balanced_groups_balanced_within_strata_events_three_in_four(write_plan, units):
    d = _dummy(write_plan, units)
    sites = Counter(d["site"])
    assert sorted(sites.values(), reverse=True) == [units // 3 + (i < units % 3) for i in range(3)]
    for site, count in sites.items():
        arms = Counter(d["arm"][d["site"] == site])
        assert sorted(arms.values(), reverse=True) == [count // 2 + (i < count % 2) for i in range(2) if
                                                        count // 2 + (i < count % 2)]
    # and overall: the cycle of arms goes on from one site to the next
    assert sorted(Counter(d["arm"]).values(), reverse=True) == [units // 2 + (i < units % 2) for i in range(2)]
    assert Counter(d["colour"]).most_common()[-1][1] == units // 3  # balanced over rows
    assert Counter(d["flag"]) == {"true": units // 2, "false": units - units // 2} or \
        Counter(d["flag"]) == {"false": units // 2, "true": units - units // 2}
    assert int((d["dead"] == "1").sum()) == units - units // 4  # events on n - n // 4 rows (identity 23)


def test_ranges_open_sides_and_survival_reach(write_plan):
    d = _dummy(write_plan, 200)
    score, t, count = (d[c].astype(float) for c in ("score", "t", "count"))
    assert score.min() >= 10 and score.max() <= 20
    # t has min 0 and no max: it reaches past twice the horizon (300), never past 0 + 2·300
    assert t.min() >= 0 and 300 < t.max() <= 600
    assert count.max() <= 5 and count.min() >= 5 - 100 and np.all(count == np.round(count))


def test_a_columns_values_do_not_depend_on_the_other_columns(write_plan):
    # the stream of a column is keyed by its dataset and name: a new column changes no other one
    before = _dummy(write_plan, 20)
    after = _dummy(write_plan, 20, extra="      added: {type: number}\n")
    for column in before:
        assert np.array_equal(before[column], after[column]), column
    assert not np.array_equal(before["score"], _dummy(write_plan, 20, seed=12)["score"])


def test_pairs_and_clusters_hold_their_structure(write_plan):
    plan = """\
    plan: units
    title: Pairs and clusters
    seed: 3
    datasets:
      paired:
        file: p.csv
        columns:
          who: {type: integer}
          when: {type: category, levels: [before, after]}
          side: {type: category, levels: [left, right]}
          y: {type: number}
      clustered:
        file: c.csv
        columns:
          ward: {type: text}
          arm: {type: category, levels: [x, y]}
          y: {type: number, min: 0, max: 1}
    analyses:
      - id: p
        data: paired
        outcome: y
        groups: {by: when, compare: [after, before]}
        pairs: who
        statistic: mean_difference
        method: permutation
      - id: c
        role: secondary
        data: clustered
        outcome: y
        groups: {by: arm, compare: [x, y]}
        clusters: ward
        statistic: mean_difference
        method: permutation
    """
    loaded, _ = load_plan(write_plan(plan))
    paired, clustered = dummy_data(loaded, seed=3, units=10)
    p = list(csv.DictReader(io.StringIO(paired.data.decode())))
    assert len(p) == 20 and Counter(r["who"] for r in p) == {str(k): 2 for k in range(1, 11)}
    assert {(r["who"], r["when"]) for r in p} == {(str(k), w) for k in range(1, 11) for w in ("before", "after")}
    assert all(len({r["side"] for r in p if r["who"] == str(k)}) == 1 for k in range(1, 11))  # the pair's own
    c = list(csv.DictReader(io.StringIO(clustered.data.decode())))
    assert len(c) == 10 * ROWS_PER_CLUSTER
    arms = {w: {r["arm"] for r in c if r["ward"] == w} for w in {r["ward"] for r in c}}
    assert all(len(a) == 1 for a in arms.values())  # a cluster lies within one group
    assert Counter(a.pop() for a in arms.values()) == {"x": 5, "y": 5}


def test_rows_where_is_met_by_drawing_the_free_columns_again(write_plan):
    d = _dummy(write_plan, 30, extra='    rows_where: "score > 18 and colour != \'red\'"\n')
    assert np.all(d["score"].astype(float) > 18) and "red" not in set(d["colour"])
    assert Counter(d["site"]) == {"s1": 10, "s2": 10, "s3": 10}  # strata untouched by the redraws


def test_a_filter_dummy_data_cannot_meet_is_one_located_message(write_plan):
    path = write_plan(PLAN.format(extra='    rows_where: "arm == \'a\'"\n'))
    loaded, _ = load_plan(path)
    with pytest.raises(PlanError) as caught:
        dummy_data(loaded, seed=1, units=10)
    line = next(i for i, text in enumerate(path.read_text().splitlines(), 1) if "rows_where" in text)
    assert str(caught.value).startswith(f"{path.resolve()}:{line}:")
    assert "cannot make rows of dataset 'd' that pass its rows_where filter" in str(caught.value)


TINY = """\
plan: tiny
title: One jackknife
seed: 5
datasets:
  d:
    file: d.csv
    columns:
      g: {type: category, levels: [a, b]}
      y: {type: number}
analyses:
  - id: j
    data: d
    outcome: y
    groups: {by: g, compare: [a, b]}
    statistic: mean_difference
    method: jackknife
"""


def test_a_rehearsal_never_enters_a_run_history_and_a_log_naming_one_is_flagged(write_plan, tmp_path, monkeypatch):
    from planrunner.pipeline import run as runner
    from planrunner.trail.index import gather_runs
    outcome = rehearse_plan(write_plan(TINY), units=8)
    with pytest.raises(OutputError, match="never appended to a run history"):
        runner.write_run(tmp_path / "runs", "logged", outcome.record, history=True)
    assert not (tmp_path / "runs").exists()
    # a log that names a rehearsal anyway (as if written by hand): the index flags it
    monkeypatch.setattr(runner, "is_rehearsal", lambda record: False)
    runner.write_run(tmp_path / "runs", "logged", outcome.record, history=True)
    [run], _ = gather_runs(tmp_path / "runs")
    assert run["integrity"].startswith(STAMP)


def test_no_dummy_value_is_one_the_plan_declares_missing(write_plan):
    # count: integer up to 5 with no min, i.e. uniform on -95..5; 2 and 3 are declared missing markers
    d = _dummy(write_plan, 60, extra='    missing_values: ["", "NA", "2", "3"]\n')
    assert not {"2", "3"} & set(d["count"]) and len(d["count"]) == 60


def test_a_parquet_dataset_rehearses_through_the_parquet_reader_and_verify_makes_the_same_bytes(write_plan, capsys):
    import pyarrow.parquet as pq  # an outside reader of the written file

    plan = write_plan(PLAN.format(extra="").replace("file: d.csv", "file: d.parquet"))
    outcome = rehearse_plan(plan, units=12, seed=5, clock=fixed_clock)
    kept = outcome.folder / DUMMY_FOLDER / "d.parquet"
    table = pq.read_table(kept)
    loaded, _ = load_plan(plan)
    assert table.column_names == list(loaded.plan.datasets["d"].columns)
    assert [str(table.schema.field(c).type) for c in ("site", "flag", "dead", "t")] == \
        ["string", "bool", "double", "double"]
    assert table.num_rows == outcome.record["rehearsal"]["datasets"][0]["rows"]
    [again] = dummy_data(loaded, seed=5, units=12)
    assert again.data == kept.read_bytes()  # the same bytes from the seed
    assert cli.main(["verify", str(outcome.folder)]) == 0
    assert "verify: PASSED (a rehearsal: never a valid result)" in capsys.readouterr().out


def test_the_parquet_dummy_file_reads_as_pyarrow_would_write_the_csv_dummys_values(write_plan):
    # planrunner's own Parquet writer (data/parquet.py) against pyarrow: the same seed's CSV dummy file
    # holds the same values as text; pyarrow writing them with the declared storage (numbers as doubles,
    # true/false as booleans, the rest as text) gives a table equal to ours, schema and nullability too
    import pyarrow as pa
    import pyarrow.parquet as pq

    csv_plan = write_plan(PLAN.format(extra=""))
    [as_csv] = dummy_data(load_plan(csv_plan)[0], seed=5, units=12)
    loaded, _ = load_plan(write_plan(PLAN.format(extra="").replace("file: d.csv", "file: d.parquet")))
    [ours] = dummy_data(loaded, seed=5, units=12)
    rows = list(csv.DictReader(io.StringIO(as_csv.data.decode("utf-8"))))
    arrays = {}
    for name, declared in loaded.plan.datasets["d"].columns.items():
        texts = [row[name] for row in rows]
        arrays[name] = (pa.array([float(t) for t in texts], type=pa.float64()) if declared.type in ("number", "integer")
                        else pa.array([t == "true" for t in texts], type=pa.bool_()) if declared.type == "boolean"
                        else pa.array(texts, type=pa.string()))
    sink = io.BytesIO()
    pq.write_table(pa.table(arrays), sink)
    theirs = pq.read_table(io.BytesIO(sink.getvalue())).replace_schema_metadata(None)
    read = pq.read_table(io.BytesIO(ours.data))
    assert [(f.name, f.type, f.nullable) for f in read.schema] == [(f.name, f.type, f.nullable) for f in theirs.schema]
    assert read.equals(theirs)


def test_a_dataset_json_dataset_rehearses_through_its_reader_and_verify_makes_the_same_bytes(write_plan, capsys):
    plan = write_plan(PLAN.format(extra="").replace("file: d.csv", "file: d.json"))
    outcome = rehearse_plan(plan, units=12, seed=5, clock=fixed_clock)
    kept = outcome.folder / DUMMY_FOLDER / "d.json"
    document = json.loads(kept.read_bytes())  # the v1.1 shape of the CDISC Dataset-JSON specification
    loaded, _ = load_plan(plan)
    assert [c["name"] for c in document["columns"]] == list(loaded.plan.datasets["d"].columns)
    assert {c["name"]: c["dataType"] for c in document["columns"]}["t"] == "double"
    assert document["records"] == len(document["rows"]) == outcome.record["rehearsal"]["datasets"][0]["rows"]
    assert all(len(row) == len(document["columns"]) for row in document["rows"])
    [again] = dummy_data(loaded, seed=5, units=12)
    assert again.data == kept.read_bytes()
    assert cli.main(["verify", str(outcome.folder)]) == 0
    assert "verify: PASSED (a rehearsal: never a valid result)" in capsys.readouterr().out


@pytest.mark.parametrize("ext, sheet", [("xpt", ""), ("xlsx", "\n    sheet: dummy rows")])
def test_xpt_and_xlsx_datasets_rehearse_and_verify_from_the_command_line(write_plan, capsys, tmp_path, ext, sheet):
    plan = write_plan(PLAN.format(extra="").replace("file: d.csv", f"file: d.{ext}{sheet}"))
    assert cli.main(["rehearse", str(plan), "--units", "12", "--seed", "5", "--quiet"]) == 0
    [folder] = (plan.parent / "rehearsals").iterdir()
    kept = folder / DUMMY_FOLDER / f"d.{ext}"
    loaded, _ = load_plan(plan)
    [again] = dummy_data(loaded, seed=5, units=12)
    assert again.data == kept.read_bytes()  # the same bytes from the seed (fixed dates in the file)
    # read back through planrunner's own reader (the plan's sheet for the workbook), the values are the
    # CSV dummy file's of the same seed, column by column
    typed = read_table("d", loaded.plan.datasets["d"], folder / DUMMY_FOLDER)
    as_csv, _ = load_plan(write_plan(PLAN.format(extra=""), name="csv.yaml"))
    [text] = dummy_data(as_csv, seed=5, units=12)
    (tmp_path / "csv").mkdir()
    (tmp_path / "csv" / "d.csv").write_bytes(text.data)
    plain = read_table("d", as_csv.plan.datasets["d"], tmp_path / "csv")
    assert list(typed.columns) == list(plain.columns)
    for column, values in plain.columns.items():
        np.testing.assert_array_equal(typed.columns[column], values)
    capsys.readouterr()
    assert cli.main(["verify", str(folder)]) == 0
    assert "verify: PASSED (a rehearsal: never a valid result)" in capsys.readouterr().out
    # a dummy file changed after the rehearsal (one byte of the last record) is named
    data = bytearray(kept.read_bytes())
    data[-100] ^= 0x01
    kept.write_bytes(bytes(data))
    assert cli.main(["verify", str(folder)]) == 3
    out = capsys.readouterr().out
    assert "is not the one the recorded seed makes" in out and "verify: FAILED" in out


def test_what_xpt_cannot_hold_is_one_located_message_per_column(write_plan):
    long_level = "x" * 201
    plan = write_plan(f"""\
        plan: v5
        title: Columns version 5 cannot hold
        seed: 3
        datasets:
          d:
            file: d.xpt
            columns:
              g: {{type: category, levels: [a, "{long_level}"]}}
              outcome_1: {{type: number}}
              visits: {{type: integer, min: 9007199254740993, max: 9007199254740995}}
        analyses:
          - id: one
            data: d
            outcome: outcome_1
            groups: {{by: g, compare: [a, "{long_level}"]}}
            statistic: mean_difference
            method: bootstrap
            resamples: 99
        """)
    loaded, _ = load_plan(plan)
    with pytest.raises(PlanError) as caught:
        dummy_data(loaded, seed=3, units=8)
    problems = caught.value.problems
    assert len(problems) == 3
    assert problems[0].startswith(f"{plan}:8:10: datasets.d.columns.g: its longest value is 201 bytes")
    assert problems[1].startswith(f"{plan}:9:7: datasets.d.columns.outcome_1: 'outcome_1' is not a version 5 "
                                  "variable name") and "e.g. to 'outcome_'" in problems[1]
    assert problems[2].startswith(f"{plan}:10:15: datasets.d.columns.visits: whole numbers beyond ±2^53")
