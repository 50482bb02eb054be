"""Orchestration of the audit commands that read records: verify, compare, self-check.

It reads records and self-check reports with `trail.store.read_json` and writes the comparison and
self-check reports with `trail.store.write_new_file` (never over an existing file); the logic it
relies on is pure and lives in `record.canonical`, `report.compare` and `audit.selfcheck`.
"""

from __future__ import annotations

import json
import math
import re
import tempfile
from contextlib import ExitStack
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from planrunner.compile.jobs import compile_jobs
from planrunner.data.tables import file_sha256, resolve_data_path
from planrunner.engines.streams import REFERENCE_DRAWS_SHA256, draws_sha256
from planrunner.errors import PlanError, PlanrunnerError, RecordError
from planrunner.execute.pool import Execution, early_workers
from planrunner.pipeline.check import load_tables
from planrunner.pipeline.printing import read_record
from planrunner.pipeline.run import execute_plan
from planrunner.plan.load import read_plan
from planrunner.plan.params import apply as apply_parameters
from planrunner.plan.params import resolve_values
from planrunner.plan.yamlsafe import load_yaml
from planrunner.record.build import RunFacts, build_record, environment
from planrunner.record.canonical import RECORD_HASH_FIELD, differences, record_sha256
from planrunner.record.permutation import count_value
from planrunner.record.rehearsal import is_rehearsal
from planrunner.trail.history import VerifyOutcome
from planrunner.trail.store import read_json, write_new_file

# Differences no larger than this (relative to the larger magnitude) are floating-point noise:
# another build or machine may add the same numbers in another order. Same environment: 0.
FLOAT_RELATIVE_TOLERANCE = 1e-9
# A Monte Carlo quantity whose record states its Monte Carlo s.d. may differ by this many s.d.
# when the random draws differ (docs/VALIDATION.md V-TOL: about 4 MC s.d.).
MC_SDS = 4.0
HEADLINE = re.compile(r"^(analyses\[\d+\]\.(estimate|standard_error|bias|p_value|intervals|adjusted_p_values)"
                      r"|datasets)")
MC_FIELDS = {"standard_error": "standard_error_sd", "bias": "bias_sd", "p_value": "p_value_sd"}
# records written before counts past 2**53 - 1 became strings of digits held them as JSON integers
SAME_WHOLE_NUMBER = "the same whole number (written as its decimal digits past 2**53 - 1)"


@dataclass(frozen=True)
class FieldDifference:
    path: str
    recorded: Any
    rerun: Any
    difference: float | None  # |recorded - rerun| for numbers
    tolerance: float | None
    within: bool
    rule: str  # which tolerance applied


@dataclass(frozen=True)
class VerifyReport:
    record_file: Path
    plan_file: Path
    problems: list[tuple[str, str]]  # (field, what): each is a failure
    notes: list[str]  # stated, not failures (package versions)
    differences: list[FieldDifference]
    compared: int  # numbers compared
    rerun: bool  # False when the data could not be re-read
    plan_changes: list[str] = field(default_factory=list)
    causes: list[str] = field(default_factory=list)  # what changed under the run (data files), said first
    basis: Basis | None = None  # how the re-run was compared (None when there was no re-run)
    rehearsal: bool = False  # a rehearsal's record: re-run on dummy data made again from its seed, never a result

    def kinds(self) -> list[tuple[str, int]]:
        """Differing fields counted by kind (the path with its list positions left out), most first."""
        counts: dict[str, int] = {}
        for d in self.differences:
            kind = re.sub(r"\[\d+\]", "[]", d.path)
            counts[kind] = counts.get(kind, 0) + 1
        return sorted(counts.items(), key=lambda item: (-item[1], item[0]))

    @property
    def passed(self) -> bool:
        return not self.problems and all(d.within for d in self.differences)

    @property
    def largest(self) -> FieldDifference | None:
        numeric = [d for d in self.differences if d.difference is not None]
        return max(numeric, key=lambda d: d.difference or 0.0) if numeric else None


def find_plan(record_file: Path, record: dict, plan: str | Path | None) -> Path:
    """The plan file beside which the data live: given, or found above the run folder."""
    if plan is not None:
        found = Path(plan)
        if not found.is_file():
            raise PlanError("plan file not found", where=str(found))
        return found
    name = record["plan"]["file"]
    for folder in list(record_file.resolve().parents)[:4]:
        if (folder / name).is_file():
            return folder / name
    raise PlanError(f"cannot find the plan '{name}' above {record_file.parent}",
                    hint="name it with --plan PATH (its folder holds the data files)")


