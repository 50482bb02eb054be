"""The audit trail end to end from the command line: lock, deviations, verify, history, parameters,
compare, JSON Schemas, methods text and the self-check."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import jsonschema
import pytest

from planrunner.audit import verbs
from planrunner.audit.verbs import Basis, FieldDifference, _judge
from planrunner.cli import main as cli
from planrunner.engines.streams import REFERENCE_DRAWS_SHA256, Stream, draws_sha256
from planrunner.plan.yamlsafe import load_yaml
from planrunner.record.build import environment
from planrunner.record.canonical import record_sha256
from planrunner.record.schemas import plan_schema, record_schema

ROOT = Path(__file__).resolve().parent.parent
MONTHLY = ROOT / "plans" / "monthly-fill"


@pytest.fixture
def project(tmp_path: Path) -> Path:
    """A copy of the monthly demo plan and its data; returns the plan file."""
    target = tmp_path / "monthly-fill"
    shutil.copytree(MONTHLY, target, ignore=shutil.ignore_patterns("runs", "*.lock.json"))
    plan = target / "plan.yaml"
    # fewer resamples keep the suite fast; the plan is otherwise the demo plan
    plan.write_text(plan.read_text(encoding="utf-8").replace("resamples: 4999", "resamples: 999"), encoding="utf-8")
    return plan


def run(args: list[str], capsys) -> tuple[int, str, str]:
    code = cli.main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def run_plan(plan: Path, capsys, *extra: str) -> tuple[Path, dict, str]:
    code, out, err = run(["run", str(plan), "--operator", "tester", *extra], capsys)
    assert code == 0, err
    folder = Path(out.strip().splitlines()[-1].removeprefix("record written to "))
    return folder, json.loads((folder / "record.json").read_text(encoding="utf-8")), out


def rewrite_record(folder: Path, change, *, rehash: bool = False) -> None:
    path = folder / "record.json"
    record = json.loads(path.read_text(encoding="utf-8"))
    change(record)
    if rehash:
        record["record_sha256"] = record_sha256(record)
    path.write_text(json.dumps(record, indent=2, sort_keys=True), encoding="utf-8")


# --- lock and deviations ---------------------------------------------------------------------------

def test_lock_then_edit_then_run_lists_the_deviation_with_its_path(project, capsys):
    code, out, _ = run(["lock", str(project), "--operator", "ana", "--note", "protocol v1"], capsys)
    assert code == 0 and "lock written to" in out
    lock = json.loads((project.parent / "plan.lock.json").read_text(encoding="utf-8"))
    assert lock["operator"] == "ana" and lock["note"] == "protocol v1"
    assert lock["locked_utc"].endswith("Z") and len(lock["sha256"]) == 64 and len(lock["canonical_sha256"]) == 64
    assert lock["data"] == [{"name": "fills", "file": "data/fills-2026-10.csv", "present": True,
                             "sha256": lock["data"][0]["sha256"], "bytes": lock["data"][0]["bytes"]}]

    text = project.read_text(encoding="utf-8")
    project.write_text(text.replace("intervals: [percentile, bca]", "intervals: [percentile]"), encoding="utf-8")
    _, record, out = run_plan(project, capsys)
    entry = record["plan"]["lock"]
    assert entry["deviations"] == [{"path": "analyses[0].intervals[1]", "locked": "bca", "now": "(absent)"}]
    assert entry["operator"] == "ana" and entry["note"] == "protocol v1" and entry["file"] == "plan.lock.json"
    assert entry["sha256"] == lock["sha256"] and entry["canonical_sha256"] == lock["canonical_sha256"]
    assert "1 DEVIATION(S)" in out and "analyses[0].intervals[1]" in out  # the run summary shows it

    code, _, err = run(["run", str(project), "--refuse-deviations"], capsys)
    assert code == 2 and "analyses[0].intervals[1]: locked 'bca'" in err
    # the fix it suggests records the change (a new locked plan), never dropping the safeguard
    assert "planrunner lock NEW_PLAN" in err and "new name" in err
    assert "remove --refuse-deviations" not in err


def test_quiet_run_prints_only_the_run_folder(project, capsys):
    code, out, _ = run(["run", str(project), "--quiet"], capsys)
    lines = out.splitlines()
    assert code == 0 and len(lines) == 1 and (Path(lines[0]) / "record.json").is_file()


def test_changed_setting_and_changed_comment_are_told_apart(project, capsys):
    run(["lock", str(project)], capsys)
    project.write_text(project.read_text(encoding="utf-8").replace("# Monthly", "# The monthly"), encoding="utf-8")
    _, record, out = run_plan(project, capsys)
    entry = record["plan"]["lock"]
    assert entry["deviations"] == [] and entry["content_identical"] and not entry["plan_bytes_identical"]
    assert "no deviations; only comments or layout changed" in out
    project.write_text(project.read_text(encoding="utf-8").replace("seed: 20261101", "seed: 20261102"),
                       encoding="utf-8")
    _, record, _ = run_plan(project, capsys)
    assert record["plan"]["lock"]["deviations"] == [{"path": "seed", "locked": 20261101, "now": 20261102}]


def test_data_changed_after_lock_is_a_deviation(project, capsys):
    run(["lock", str(project)], capsys)
    data = project.parent / "data" / "fills-2026-10.csv"
    data.write_text(data.read_text(encoding="utf-8").replace("10.0", "10.1", 1), encoding="utf-8")
    _, record, _ = run_plan(project, capsys)
    (deviation,) = record["plan"]["lock"]["deviations"]
    assert deviation["path"] == "data.fills.sha256" and deviation["now"] == record["datasets"][0]["sha256"]
    # another month's file is another file, not a deviation of the locked one
    _, record, _ = run_plan(project, capsys, "--param", "month=2026-11")
    assert record["plan"]["lock"]["deviations"] == []


def test_lock_is_never_replaced_and_an_edited_lock_is_refused(project, capsys):
    assert run(["lock", str(project)], capsys)[0] == 0
    code, _, err = run(["lock", str(project)], capsys)
    assert code == 2 and "already locked" in err
    lock_file = project.parent / "plan.lock.json"
    lock = json.loads(lock_file.read_text(encoding="utf-8"))
    lock["content"]["seed"] = 1  # someone "fixes" the lock to match an edited plan
    lock_file.write_text(json.dumps(lock), encoding="utf-8")
    code, _, err = run(["run", str(project)], capsys)
    assert code == 2 and "lock file was changed" in err


def test_a_lock_rewritten_with_its_hash_recomputed_is_accepted_as_the_readme_says(project, capsys):
    # lock_sha256 is a plain SHA-256: it detects a changed lock, not an editor who recomputes it
    # (README, "Threat model"); plan and lock edited alike then show no deviation
    from planrunner.record.canonical import self_hash
    assert run(["lock", str(project)], capsys)[0] == 0
    lock_file = project.parent / "plan.lock.json"
    lock = json.loads(lock_file.read_text(encoding="utf-8"))
    lock["content"]["seed"] = 7
    lock["lock_sha256"] = self_hash(lock, "lock_sha256")
    lock_file.write_text(json.dumps(lock), encoding="utf-8")
    project.write_text(project.read_text(encoding="utf-8").replace("seed: 20261101", "seed: 7"), encoding="utf-8")
    _, record, _ = run_plan(project, capsys)
    assert record["plan"]["lock"]["deviations"] == []


def test_refuse_deviations_without_a_lock_is_an_error(project, capsys):
    code, _, err = run(["run", str(project), "--refuse-deviations"], capsys)
    assert code == 2 and "no lock file" in err


def test_run_without_lock_records_null(project, capsys):
    _, record, out = run_plan(project, capsys)
    assert record["plan"]["lock"] is None and "plan lock: none" in out


# --- verify ----------------------------------------------------------------------------------------

def test_verify_untouched_run_is_identical(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0, out
    assert "identical" in out and "verify: PASSED" in out


def test_verify_of_a_run_on_workers_passes_on_any_executor(project, capsys):
    # where a run ran is informational: a threads run verifies serially, and a re-run on threads
    # must give the same numbers as the serial record
    folder, record, _ = run_plan(project, capsys, "--executor", "threads", "--workers", "2")
    assert record["execution"] == {"executor": "threads", "workers": 2, "scheduler": None}
    for options in ([], ["--executor", "threads"]):
        code, out, _ = run(["verify", str(folder), *options], capsys)
        assert code == 0, out
        assert "identical" in out and "verify: PASSED" in out
    code, _, err = run(["verify", str(folder), "--executor", "serial", "--workers", "3"], capsys)
    assert code == 2 and "serial executor runs one worker" in err


def test_verify_fails_after_one_data_byte_changes(project, capsys):
    folder, record, _ = run_plan(project, capsys)
    data = project.parent / "data" / "fills-2026-10.csv"
    raw = bytearray(data.read_bytes())
    where = raw.index(b"10.0")  # the first fill weight: 10.0x -> 10.1x
    raw[where + 3] = ord("1")
    data.write_bytes(bytes(raw))
    code, out, _ = run(["verify", str(folder / "record.json")], capsys)
    assert code == 3
    assert "DIFFERENCE datasets[0].sha256" in out
    assert "analyses[0].estimate" in out and "OUTSIDE" in out and "verify: FAILED" in out


def test_verify_fails_after_one_record_value_changes(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    rewrite_record(folder, lambda r: r["analyses"][1].update(p_value=0.5))
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3
    assert "DIFFERENCE record_sha256" in out and "analyses[1].p_value" in out


def test_verify_names_the_field_even_when_the_tamperer_rehashes(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    rewrite_record(folder, lambda r: r["analyses"][0].update(standard_error=r["analyses"][0]["standard_error"] * 2),
                   rehash=True)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "DIFFERENCE record_sha256" not in out
    assert "analyses[0].standard_error" in out and "OUTSIDE" in out


def test_same_environment_allows_no_monte_carlo_slack(project, capsys):
    # a p-value nudged by far less than its Monte Carlo s.d. is still a difference on the same build
    folder, record, _ = run_plan(project, capsys)
    p = record["analyses"][1]["p_value"]
    rewrite_record(folder, lambda r: r["analyses"][1].update(p_value=p + 1e-6), rehash=True)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "analyses[1].p_value" in out and "OUTSIDE" in out


def _forge(folder: Path, change) -> None:
    """Edit a record as its holder could: change fields, rewrite the methods text that quotes the
    versions, and recompute the record's own hash."""
    from planrunner.record.methods import methods_text

    def edit(r: dict) -> None:
        change(r)
        r["methods_text"] = methods_text(r)
    rewrite_record(folder, edit, rehash=True)


