"""The qualification pack: installation, operational qualification and the traceability matrix.

`planrunner qualify --out DIR` writes `qualification.json` (`format: planrunner.qualification/1`,
carrying `qualification_sha256`, a hash of its own content) and `qualification.html`:

- installation: every file of the installed package checked against the SHA-256 listed in the
  wheel's RECORD (and any file the RECORD does not list), the version of every dependency and
  whether it meets the requirement, and the platform;
- operation: the self-check cases, and the demo plans run end to end and verified, each case with
  its source, expected and obtained value and tolerance;
- traceability: each README section that makes a promise, with the tests that check it.

It can be signed like a record (`planrunner sign DIR/qualification.json --meaning approved ...`).
"""

from __future__ import annotations

import base64
import csv
import hashlib
import importlib.metadata as metadata
import json
import platform
import re
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import planrunner
from planrunner.audit.trace import NO_PROMISE, TRACE, readme_sections
from planrunner.audit.verbs import run_selfcheck, verify_record
from planrunner.errors import OutputError, RecordError
from planrunner.record.canonical import self_hash
from planrunner.trail.signatures import QUALIFICATION_FORMAT, QUALIFICATION_HASH_FIELD

DISTRIBUTION = "planrunner"
PACK_JSON, PACK_HTML = "qualification.json", "qualification.html"
DEMO_PLANS = ("liner-trial", "monthly-fill", "ward-hygiene", "seal-endurance")


# --- installation ----------------------------------------------------------------------------------

def _record_digest(data: bytes, algorithm: str) -> str:
    """A file's hash as a wheel's RECORD writes it: urlsafe base64 without padding (PEP 376 / 427)."""
    return base64.urlsafe_b64encode(hashlib.new(algorithm, data).digest()).rstrip(b"=").decode("ascii")


def _installed_files(dist: metadata.Distribution) -> list[dict[str, Any]]:
    rows = []
    for row in csv.reader((dist.read_text("RECORD") or "").splitlines()):
        if len(row) < 2 or not row[0]:
            continue
        path, spec = row[0], row[1]
        entry: dict[str, Any] = {"path": path, "source": "RECORD", "expected": spec or None, "obtained": None,
                                 "tolerance": "equal", "status": "not hashed (RECORD lists no hash)"}
        if spec:
            algorithm, _, _ = spec.partition("=")
            try:
                data = Path(str(dist.locate_file(path))).read_bytes()
            except OSError:
                entry["status"] = "MISSING"
            else:
                entry["obtained"] = f"{algorithm}={_record_digest(data, algorithm)}"
                entry["status"] = "matches" if entry["obtained"] == spec else "CHANGED"
        rows.append(entry)
    return rows


def _unlisted(dist: metadata.Distribution, listed: set[str]) -> list[str]:
    """Files inside the installed package that the RECORD does not list (added after installation)."""
    package = Path(planrunner.__file__).resolve().parent
    root = Path(str(dist.locate_file(""))).resolve()
    found = []
    for file in sorted(package.rglob("*")):
        if file.is_file() and "__pycache__" not in file.parts:
            relative = file.relative_to(root).as_posix() if file.is_relative_to(root) else str(file)
            if relative not in listed:
                found.append(relative)
    return found


def installation() -> dict[str, Any]:
    dist = metadata.distribution(DISTRIBUTION)
    direct = json.loads(dist.read_text("direct_url.json") or "{}")
    editable = bool(direct.get("dir_info", {}).get("editable"))
    files = _installed_files(dist)
    package_files = [f for f in files if f["path"].startswith(f"{DISTRIBUTION}/")]
    imported = Path(planrunner.__file__).resolve().parent
    installed_at = Path(str(dist.locate_file(DISTRIBUTION))).resolve()
    elsewhere = not editable and imported != installed_at
    unlisted = [] if editable or elsewhere else _unlisted(dist, {f["path"] for f in files})
    bad = [f for f in files if f["status"] in ("CHANGED", "MISSING")]
    if editable:
        note = ("an editable (development) install: the package's files come from a source folder, not a "
                "wheel, so the RECORD covers none of them; install the wheel to qualify")
    elif elsewhere:
        note = (f"planrunner is imported from {imported}, not from the installed wheel at {installed_at} "
                "(run it outside the source folder to qualify the installation)")
    elif not package_files:
        note = "the RECORD lists none of the package's files"
    else:
        note = None
    return {"distribution": DISTRIBUTION, "version": dist.version, "location": str(Path(planrunner.__file__).parent),
            "editable": editable, "files": files, "checked": sum(f["obtained"] is not None for f in files),
            "changed_or_missing": [f["path"] for f in bad], "unlisted": unlisted, "note": note,
            "passed": note is None and not bad and not unlisted}