def _numbers(value: Any) -> int:
    if isinstance(value, dict):
        return sum(_numbers(v) for v in value.values())
    if isinstance(value, list):
        return sum(_numbers(v) for v in value)
    return int(isinstance(value, (int, float)) and not isinstance(value, bool))


@dataclass(frozen=True)
class Basis:
    """What this installation knows about how its re-run may differ from the recorded run.

    Nothing here is taken from the record alone: whoever holds a record can edit any field of it
    (`environment` included) and recompute its hash. The Monte Carlo tolerance therefore depends only
    on this installation's own draws, checked against the reference draws (`streams.draws_sha256`).
    """

    same_environment: bool  # the recorded environment is this installation's, field for field
    reference_draws: bool  # this installation draws planrunner's reference random numbers

    @property
    def monte_carlo(self) -> bool:
        """Whether the re-run may draw other resamples than the run: only on an installation whose
        own draws are not the reference ones, for a record that names another environment."""
        return not self.same_environment and not self.reference_draws

    def statement(self) -> str:
        if self.same_environment:
            return ("the recorded environment is this one, so the re-run draws the same resamples and does "
                    "the same arithmetic: every number must be equal bit for bit")
        if self.reference_draws:
            return ("another environment than the recorded one: numbers may differ by rounding (relative "
                    "1e-9); this installation draws the reference random numbers, so the re-run draws the "
                    "same resamples and no Monte Carlo tolerance applies")
        return ("this installation draws other random numbers than the reference ones, so its re-run draws "
                "other resamples: standard errors, biases and p-values may differ by "
                f"{MC_SDS:g} of their stated Monte Carlo s.d.; interval ends and other resampled quantities "
                "will differ too, and are reported as differences")


def _judge(path: str, before: Any, after: Any, recorded: dict, basis: Basis) -> FieldDifference:
    """How far a re-run field is from the recorded one, and whether that is within the tolerance
    that ``basis`` allows."""
    numeric = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (before, after))
    if not numeric:
        same = count_value(before)
        if same is not None and same == count_value(after):  # 2**53 or more, as a JSON integer before
            return FieldDifference(path, before, after, 0.0, 0.0, True, SAME_WHOLE_NUMBER)
        return FieldDifference(path, before, after, None, None, False, "must be equal")
    try:
        diff = abs(float(before - after))  # exact for two integers, however large
    except OverflowError:  # past 1.8e308 apart
        diff = math.inf
    if basis.same_environment:
        return FieldDifference(path, before, after, diff, 0.0, False, "same environment: bit for bit")
    scale = max(_magnitude(before), _magnitude(after))
    fp = FLOAT_RELATIVE_TOLERANCE * scale
    if diff <= fp and not isinstance(before, int):
        return FieldDifference(path, before, after, diff, fp, True, "floating point (relative 1e-9)")
    # analyses[3].standard_error -> the stated Monte Carlo s.d. of that analysis
    head, _, leaf = path.rpartition(".")
    if basis.monte_carlo and leaf in MC_FIELDS and head.startswith("analyses[") and head.endswith("]"):
        index = int(head[len("analyses["):-1])
        sd = ((recorded["analyses"][index].get("monte_carlo") or {}).get(MC_FIELDS[leaf])
              if index < len(recorded["analyses"]) else None)
        if isinstance(sd, (int, float)) and sd > 0:
            return FieldDifference(path, before, after, diff, MC_SDS * sd, diff <= MC_SDS * sd,
                                   f"Monte Carlo ({MC_SDS:g} stated s.d.)")
    if isinstance(before, int) and isinstance(after, int):
        return FieldDifference(path, before, after, diff, 0.0, False, "counts must be equal")
    return FieldDifference(path, before, after, diff, fp, False, "floating point (relative 1e-9)")


def _magnitude(x: int | float) -> float:
    try:
        return abs(float(x))
    except OverflowError:  # an integer past the float range
        return math.inf


def draws_are_reference() -> bool:
    """Whether this installation draws planrunner's reference random numbers (a fact of this
    installation, checked each time: never read from a record)."""
    return draws_sha256() == REFERENCE_DRAWS_SHA256