def test_a_forged_environment_does_not_switch_on_the_monte_carlo_tolerance(project, capsys):
    # the record's holder claims another Python (which once let a p-value move by 4 Monte Carlo s.d.)
    # and lowers the p-value by 3.9 s.d.; this installation draws the reference random numbers, so
    # the re-run draws the same resamples and the lowered p-value is a difference
    folder, record, _ = run_plan(project, capsys)
    p, sd = record["analyses"][1]["p_value"], record["analyses"][1]["monte_carlo"]["p_value_sd"]

    def forged(r: dict) -> None:
        r["environment"]["python"] = "3.0.0"
        r["analyses"][1]["p_value"] = p - 3.9 * sd
    _forge(folder, forged)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "verify: FAILED" in out
    assert "DIFFERENCE record_sha256" not in out  # the forger recomputed the hash
    row = next(line for line in out.splitlines() if line.startswith("analyses[1].p_value"))
    assert "OUTSIDE" in row and "floating point" in row and "Monte Carlo" not in out.split("comparison:")[0]
    assert "comparison: another environment than the recorded one" in out
    assert "draws the reference random numbers" in out


def test_an_installation_with_other_draws_allows_the_stated_monte_carlo_tolerance(project, capsys, monkeypatch):
    # the one case where the re-run draws other resamples: this installation's own draws are not the
    # reference ones (a fact of the verifier, here simulated), for a record made elsewhere
    folder, record, _ = run_plan(project, capsys)
    p, sd = record["analyses"][1]["p_value"], record["analyses"][1]["monte_carlo"]["p_value_sd"]
    _forge(folder, lambda r: r["environment"]["packages"].update(numpy="0.0.1")
           or r["analyses"][1].update(p_value=p + sd))
    monkeypatch.setattr(verbs, "draws_are_reference", lambda: False)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0, out
    assert "analyses[1].p_value" in out and "within" in out and "Monte Carlo (4 stated s.d.)" in out
    assert "comparison: this installation draws other random numbers than the reference ones" in out
    # the same record claiming this very environment gets no slack, whatever this installation draws
    _forge(folder, lambda r: r.update(environment=environment()))
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "same environment: bit for bit" in out


