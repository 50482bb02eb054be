"""The record: one JSON document that holds every number of a run and how to reproduce it.

The record is the single source of truth (field names: README, The record); the HTML and Markdown
reports are views of it. It is built once, here, from the run's inputs and results, and nothing
changes it afterwards:

    result ──(its record adapter: bootstrap, jackknife, permutation)──▶ MethodFields
    max-T run / members' p-values ──(families adapter)──▶ FamilyFields
    plan + job + MethodFields + the member's part of each FamilyFields ──▶ analysis entry
    entries + families + datasets + seed + RunFacts ──▶ record (+ methods text, own hash)

Non-finite numbers never reach the JSON: they become null and their path is listed under
`nonfinite`.
"""

from __future__ import annotations

import importlib.metadata
import json
import math
import platform
import sys
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

from planrunner import __version__
from planrunner.compile.jobs import Job
from planrunner.data.sets import select, set_entries
from planrunner.data.tables import Table
from planrunner.engines.bootstrap import BootstrapOptions
from planrunner.engines.maxt import MaxTResult
from planrunner.engines.results import BootstrapResult, JackknifeResult, ModelBootstrapResult, PermutationResult
from planrunner.engines.statistics import comparison_word
from planrunner.engines.streams import DRAW_BLOCK, GENERATOR
from planrunner.plan.derived import dataset_columns
from planrunner.plan.load import LoadedPlan
from planrunner.plan.schema import Analysis, Plan
from planrunner.record.bootstrap import bootstrap_fields
from planrunner.record.canonical import RECORD_HASH_FIELD, record_sha256
from planrunner.record.decisions import decision_entry
from planrunner.record.describe import descriptives
from planrunner.record.families import FamilyFields, Member, adjusted_family_fields, max_t_family_fields
from planrunner.record.fields import MethodFields
from planrunner.record.jackknife import jackknife_fields
from planrunner.record.methods import methods_text
from planrunner.record.permutation import permutation_fields
from planrunner.record.rehearsal import STAMP as REHEARSAL_STAMP
from planrunner.record.survival import kaplan_meier_details

FORMAT = "planrunner.record/1"
PACKAGES = ("numpy", "scipy", "pandas", "pydantic", "pyyaml", "jinja2")
CAUTION = (
    "These results are computations under the assumptions stated in the plan and in this record "
    "(the resampling scheme, the statistic, the data as read). They are not a decision. Decisions "
    "about patients, products, releases or compliance rest with qualified people and with the "
    "regulations, guidance and procedures that govern them locally."
)
SEED_DERIVATION = (
    "numpy SeedSequence(entropy=root seed, spawn_key=(K, b)) with K the first 8 bytes of "
    "SHA-256(analysis id) read as a big-endian integer and b the index of a block of "
    f"{DRAW_BLOCK} resamples; one {GENERATOR} generator per block"
)
SERIAL = {"executor": "serial", "workers": 1, "scheduler": None}
Result = BootstrapResult | JackknifeResult | PermutationResult  # every engine result has an adapter


@dataclass(frozen=True)
class RunFacts:
    """Who ran the plan, when, where and against which lock: facts of the run, not results.

    ``environment`` None means this installation (verify passes the recorded one); ``execution``
    None means serial. Neither ever changes a number.
    """

    run_id: str
    started_utc: str
    finished_utc: str
    operator: str
    command: tuple[str, ...]
    execution: dict[str, Any] | None = None
    environment: dict[str, Any] | None = None
    lock: dict[str, Any] | None = None  # the record's plan.lock entry (deviations), None without a lock
    parameters: dict[str, str] = field(default_factory=dict)
    # a rehearsal on dummy data (pipeline/rehearse.py): its seed, sizes and files; None for a real run
    rehearsal: dict[str, Any] | None = None