def verify_record(path: str | Path, *, plan: str | Path | None = None, execution: Execution | None = None,
                  data_root: str | Path | None = None) -> VerifyReport:
    """Re-hash the data, re-run every analysis from the recorded plan (on ``execution``, serial by
    default; the data under ``data_root`` when given, as ``run --data-root``), and compare every field."""
    record_file, recorded = read_record(path)
    problems: list[tuple[str, str]] = []
    notes: list[str] = []
    stored = recorded.get(RECORD_HASH_FIELD)
    if stored is None:
        problems.append((RECORD_HASH_FIELD, "the record carries no hash of its own content"))
    elif stored != record_sha256(recorded):
        problems.append((RECORD_HASH_FIELD, "the record was changed after it was written "
                                            "(its content no longer matches its own hash)"))
    plan_file = find_plan(record_file, recorded, plan)
    plan_changes: list[str] = []
    plan_sha, _ = file_sha256(plan_file)
    if plan_sha != recorded["plan"]["sha256"]:
        problems.append(("plan.sha256", f"the plan file {plan_file} is not the recorded plan (changed since the "
                                         "run, or the plan of another record: name the right one with --plan)"))
        try:
            now = load_yaml(plan_file.read_text(encoding="utf-8"), str(plan_file)).data
            then = load_yaml(recorded["plan"]["text"], "recorded plan").data
            plan_changes = [f"{d.path}: recorded {d.before!r}, now {d.after!r}" for d in differences(then, now)]
        except (PlanrunnerError, UnicodeDecodeError):
            plan_changes = ["the plan file can no longer be read as YAML"]
        if not plan_changes:
            plan_changes = ["only comments or layout changed (the parsed content is the same)"]

    env_now = environment()
    for d in differences(recorded.get("environment", {}), env_now):
        notes.append(f"environment.{d.path}: recorded {d.before!r}, now {d.after!r}")
    basis = Basis(same_environment=not notes, reference_draws=draws_are_reference())

    # re-run the plan exactly as recorded, with the data from the plan's folder
    try:
        with tempfile.TemporaryDirectory(prefix="planrunner-verify-") as tmp:
            copy = Path(tmp) / recorded["plan"]["file"]
            copy.write_text(recorded["plan"]["text"], encoding="utf-8", newline="")
            loaded = read_plan(copy)
        loaded = replace(loaded, file=plan_file.resolve())
        values = resolve_values(loaded.plan, recorded.get("parameters") or {})
    except PlanrunnerError as exc:
        message = str(exc).replace(str(copy), "recorded plan")
        problems.append(("plan.text", f"this installation cannot re-run the recorded plan: {message}"))
        return VerifyReport(record_file, plan_file, problems, notes, [], 0, False, plan_changes)
    loaded = replace(loaded, plan=apply_parameters(loaded.plan, values))
    execution = execution or Execution()
    with ExitStack() as stack:
        stack.enter_context(early_workers(execution))  # worker processes start while the data are read
        rehearsal = None
        if is_rehearsal(recorded):  # its data are dummy files, made again from the recorded seed and sizes
            rehearsal, data_root = _rehearsal_data(stack, loaded, recorded, record_file, data_root, problems)
            if rehearsal is None:
                return VerifyReport(record_file, plan_file, problems, notes, [], 0, False, plan_changes, rehearsal=True)
        report = _rerun(record_file, plan_file, recorded, loaded, values, problems, notes, plan_changes, basis,
                        execution, data_root, rehearsal)
    return report


def _rehearsal_data(stack: ExitStack, loaded: Any, recorded: dict, record_file: Path, data_root: str | Path | None,
                    problems: list[tuple[str, str]]) -> tuple[dict | None, Path | None]:
    """A rehearsal's dummy files made again from its recorded seed and sizes (in a temporary data root
    that ``stack`` removes), and the `rehearsal` field they give; the copies kept in the rehearsal
    folder are checked against the record too. (None, None) when they cannot be made."""
    from planrunner.pipeline.rehearse import dummy_root, regenerated
    entry = recorded["rehearsal"]
    if data_root is not None:
        problems.append(("rehearsal", "a rehearsal's data are made again from its seed; --data-root does not apply"))
        return None, None
    try:
        files, rehearsal = regenerated(loaded, int(entry["seed"]), int(entry["units"]))
    except (PlanrunnerError, KeyError, TypeError, ValueError) as exc:
        problems.append(("rehearsal", f"the dummy data cannot be made again from the recorded seed and sizes: {exc}"))
        return None, None
    kept = record_file.parent / str(entry.get("folder") or "")
    # another generator (an older planrunner) may write other bytes from the same seed
    cause = ("changed after the rehearsal" if entry.get("generator") == rehearsal["generator"] else
             f"made by dummy-data generator {entry.get('generator')}, this planrunner has {rehearsal['generator']}: "
             "rehearse again")
    for i, f in enumerate(files):
        copy = kept / f.file
        if copy.is_file() and file_sha256(copy)[0] != f.sha256:
            problems.append((f"rehearsal.datasets[{i}].sha256", f"the dummy file kept at {copy} is not the one the "
                                                                f"recorded seed makes ({cause})"))
    return rehearsal, stack.enter_context(dummy_root(files))