def _requirement(text: str) -> tuple[str, str] | None:
    """(name, version specifier) of a requirement that applies here, or None (an extra, another
    platform's requirement, or text that is not a requirement)."""
    from packaging.requirements import InvalidRequirement, Requirement
    try:
        requirement = Requirement(text)
    except InvalidRequirement:
        return None
    if requirement.marker is not None and not requirement.marker.evaluate({"extra": ""}):
        return None  # optional extras (dask, test) and other platforms' needs are not needed to run here
    return requirement.name, str(requirement.specifier)


def dependencies() -> list[dict[str, Any]]:
    """Every distribution planrunner needs here, directly or through another, with its installed version
    and whether that meets the requirement."""
    from packaging.specifiers import SpecifierSet
    seen: dict[str, dict[str, Any]] = {}
    queue = [(text, DISTRIBUTION, "direct") for text in metadata.distribution(DISTRIBUTION).requires or []]
    while queue:
        text, wanted_by, kind = queue.pop(0)
        parsed = _requirement(text)
        if parsed is None:
            continue
        name, spec = parsed
        key = re.sub(r"[-_.]+", "-", name).lower()
        if key in seen:
            continue
        try:
            dist: metadata.Distribution | None = metadata.distribution(name)
        except metadata.PackageNotFoundError:
            dist = None
        installed = dist.version if dist is not None else None
        meets = installed is not None and SpecifierSet(spec).contains(installed, prereleases=True)
        seen[key] = {"name": name, "required": spec or "any", "wanted_by": wanted_by, "kind": kind,
                     "installed": installed, "meets": meets}
        if dist is not None:
            queue += [(r, name, "indirect") for r in dist.requires or []]
    return sorted(seen.values(), key=lambda d: (d["kind"] != "direct", d["name"].lower()))


def platform_facts() -> dict[str, Any]:
    return {"python": platform.python_version(), "implementation": platform.python_implementation(),
            "platform": platform.platform(), "machine": platform.machine(), "processor": platform.processor(),
            "byteorder": sys.byteorder, "executable": sys.executable}


# --- operation -------------------------------------------------------------------------------------

def default_plans_folder() -> Path | None:
    """The demo plans of a source checkout or source distribution, when planrunner runs from one."""
    folder = Path(planrunner.__file__).resolve().parent.parent / "plans"
    return folder if folder.is_dir() else None


def _demo_case(plan: Path, clock: Callable[[], Any]) -> dict[str, Any]:
    from planrunner.pipeline.run import run_plan
    case = {"id": f"demo {plan.parent.name}", "quantity": "run end to end, then verify: fields outside tolerance",
            "source": f"{plan.parent.name}/{plan.name} (demo plan)", "expected": 0, "tolerance": 0,
            "obtained": None, "analyses": None, "numbers_compared": None, "passed": False, "error": None}
    try:
        with tempfile.TemporaryDirectory(prefix="planrunner-qualify-") as tmp:
            outcome = run_plan(plan, out=tmp, operator="qualify", clock=clock, history=False)
            report = verify_record(outcome.folder / "record.json", plan=plan)
            outside = sum(not d.within for d in report.differences) + len(report.problems)
            case.update(obtained=outside, analyses=len(outcome.record["analyses"]),
                        numbers_compared=report.compared, passed=report.passed and report.rerun)
    except Exception as exc:  # a failing case is reported, never hidden
        case["error"] = f"{type(exc).__name__}: {exc}"
    return case


def operation(plans: Path | None, clock: Callable[[], Any]) -> dict[str, Any]:
    selfcheck = run_selfcheck(clock)
    cases = [{**c, "kind": "self-check"} for c in selfcheck["cases"]]
    found = [plans / name / "plan.yaml" for name in DEMO_PLANS] if plans is not None else []
    missing = [str(p) for p in found if not p.is_file()]
    cases += [{**_demo_case(p, clock), "kind": "demo plan"} for p in found if p.is_file()]
    note = None if plans is not None and not missing else (
        "the demo plans were not found: name their folder with --plans DIR (they ship in the source "
        "distribution, under plans/)" if plans is None else f"missing demo plans: {', '.join(missing)}")
    return {"cases": cases, "plans_folder": None if plans is None else str(plans), "note": note,
            "passed": all(c["passed"] for c in cases) and note is None}


# --- traceability ----------------------------------------------------------------------------------