def test_a_rerun_on_the_recorded_environment_is_bit_for_bit_and_says_so(project, capsys):
    folder, record, _ = run_plan(project, capsys)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0
    assert "comparison: the recorded environment is this one" in out and "equal bit for bit" in out
    assert "identical" in out and "every one equal bit for bit" in out
    # a difference in the last bits is a difference here, with a word on where such bits come from
    estimate = record["analyses"][0]["estimate"]
    _forge(folder, lambda r: r["analyses"][0].update(estimate=math.nextafter(estimate, math.inf)))
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "same environment: bit for bit" in out and "rounding size only" in out
    # the same record from another environment: rounding is allowed there
    _forge(folder, lambda r: r["environment"].update(platform="elsewhere"))
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0, out
    assert "floating point (relative 1e-9)" in out and "within" in out


def test_verify_fails_after_the_seed_changes_in_the_record(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    rewrite_record(folder, lambda r: r["seed"].update(root=r["seed"]["root"] + 1))
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "seed.root" in out


def test_verify_fails_after_the_seed_changes_in_the_plan(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    project.write_text(project.read_text(encoding="utf-8").replace("seed: 20261101", "seed: 7"), encoding="utf-8")
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3
    assert "DIFFERENCE plan.sha256" in out and "plan change: seed: recorded 20261101, now 7" in out


def test_verify_states_other_package_versions_without_failing(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    from planrunner.record.methods import methods_text

    def elsewhere(r: dict) -> None:  # the record as another installation would have written it
        r["environment"]["packages"]["numpy"] = "0.0.1"
        r["methods_text"] = methods_text(r)
    rewrite_record(folder, elsewhere, rehash=True)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0, out
    assert "note (stated, not a failure): environment.packages.numpy: recorded '0.0.1'" in out


def test_verify_of_a_parameterised_run_uses_the_recorded_value(project, capsys):
    folder, record, _ = run_plan(project, capsys, "--param", "month=2026-11")
    assert record["parameters"] == {"month": "2026-11"}
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 0, out


def test_verify_not_a_record_is_exit_2(tmp_path, capsys):
    bad = tmp_path / "record.json"
    bad.write_text("{}", encoding="utf-8")
    code, _, err = run(["verify", str(bad)], capsys)
    assert code == 2 and "not a planrunner record" in err


def test_tolerance_rules():
    record = {"analyses": [{"monte_carlo": {"standard_error_sd": 0.01}}]}
    other_draws = Basis(same_environment=False, reference_draws=False)
    same_draws = Basis(same_environment=False, reference_draws=True)
    same_environment = Basis(same_environment=True, reference_draws=False)
    # Source: V-TOL, about 4 MC s.d. for Monte Carlo quantities; 1e-9 relative for floating point
    assert _judge("analyses[0].standard_error", 1.0, 1.039, record, other_draws).within
    assert not _judge("analyses[0].standard_error", 1.0, 1.041, record, other_draws).within
    assert not _judge("analyses[0].standard_error", 1.0, 1.039, record, same_draws).within
    assert _judge("analyses[0].estimate", 1.0, 1.0 + 1e-12, record, same_draws).within
    assert not _judge("analyses[0].estimate", 1.0, 1.0 + 1e-12, record, same_environment).within
    assert not _judge("analyses[0].estimate", 1.0, 1.0 + 1e-6, record, other_draws).within
    assert not _judge("analyses[0].details.count_less_equal", 10, 11, record, other_draws).within
    assert not _judge("analyses[0].scheme", "a", "b", record, other_draws).within
    assert isinstance(_judge("x", 1.0, 2.0, record, other_draws), FieldDifference)


def test_this_installation_draws_the_reference_numbers():
    # the reference was computed with numpy 1.26.4 and with numpy 2.4.6 (the same value on both)
    assert draws_sha256() == REFERENCE_DRAWS_SHA256
    assert verbs.draws_are_reference()


def test_other_draws_are_noticed(monkeypatch):
    # an installation whose generator gives other numbers (here: another seed) fails the check
    real = Stream.generator
    monkeypatch.setattr(Stream, "generator", lambda self, block: real(Stream(self.root_seed + 1, self.key), block))
    assert draws_sha256() != REFERENCE_DRAWS_SHA256 and not verbs.draws_are_reference()


# --- history ---------------------------------------------------------------------------------------

def _two_runs(project: Path, capsys) -> Path:
    run_plan(project, capsys, "--reason", "October extract")
    run_plan(project, capsys, "--reason", "November extract", "--param", "month=2026-11")
    return project.parent / "runs" / "history.jsonl"


def test_history_lists_runs_and_the_chain_is_intact(project, capsys):
    log = _two_runs(project, capsys)
    code, out, _ = run(["history", str(project)], capsys)
    assert code == 0 and "history chain: intact" in out
    assert "October extract" in out and "November extract" in out
    first, second = [json.loads(line) for line in log.read_text(encoding="utf-8").splitlines()]
    assert second["previous_sha256"] == first["entry_sha256"] and first["previous_sha256"] == "0" * 64
    assert {"run_id", "finished_utc", "operator", "reason", "plan_sha256", "record_sha256"} <= set(first)


def test_history_detects_an_edited_entry(project, capsys):
    log = _two_runs(project, capsys)
    log.write_text(log.read_text(encoding="utf-8").replace("October extract", "October re-extract"), encoding="utf-8")
    code, out, _ = run(["history", str(log)], capsys)
    assert code == 3 and "BROKEN line 1: the entry was changed" in out


def test_history_detects_a_removed_entry(project, capsys):
    log = _two_runs(project, capsys)
    lines = log.read_text(encoding="utf-8").splitlines()
    log.write_text(lines[1] + "\n", encoding="utf-8")  # the first entry removed
    code, out, _ = run(["history", str(log.parent)], capsys)
    assert code == 3 and "link to the previous entry is broken" in out
    log.write_text(lines[0] + "\n", encoding="utf-8")  # the last entry removed
    code, out, _ = run(["history", str(log.parent)], capsys)
    assert code == 3 and "is not in the history" in out


def test_history_detects_a_replaced_record(project, capsys):
    _two_runs(project, capsys)
    folder = sorted((project.parent / "runs").glob("monthly-fill-*"))[0]
    rewrite_record(folder, lambda r: r.update(operator="someone else"), rehash=True)
    code, out, _ = run(["history", str(project)], capsys)
    assert code == 3 and "is not the one logged" in out


# --- parameters ------------------------------------------------------------------------------------

def test_parameter_fills_file_and_titles_and_is_recorded(project, capsys):
    _, record, _ = run_plan(project, capsys, "--param", "month=2026-11")
    assert record["parameters"] == {"month": "2026-11"}
    assert record["datasets"][0]["file"] == "data/fills-2026-11.csv"
    assert record["plan"]["title"] == "Fill weight by filling head, 2026-11"
    assert record["analyses"][0]["title"] == "Mean fill weight, head B minus head A, 2026-11"
    assert "{month}" in record["plan"]["text"]  # the plan itself is recorded as written


@pytest.mark.parametrize("value, fragment", [
    ("2026-13", "is not a month YYYY-MM"),
    ("2026-09", "does not match the pattern"),
    ("2026-12", "is not one of the allowed values"),
    ("../2026-10", "path separator"),
])
def test_parameter_value_that_does_not_match_is_refused(project, capsys, value, fragment):
    code, _, err = run(["run", str(project), "--param", f"month={value}"], capsys)
    assert code == 2 and fragment in err and "--param month" in err
    assert not (project.parent / "runs").exists()


def test_unknown_or_malformed_parameter_is_refused(project, capsys):
    code, _, err = run(["check", str(project), "--param", "mnth=2026-11"], capsys)
    assert code == 2 and "did you mean 'month'" in err
    code, _, err = run(["check", str(project), "--param", "month"], capsys)
    assert code == 2 and "is not NAME=VALUE" in err


def test_parameter_without_value_or_default_is_refused(project, capsys):
    project.write_text(project.read_text(encoding="utf-8").replace('    default: "2026-10"\n', ""), encoding="utf-8")
    code, _, err = run(["check", str(project)], capsys)
    assert code == 2 and "no value given" in err


# --- compare ---------------------------------------------------------------------------------------

def test_compare_shows_a_changed_estimate(project, capsys, tmp_path):
    october, rec_a, _ = run_plan(project, capsys)
    november, rec_b, _ = run_plan(project, capsys, "--param", "month=2026-11")
    md, page = tmp_path / "c.md", tmp_path / "c.html"
    code, out, _ = run(["compare", str(october), str(november / "record.json"), "--markdown", str(md),
                        "--html", str(page)], capsys)
    assert code == 0
    est_a, est_b = rec_a["analyses"][0]["estimate"], rec_b["analyses"][0]["estimate"]
    assert est_a != est_b
    from planrunner.report.render import number
    line = next(line for line in out.splitlines() if line.split()[:2] == ["head-difference", "both"])
    assert number(est_a) in line and number(est_b) in line and number(est_b - est_a).lstrip("-") in line
    assert "month=2026-10" in out and "month=2026-11" in out and "changed" in out
    assert md.read_text(encoding="utf-8").startswith("# Comparison of two runs")
    html = page.read_text(encoding="utf-8")
    assert "<table>" in html and number(est_b) in html and "http" not in html.split("<body>")[1]
    # a report is never overwritten
    code, _, err = run(["compare", str(october), str(november), "--markdown", str(md)], capsys)
    assert code == 2 and "never overwrites" in err


def test_compare_lists_plan_differences(project, capsys):
    first, _, _ = run_plan(project, capsys)
    project.write_text(project.read_text(encoding="utf-8").replace("resamples: 999", "resamples: 499"),
                       encoding="utf-8")
    second, _, _ = run_plan(project, capsys)
    _, out, _ = run(["compare", str(first), str(second)], capsys)
    assert "defaults.resamples  999   499" in out or ("defaults.resamples" in out and "499" in out)


# --- JSON Schemas ----------------------------------------------------------------------------------

PLANS = sorted((ROOT / "plans").glob("*/plan.yaml"))


@pytest.mark.parametrize("path", PLANS, ids=[p.parent.name for p in PLANS])
def test_plan_schema_validates_every_plan(path):
    data = load_yaml(path.read_text(encoding="utf-8"), str(path)).data
    jsonschema.Draft202012Validator(plan_schema()).validate(data)


def test_plan_schema_rejects_an_unknown_key():
    data = load_yaml(PLANS[0].read_text(encoding="utf-8"), "plan").data
    data["analyses"][0]["statistc"] = "mean"
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(plan_schema()).validate(data)


def test_record_schema_validates_real_records(project, capsys):
    jsonschema.Draft202012Validator.check_schema(record_schema())
    run(["lock", str(project)], capsys)
    _, record, _ = run_plan(project, capsys)
    demo_folder, demo, _ = run_plan(ROOT / "plans" / "liner-trial" / "plan.yaml", capsys,
                                    "--out", str(project.parent / "demo-runs"))
    for r in (record, demo):
        jsonschema.Draft202012Validator(record_schema()).validate(r)
    broken = dict(record)
    del broken["record_sha256"]
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.Draft202012Validator(record_schema()).validate(broken)


def test_schema_command_prints_json(capsys):
    code, out, _ = run(["schema", "plan"], capsys)
    assert code == 0 and json.loads(out)["$id"] == "urn:planrunner:schema:plan:1"
    code, out, _ = run(["schema", "record"], capsys)
    assert code == 0 and json.loads(out)["properties"]["format"] == {"const": "planrunner.record/1"}


# --- methods text ----------------------------------------------------------------------------------

def test_methods_text_names_what_ran(project, capsys):
    run(["lock", str(project)], capsys)
    _, record, _ = run_plan(project, capsys)
    text = record["methods_text"]
    for fragment in ("bootstrap", "999 resamples", "95% percentile and bias-corrected and accelerated (BCa)",
                     "permutation test", "two-sided", "root seed 20261101", "PCG64",
                     f"numpy {record['environment']['packages']['numpy']}", "ran as locked"):
        assert fragment in text, fragment
    demo = json.loads(json.dumps(record))
    demo["multiplicity"] = [{"family": ["head-difference", "head-test"], "method": "holm",
                             "method_label": "Holm step-down"}]
    from planrunner.record.methods import methods_text
    assert "adjusted together by the Holm step-down method" in methods_text(demo)


# --- self-check ------------------------------------------------------------------------------------

def test_selfcheck_passes_and_its_report_is_hashed(tmp_path, capsys):
    out_file = tmp_path / "selfcheck.json"
    code, out, _ = run(["selfcheck", "--out", str(out_file)], capsys)
    assert code == 0, out
    report = json.loads(out_file.read_text(encoding="utf-8"))
    assert report["all_passed"] and report["failed"] == 0 and len(report["cases"]) >= 15
    assert all(c["source"] and c["expected"] is not None and c["obtained"] is not None for c in report["cases"])
    assert {"python", "platform", "packages", "planrunner"} <= set(report["environment"])
    assert run(["selfcheck", "--check", str(out_file)], capsys)[0] == 0
    report["cases"][0]["obtained"] = 0.7
    out_file.write_text(json.dumps(report), encoding="utf-8")
    code, out, _ = run(["selfcheck", "--check", str(out_file)], capsys)
    assert code == 3 and "HASH DOES NOT MATCH" in out


def test_selfcheck_cases_ship_inside_the_package():
    import planrunner.audit.selfcheck as cases
    assert Path(cases.__file__).resolve().parent == ROOT / "planrunner" / "audit"
    assert all(c.source for c in cases.CASES)


def test_a_failing_case_fails(monkeypatch):
    from planrunner.audit.selfcheck import CASES, Case, run_case
    wrong = Case("wrong", "a wrong expectation", "test", CASES[0].expected + 1e-6, 1e-12, CASES[0].compute)
    assert not run_case(wrong)["passed"]


def test_lock_of_a_plan_whose_data_path_waits_for_a_parameter(project, capsys):
    project.write_text(project.read_text(encoding="utf-8").replace('    default: "2026-10"\n', ""), encoding="utf-8")
    code, out, _ = run(["lock", str(project)], capsys)
    assert code == 0 and "data/fills-{month}.csv: not present" in out
    lock = json.loads((project.parent / "plan.lock.json").read_text(encoding="utf-8"))
    assert lock["data"][0]["present"] is False and lock["data"][0]["sha256"] is None
    _, record, _ = run_plan(project, capsys, "--param", "month=2026-11")
    assert record["plan"]["lock"]["deviations"] == []


def test_record_carries_the_hash_of_its_own_content(project, capsys):
    folder, record, _ = run_plan(project, capsys)
    assert record["record_sha256"] == record_sha256(record)
    on_disk = json.loads((folder / "record.json").read_text(encoding="utf-8"))
    assert record_sha256(on_disk) == record["record_sha256"]


def test_selfcheck_cases_do_not_depend_on_their_order():
    # every Monte Carlo case draws from its own stream keyed by the case, never from run order
    from planrunner.audit.selfcheck import CASES, run_case
    forward = {c.id: run_case(c)["obtained"] for c in CASES}
    backward = {c.id: run_case(c)["obtained"] for c in reversed(CASES)}
    assert forward == backward


def test_plan_only_check_needs_no_parameter_value(project, capsys):
    project.write_text(project.read_text(encoding="utf-8").replace('    default: "2026-10"\n', ""), encoding="utf-8")
    assert run(["check", str(project), "--plan-only"], capsys)[0] == 0
    assert run(["check", str(project), "--param", "month=2026-11"], capsys)[0] == 0


def test_selfcheck_runs_from_the_built_wheel_alone(tmp_path):
    """The cases ship in the wheel: the self-check runs from the unpacked wheel, far from tests/."""
    import subprocess
    import sys
    import zipfile
    built = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                            "-w", str(tmp_path / "wheel"), str(ROOT)], capture_output=True, text=True)
    assert built.returncode == 0, built.stderr[-2000:]
    wheel = next((tmp_path / "wheel").glob("planrunner-*.whl"))
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    assert (site / "planrunner" / "audit" / "selfcheck.py").is_file()
    work = tmp_path / "elsewhere"
    work.mkdir()
    done = subprocess.run([sys.executable, "-m", "planrunner", "selfcheck", "--out", "report.json"], cwd=work,
                          capture_output=True, text=True, env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"})
    assert done.returncode == 0, done.stdout + done.stderr
    report = json.loads((work / "report.json").read_text(encoding="utf-8"))
    assert report["all_passed"] and report["environment"]["planrunner"]


def test_verify_of_a_record_whose_plan_text_was_edited(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    rewrite_record(folder, lambda r: r["plan"].update(text=r["plan"]["text"].replace("seed:", "sed:")), rehash=True)
    code, out, _ = run(["verify", str(folder)], capsys)
    assert code == 3 and "DIFFERENCE plan.text" in out and "recorded plan" in out and "could not be re-run" in out


def test_verify_of_a_damaged_record_is_exit_2(project, capsys):
    folder, _, _ = run_plan(project, capsys)
    rewrite_record(folder, lambda r: r.pop("datasets"))
    code, _, err = run(["verify", str(folder)], capsys)
    assert code == 2 and "incomplete or damaged: datasets" in err


def test_check_reports_deviations_from_the_lock_before_any_run(project, capsys):
    run(["lock", str(project)], capsys)
    code, out, _ = run(["check", str(project), "--plan-only"], capsys)
    assert code == 0 and "no deviations" in out
    project.write_text(project.read_text(encoding="utf-8").replace("resamples: 999", "resamples: 99"), encoding="utf-8")
    code, out, _ = run(["check", str(project)], capsys)
    assert code == 0 and "defaults.resamples: locked 999, now 99" in out
    assert not (project.parent / "runs").exists()


# --- canonical form (property tests) ----------------------------------------------------------------

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from planrunner.record.canonical import content_sha256, differences  # noqa: E402

JSONISH = st.recursive(
    st.none() | st.booleans() | st.integers(-10**6, 10**6) | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=5),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=4), inner, max_size=4),
    max_leaves=20)


def _reordered(value):
    if isinstance(value, dict):
        return {k: _reordered(value[k]) for k in reversed(list(value))}
    if isinstance(value, list):
        return [_reordered(v) for v in value]
    return value


@settings(max_examples=150, deadline=None)
@given(JSONISH)
def test_canonical_hash_ignores_key_order_and_a_document_equals_itself(doc):
    assert content_sha256(doc) == content_sha256(_reordered(doc))
    assert differences(doc, _reordered(doc)) == []


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(st.text(min_size=1, max_size=4), st.integers(), min_size=1, max_size=6), st.data())
def test_one_changed_leaf_is_one_difference_at_its_path(doc, data):
    key = data.draw(st.sampled_from(sorted(doc)))
    changed = {**doc, key: doc[key] + 1}
    (d,) = differences(doc, changed)
    assert d.path == key and d.before == doc[key] and d.after == doc[key] + 1
    assert content_sha256(doc) != content_sha256(changed)