def _rerun(record_file: Path, plan_file: Path, recorded: dict, loaded: Any, values: dict[str, str],
           problems: list[tuple[str, str]], notes: list[str], plan_changes: list[str], basis: Basis,
           execution: Execution | None, data_root: str | Path | None, rehearsal: dict | None) -> VerifyReport:
    """Hash the data files, re-run every analysis on them and compare the record built again."""
    is_rehearsal_record = rehearsal is not None
    changed: dict[str, tuple[str, str]] = {}  # file -> (recorded sha256, current sha256)
    for i, ds in enumerate(recorded["datasets"]):
        try:
            sha, _ = file_sha256(resolve_data_path(loaded.folder, ds["file"],
                                                   data_root=None if data_root is None else Path(data_root)))
        except (OSError, PlanrunnerError) as exc:
            problems.append((f"datasets[{i}].sha256", f"data file {ds['file']} cannot be read: {exc}"))
            continue
        if sha != ds["sha256"]:
            problems.append((f"datasets[{i}].sha256",
                             f"data file {ds['file']} has changed: recorded {ds['sha256']}, now {sha}"))
            changed[ds["file"]] = (ds["sha256"], sha)
    try:
        tables = load_tables(loaded, data_root)
    except PlanrunnerError as exc:
        problems.append(("datasets", f"the analyses cannot be re-run on the data as they are now: {exc}"))
        return VerifyReport(record_file, plan_file, problems, notes, [], 0, False, plan_changes,
                            data_causes(recorded, changed, {}), rehearsal=is_rehearsal_record)
    causes = data_causes(recorded, changed, tables)
    try:
        jobs = compile_jobs(loaded.plan, tables)
        results, max_t = execute_plan(loaded.plan, jobs, execution=execution)
    except PlanrunnerError as exc:
        problems.append(("datasets", f"the analyses cannot be re-run on the data as they are now: {exc}"))
        return VerifyReport(record_file, plan_file, problems, notes, [], 0, False, plan_changes, causes,
                            rehearsal=is_rehearsal_record)
    # who, when, on what machine and on which executor are facts of the original run, not results
    # to reproduce (the executor never changes a number: the re-run checks that too)
    facts = RunFacts(run_id=recorded["run_id"], started_utc=recorded["started_utc"],
                     finished_utc=recorded["finished_utc"], operator=recorded["operator"],
                     command=tuple(recorded["command"]), execution=recorded.get("execution"),
                     environment=recorded.get("environment"), lock=(recorded.get("plan") or {}).get("lock"),
                     parameters=values, rehearsal=rehearsal)
    rerun = build_record(loaded, tables, jobs, results, max_t, facts)
    found = [_judge(d.path, d.before, d.after, recorded, basis)
             for d in differences({k: v for k, v in recorded.items() if k != RECORD_HASH_FIELD},
                                  {k: v for k, v in rerun.items() if k != RECORD_HASH_FIELD})]
    found.sort(key=lambda d: HEADLINE.match(d.path) is None)  # the reported numbers first (stable sort)
    return VerifyReport(record_file, plan_file, problems, notes, found, _numbers(recorded), True, plan_changes,
                        causes, basis, is_rehearsal_record)


def verify_outcome(report: VerifyReport, signatures_passed: bool) -> VerifyOutcome:
    """What the verify log keeps of a report: the verdict `verify` prints and how it was reached."""
    outside = sum(not d.within for d in report.differences)
    passed = report.passed and signatures_passed
    if not report.rerun:
        summary = "not re-run: " + (report.problems[0][1] if report.problems else "the analyses could not be re-run")
    elif report.problems:
        summary = f"{len(report.problems)} problem(s): " + ", ".join(where for where, _ in report.problems)
    elif outside:
        summary = f"{outside} field(s) outside tolerance"
    elif report.differences:
        summary = f"within tolerance ({len(report.differences)} field(s) differ)"
    else:
        summary = "identical"
    if report.rerun and not report.problems and not signatures_passed:
        summary += "; signatures fail"
    basis = report.basis
    comparison = ("" if basis is None else "same environment" if basis.same_environment
                  else "reference draws" if basis.reference_draws else "other draws")
    return VerifyOutcome(passed=passed, summary=summary, fields_differing=len(report.differences),
                         fields_outside=outside, problems=tuple(where for where, _ in report.problems),
                         signatures_passed=signatures_passed, comparison=comparison)