def readme_text() -> tuple[str, str]:
    """The README of the source tree beside the package, else the copy in the installed metadata."""
    beside = Path(planrunner.__file__).resolve().parent.parent / "README.md"
    if beside.is_file():
        return beside.read_text(encoding="utf-8"), str(beside)
    # the metadata is an email.message.Message; the PackageMetadata protocol does not declare get_payload
    description = metadata.distribution(DISTRIBUTION).metadata.get_payload() or ""  # type: ignore[attr-defined]
    return str(description), f"{DISTRIBUTION} {metadata.version(DISTRIBUTION)} METADATA (the README as installed)"


def tests_present(tests_folder: Path | None) -> dict[str, bool] | None:
    """Which test functions exist in the source tree's tests/ (None when it is not installed)."""
    if tests_folder is None or not tests_folder.is_dir():
        return None
    names = {}
    for file in tests_folder.glob("test_*.py"):
        for name in re.findall(r"^def (test_\w+)", file.read_text(encoding="utf-8"), flags=re.M):
            names[f"tests/{file.name}::{name}"] = True
    return names


def traceability() -> dict[str, Any]:
    text, source = readme_text()
    present = tests_present(Path(planrunner.__file__).resolve().parent.parent / "tests")
    rows, gaps = [], []
    for heading, line in readme_sections(text):
        tests = list(TRACE.get(heading, ()))
        if heading in NO_PROMISE:
            status = f"no promise: {NO_PROMISE[heading]}"
        elif not tests:
            status = "NOT TRACED"
            gaps.append(heading)
        elif present is not None and not all(present.get(t) for t in tests):
            status = "A TEST IS MISSING: " + ", ".join(t for t in tests if not present.get(t))
            gaps.append(heading)
        else:
            status = "traced"
        rows.append({"section": heading, "line": line, "tests": tests, "status": status})
    return {"readme": source, "tests_checked": present is not None, "rows": rows, "gaps": gaps,
            "passed": not gaps}


# --- the pack --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Pack:
    json_file: Path
    html_file: Path
    document: dict[str, Any]


def build_pack(plans: Path | None, clock: Callable[[], Any]) -> dict[str, Any]:
    from planrunner.pipeline.run import utc_stamp
    started = clock()
    document: dict[str, Any] = {
        "format": QUALIFICATION_FORMAT,
        "created_utc": utc_stamp(started),
        "planrunner": planrunner.__version__,
        "installation": installation(),
        "dependencies": dependencies(),
        "platform": platform_facts(),
        "operation": operation(plans, clock),
        "traceability": traceability(),
    }
    parts = {"installation": document["installation"]["passed"],
             "dependencies": all(d["meets"] is not False for d in document["dependencies"]),
             "operation": document["operation"]["passed"], "traceability": document["traceability"]["passed"]}
    document["summary"] = {**parts, "qualified": all(parts.values())}
    document[QUALIFICATION_HASH_FIELD] = self_hash(document, QUALIFICATION_HASH_FIELD)
    return document


def write_pack(out: str | Path, document: dict[str, Any]) -> Pack:
    """Write the JSON and the HTML into ``out`` (created if needed); existing files are never replaced."""
    from planrunner.report.qualification import render_html
    from planrunner.trail.store import write_new_file
    folder = Path(out)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the folder: {exc.strerror or exc}", where=str(folder)) from None
    for name in (PACK_JSON, PACK_HTML):
        if (folder / name).exists():
            raise OutputError("a qualification pack is there already; it is never replaced", where=str(folder / name),
                            hint="choose a new folder with --out")
    json_file = write_new_file(folder / PACK_JSON, json.dumps(document, indent=2, sort_keys=True,
                                                              ensure_ascii=False) + "\n", what="qualification pack")
    html_file = write_new_file(folder / PACK_HTML, render_html(document), what="qualification page")
    return Pack(json_file, html_file, document)


def check_pack(path: str | Path) -> tuple[dict[str, Any], bool]:
    """A pack and whether its content still matches its own hash."""
    file = Path(path)
    if file.is_dir():
        file = file / PACK_JSON
    from planrunner.trail.store import read_json
    document = read_json(file, "qualification pack", hint="name a qualification.json written by 'planrunner qualify'")
    if not isinstance(document, dict) or document.get("format") != QUALIFICATION_FORMAT:
        raise RecordError(f"not a qualification pack (format {QUALIFICATION_FORMAT} expected)", where=str(file))
    return document, document.get(QUALIFICATION_HASH_FIELD) == self_hash(document, QUALIFICATION_HASH_FIELD)