def environment() -> dict[str, Any]:
    packages: dict[str, str | None] = {}
    for name in PACKAGES:
        try:
            packages[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            packages[name] = None
    return {"python": sys.version.split()[0], "implementation": platform.python_implementation(),
            "platform": platform.platform(), "machine": platform.machine(),
            "packages": packages, "planrunner": __version__}


def question(analysis: Analysis, statistic_label: str, unit: str | None) -> str:
    """The analysis in words, e.g. 'foam minus standard: difference in medians of minutes_above_8c'."""
    what = f"{statistic_label} of {analysis.outcome}" + (f" ({unit})" if unit else "")
    if analysis.predictor is not None:
        what = f"{statistic_label} of {analysis.predictor} and {analysis.outcome}"
    if analysis.groups is not None and len(analysis.groups.compare) == 2:
        first, second = analysis.groups.compare
        what = f"{first} {comparison_word(analysis.statistic)} {second} by {analysis.groups.by}: {what}"
    elif analysis.groups is not None:
        what = f"{', '.join(analysis.groups.compare)} by {analysis.groups.by}: {what}"
    if analysis.strata is not None:
        what += f", within strata of {analysis.strata}"
    for key, words in (("pairs", "paired by"), ("clusters", "clusters of"), ("covariates", "adjusted for")):
        value = getattr(analysis, key, None)
        if value:
            what += f", {words} {', '.join(value) if isinstance(value, list) else value}"
    return what


# the record adapter of each result type: (result, job, bins) -> MethodFields
ADAPTERS: dict[type, Callable[[Any, Job, int], MethodFields]] = {
    BootstrapResult: lambda result, job, bins: bootstrap_fields(
        result, bins, save_distribution=isinstance(job.options, BootstrapOptions) and job.options.save_distribution),
    ModelBootstrapResult: lambda result, job, bins: replace(
        bootstrap_fields(result, bins, save_distribution=getattr(job.options, "save_distribution", False)),
        p_value=result.p_value),
    JackknifeResult: lambda result, job, bins: jackknife_fields(result, bins),
    PermutationResult: lambda result, job, bins: permutation_fields(result, bins),
}


def method_fields(result: Result, job: Job, bins: int) -> MethodFields:
    """The result's record fields, from the adapter of its type."""
    return ADAPTERS[type(result)](result, job, bins)


def family_fields(plan: Plan, fields: dict[str, MethodFields],
                  max_t: dict[int, MaxTResult]) -> list[FamilyFields]:
    """Every multiplicity family of the plan, in plan order (``max_t``: the execute stage's joint
    run of each max-t family, by family index)."""
    alpha = 1.0 - plan.defaults.confidence
    out = []
    for j, fam in enumerate(plan.multiplicity):
        members = [Member(i, fields[i].p_value, fields[i].smallest_p) for i in fam.family]
        out.append(max_t_family_fields(members, alpha, max_t[j]) if fam.method == "max-t"
                   else adjusted_family_fields(fam.method, members, alpha))
    return out


def analysis_entry(loaded: LoadedPlan, analysis: Analysis, job: Job, result: Result, fields: MethodFields,
                   families: list[FamilyFields]) -> dict[str, Any]:
    """One analysis's numbers, with everything needed to re-derive them."""
    plan = loaded.plan
    unit = dataset_columns(plan.datasets[analysis.data])[analysis.outcome].unit
    adjusted, family_warnings = [], []
    for family in families:
        mine = family.for_member(analysis.id)
        adjusted += mine[0]
        family_warnings += mine[1]
    numbers = fields.entry_fields()
    return {
        "id": analysis.id,
        "title": analysis.title,
        "role": analysis.role,
        "estimand": analysis.estimand,
        "question": question(analysis, job.statistic.label, unit),
        "data": analysis.data,
        **({"set": analysis.set} if analysis.set is not None else {}),
        "outcome": analysis.outcome,
        "predictor": analysis.predictor,
        "unit": unit,
        "groups": None if analysis.groups is None else {"by": analysis.groups.by,
                                                        "compare": list(analysis.groups.compare)},
        "strata": analysis.strata,
        "method": analysis.method,
        "statistic": job.statistic.name,
        "statistic_label": job.statistic.label,
        "settings": job.settings(),
        "stream": job.stream.describe(),
        "n": job.counts(),
        "scheme": result.scheme,
        "warnings": [{"code": w.code, "message": w.message} for w in (*job.warnings, *result.warnings)]
        + family_warnings,
        "statistic_parameter": None if job.statistic.parameter is None
        else {job.statistic.parameter: job.statistic.value},
        "design": {"pairs": analysis.pairs, "clusters": analysis.clusters, "order": analysis.order},
        # fields that a method does not produce keep their defaults, so every entry has the same shape
        **{key: numbers[key] for key in ("estimate", "standard_error", "bias", "p_value")},
        "intervals": prespecified(numbers["intervals"]),
        "adjusted_p_values": adjusted,
        "decision": decision_entry(analysis, plan, fields, result),
        **{key: numbers[key] for key in ("alternative", "exact", "resamples", "monte_carlo")},
        "details": _with_curves(numbers["details"], job),
        "distribution": numbers["distribution"],
        "precision": numbers["precision"],
    }


def _with_curves(details: Any, job: Job) -> Any:
    """A censored analysis's details gain the Kaplan–Meier curve of each group (the report draws it)."""
    curves = kaplan_meier_details(job)
    return details if curves is None else {**details, "kaplan_meier": curves}


def prespecified(intervals: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The intervals with their flag: the first listed in the plan is the pre-specified one, the
    others are supplementary (README: Estimands, roles and the pre-specified interval)."""
    return [{**interval, "prespecified": k == 0} for k, interval in enumerate(intervals)]


def estimands_entry(plan: Plan) -> dict[str, Any]:
    """The plan's estimands with their five attributes, as written."""
    return {name: {"population": e.population, "treatment": e.treatment, "endpoint": e.endpoint,
                   "intercurrent_events": [{"event": ev.event, "strategy": ev.strategy}
                                           for ev in e.intercurrent_events],
                   "summary": e.summary} for name, e in plan.estimands.items()}


def build_record(loaded: LoadedPlan, tables: dict[str, Table], jobs: list[Job], results: list[Result],
                 max_t: dict[int, MaxTResult], facts: RunFacts) -> dict:
    """The record, built once: nothing edits it afterwards (its own hash covers every field)."""
    plan = loaded.plan
    bins = plan.report.bins
    fields = [method_fields(r, j, bins) for r, j in zip(results, jobs)]
    families = family_fields(plan, {a.id: f for a, f in zip(plan.analyses, fields)}, max_t)
    record = sanitize({
        "format": FORMAT,
        "run_id": facts.run_id,
        "started_utc": facts.started_utc,
        "finished_utc": facts.finished_utc,
        "operator": facts.operator,
        "command": list(facts.command),
        "plan": {"id": plan.plan, "title": plan.title, "description": plan.description,
                 "file": loaded.file.name, "sha256": loaded.sha256, "text": loaded.text, "lock": None},
        "estimands": estimands_entry(plan),
        "datasets": [{"name": t.name, "file": t.file, "sha256": t.sha256, "bytes": t.bytes,
                      "format": t.format, "dictionary": [
                          {"column": e.name, "label": e.label, "display_format": e.display_format,
                           "stored_as": e.stored_as} for e in t.dictionary],
                      "rows_read": t.rows_read, "rows_used": t.rows_used, "ignored_columns": list(t.ignored_columns),
                      "excluded": [{"reason": e.reason, "rows": e.rows, "first_lines": list(e.lines)}
                                   for e in t.excluded],
                      # only a dataset that derives columns lists them: older records stay as they were
                      **({"derived": [{"name": n, "expression": x, "type": k} for n, x, k in t.derived]}
                         if t.derived else {}),
                      # only a dataset with analysis sets lists them (each set's rows and exclusions)
                      **({"sets": set_entries(t)} if t.sets else {})} for t in tables.values()],
        "environment": environment() if facts.environment is None else facts.environment,
        "seed": {"root": plan.seed, "generator": GENERATOR, "derivation": SEED_DERIVATION,
                 "draw_block": DRAW_BLOCK},
        "analyses": [{**analysis_entry(loaded, a, j, r, f, families),
                      # the descriptive table, from the dataset as read (record/describe.py)
                      "descriptives": descriptives(a, plan.datasets[a.data], select(tables[a.data], a.set))}
                     for a, j, r, f in zip(plan.analyses, jobs, results, fields)],
        "multiplicity": [family.entry for family in families],
        "report": {"note": plan.report.note, "bins": plan.report.bins},
        "caution": CAUTION,
        # how the jobs were run (executor, workers); informational, it never changes a number
        "execution": facts.execution or SERIAL,
    })
    # the audit fields come after `nonfinite`: the lock and the parameters are stated as they are
    audited = {**record, "plan": {**record["plan"], "lock": facts.lock}, "parameters": dict(facts.parameters)}
    if facts.rehearsal is not None:  # only a rehearsal has the field: a real run's record is as before
        audited["rehearsal"] = facts.rehearsal
    methods = methods_text(audited)
    # a methods paragraph is copied into papers: a rehearsal's says what it is in its first words
    described = {**audited, "methods_text": methods if facts.rehearsal is None
                 else f"{REHEARSAL_STAMP}. {methods}"}
    return {**described, RECORD_HASH_FIELD: record_sha256(described)}


def sanitize(record: dict) -> dict:
    """Replace NaN/inf by null and list where that happened (JSON has no such numbers)."""
    flagged: list[str] = []

    def walk(value: Any, path: str) -> Any:
        if isinstance(value, dict):
            return {k: walk(v, f"{path}.{k}" if path else k) for k, v in value.items()}
        if isinstance(value, list):
            return [walk(v, f"{path}[{i}]") for i, v in enumerate(value)]
        if isinstance(value, float) and not math.isfinite(value):
            flagged.append(path)
            return None
        return value

    clean = walk(record, "")
    clean["nonfinite"] = flagged
    return clean


def to_json(record: dict) -> str:
    """Canonical text: sorted keys, full-precision floats (repr round-trips), no NaN."""
    return json.dumps(record, sort_keys=True, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