@dataclass(frozen=True)
class VerifyLogged:
    log: Path  # verifications.jsonl
    entry: dict
    index: Path | None  # the index page, rewritten to show it
    index_problem: str | None = None  # why the index page could not be rewritten (the entry is in the log)


def log_verification(report: VerifyReport, signatures_passed: bool, *, operator: str,
                     verified_utc: str) -> VerifyLogged | None:
    """Append this verify to the verify log beside the run's history (`verifications.jsonl`) and
    rewrite the index page there; None when no history logs the run (a copy elsewhere, history off, a
    rehearsal): nothing is written then. Raises OutputError when the log cannot be appended to."""
    from planrunner import __version__
    from planrunner.trail.files import append_verification, verify_log_for
    from planrunner.trail.history import VERIFY_FILE, new_verification
    from planrunner.trail.index import refresh_index

    _, record = read_record(report.record_file)
    out_root = None if report.rehearsal else verify_log_for(report.record_file, record)
    if out_root is None:
        return None
    outcome = verify_outcome(report, signatures_passed)
    entry = append_verification(out_root, lambda last: new_verification(
        last, record, report.record_file.resolve().parent.name, verified_utc=verified_utc, operator=operator,
        planrunner=__version__, outcome=outcome))
    try:
        return VerifyLogged(out_root / VERIFY_FILE, entry, refresh_index(out_root))
    except (PlanrunnerError, OSError) as exc:  # the page is a view: the entry is kept whatever happens to it
        return VerifyLogged(out_root / VERIFY_FILE, entry, None, str(exc))


def data_causes(recorded: dict, changed: dict[str, tuple[str, str]], tables: dict[str, Any]) -> list[str]:
    """One sentence per data file that changed since the run: its hashes and rows read and used, then and now."""
    now = {t.file: t for t in tables.values()}
    causes = []
    for ds in recorded["datasets"]:
        if ds["file"] not in changed:
            continue
        then_sha, now_sha = changed[ds["file"]]
        sentence = f"data file {ds['file']} changed since the run (sha256 {then_sha[:12]}… then, {now_sha[:12]}… now)"
        table = now.get(ds["file"])
        if table is not None:
            sentence += (f": {ds.get('rows_read')} rows read then, {table.rows_read} now; "
                         f"{ds.get('rows_used')} used then, {table.rows_used} now")
        causes.append(sentence)
    return causes


def differences_text(report: VerifyReport) -> str:
    """Every differing field, one per line, tab-separated (the file verify writes beside its summary)."""
    lines = ["field\trecorded\tre-run\t|difference|\ttolerance\tverdict\trule"]
    for d in report.differences:
        lines.append("\t".join([d.path, json.dumps(d.recorded), json.dumps(d.rerun),
                                "" if d.difference is None else repr(d.difference),
                                "" if d.tolerance is None else repr(d.tolerance),
                                "within" if d.within else "OUTSIDE", d.rule]))
    return "\n".join(lines) + "\n"


def describe(value: Any, width: int = 36) -> str:
    if isinstance(value, float):
        text = repr(value)
    elif isinstance(value, (dict, list)):
        text = json.dumps(value, sort_keys=True)
    else:
        text = str(value)
    return text if len(text) <= width else text[: width - 1] + "…"


def finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


# --- compare ---------------------------------------------------------------------------------------

def compare_files(a: str | Path, b: str | Path) -> dict:
    from planrunner.report.compare import compare_records
    _, record_a = read_record(a)
    _, record_b = read_record(b)
    return compare_records(record_a, record_b)


def write_report(path: str | Path, text: str) -> Path:
    """Write a report the user named; an existing file is never overwritten."""
    return write_new_file(path, text, what="report", hint="choose a new file name")


# --- self-check ------------------------------------------------------------------------------------

SELFCHECK_FORMAT = "planrunner.selfcheck/1"
SELFCHECK_HASH_FIELD = "report_sha256"

# A whole plan, run and verified through the installed package (data: E&T Table 2.1, mouse survival)
_E2E_PLAN = """\
plan: selfcheck-mouse
title: Self-check, mouse survival (E&T Table 2.1)
seed: 20261201
datasets:
  mouse:
    file: mouse.csv
    columns:
      group: {type: category, levels: [treatment, control]}
      days: {type: number}
analyses:
  - id: exact-permutation
    data: mouse
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: permutation
    alternative: greater
    resamples: 20000
  - id: jackknife-difference
    role: secondary
    data: mouse
    outcome: days
    groups: {by: group, compare: [treatment, control]}
    statistic: mean_difference
    method: jackknife
"""


def _end_to_end_cases(clock: Any) -> list[dict]:
    from planrunner.audit.selfcheck import MOUSE_CONTROL, MOUSE_TREATMENT
    from planrunner.pipeline.run import run_plan
    rows = ["group,days"] + [f"treatment,{v}" for v in MOUSE_TREATMENT] + [f"control,{v}" for v in MOUSE_CONTROL]
    cases = []
    with tempfile.TemporaryDirectory(prefix="planrunner-selfcheck-") as tmp:
        folder = Path(tmp)
        (folder / "mouse.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
        (folder / "plan.yaml").write_text(_E2E_PLAN, encoding="utf-8")
        try:
            outcome = run_plan(folder / "plan.yaml", operator="selfcheck", clock=clock, history=False)
            by_id = {a["id"]: a for a in outcome.record["analyses"]}
            obtained = [by_id["exact-permutation"]["p_value"], by_id["jackknife-difference"]["standard_error"]]
            report = verify_record(outcome.folder / "record.json")
            verified = 0.0 if report.passed else 1.0
            error = None
        except Exception as exc:  # a failing case is reported, never hidden
            obtained, verified, error = [None, None], None, f"{type(exc).__name__}: {exc}"
    specs = [("E2E permutation", "plan → run → record: exact permutation p (mean difference, greater)",
              "V-MOUSE-PERM, exact 1613/11440", 1613 / 11440, 1e-12, obtained[0]),
             ("E2E jackknife", "plan → run → record: two-sample jackknife SE of the mean difference",
              "identity 6; V-MOUSE-PERM", 28.936067137, 1e-8, obtained[1]),
             ("E2E verify", "verify re-runs the record: number of fields outside tolerance",
              "exact (a re-run on the same installation must be identical)", 0.0, 0.0, verified)]
    for cid, quantity, source, expected, tol, got in specs:
        ok = error is None and isinstance(got, (int, float)) and abs(got - expected) <= tol
        cases.append({"id": cid, "quantity": quantity, "source": source, "expected": expected, "obtained": got,
                      "tolerance": tol, "difference": abs(got - expected) if isinstance(got, (int, float)) else None,
                      "passed": bool(ok), "error": error})
    return cases


def run_selfcheck(clock: Any = None) -> dict:
    """Every self-check case, with the versions and platform, hashed for integrity."""
    import platform

    from planrunner.audit.selfcheck import CASES, run_case
    from planrunner.pipeline.run import utc_now, utc_stamp
    from planrunner.record.canonical import self_hash
    clock = clock or utc_now
    started = clock()
    cases = [run_case(c) for c in CASES] + _end_to_end_cases(clock)
    report = {
        "format": SELFCHECK_FORMAT,
        "created_utc": utc_stamp(started),
        "environment": {**environment(), "processor": platform.processor()},
        "cases": cases,
        "passed": sum(c["passed"] for c in cases),
        "failed": sum(not c["passed"] for c in cases),
        "all_passed": all(c["passed"] for c in cases),
    }
    report[SELFCHECK_HASH_FIELD] = self_hash(report, SELFCHECK_HASH_FIELD)
    return report


def check_selfcheck_report(path: str | Path) -> tuple[dict, bool]:
    """A self-check report and whether its content still matches its own hash."""
    from planrunner.record.canonical import self_hash
    report = read_json(path, "self-check report", hint="name a report written by 'planrunner selfcheck'")
    if not isinstance(report, dict) or report.get("format") != SELFCHECK_FORMAT:
        raise RecordError(f"not a self-check report (format {SELFCHECK_FORMAT} expected)", where=str(path))
    return report, report.get(SELFCHECK_HASH_FIELD) == self_hash(report, SELFCHECK_HASH_FIELD)
