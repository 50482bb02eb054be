"""Plan parameters: named values that fill `{name}` placeholders in data file paths and titles.

A monthly report runs the same plan on each new extract; the extract's name is the only thing
that changes, so it is the only thing a parameter may change. Placeholders are replaced in exactly
three places (`datasets.*.file`, `title`, `analyses[*].title`); nothing else in a plan is ever
templated, and a placeholder of a declared parameter anywhere else is refused. Values come from the
command line (`--param month=2026-11`), are checked against the declaration, and are recorded.
"""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Iterator
from typing import Any

from planrunner.errors import PlanError
from planrunner.plan.problems import did_you_mean
from planrunner.plan.schema import Parameter, Plan

PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)\}")
MAX_VALUE = 100
MAX_PATTERN = 200
# what a value may never hold, whatever its declaration says: it ends up inside a file path
FORBIDDEN = re.compile(r"[/\\{}\x00-\x1f\x7f]|\.\.")
TYPE_RULES = {
    "text": "any text",
    "integer": "a whole number such as 12",
    "date": "a date YYYY-MM-DD",
    "month": "a month YYYY-MM",
}

ProblemTuple = tuple[tuple[str | int, ...], str, str | None]


def _templated_fields(plan: Plan) -> Iterator[tuple[tuple[str | int, ...], str]]:
    """The fields where placeholders are replaced."""
    yield ("title",), plan.title
    for name, ds in plan.datasets.items():
        yield ("datasets", name, "file"), ds.file
    for i, a in enumerate(plan.analyses):
        if a.title is not None:
            yield ("analyses", i, "title"), a.title


def _other_text(value: Any, path: tuple[str | int, ...]) -> Iterator[tuple[tuple[str | int, ...], str]]:
    if isinstance(value, dict):
        for k, v in value.items():
            yield from _other_text(v, path + (k,))
    elif isinstance(value, list):
        for i, v in enumerate(value):
            yield from _other_text(v, path + (i,))
    elif isinstance(value, str):
        yield path, value


def parameter_problems(plan: Plan) -> list[ProblemTuple]:
    """Plan-level rules: patterns compile, defaults and allowed values obey the declaration, every
    placeholder names a declared parameter, and placeholders appear only where they are replaced."""
    out: list[ProblemTuple] = []
    declared = plan.parameters
    for name, p in declared.items():
        at = ("parameters", name)
        if p.pattern is not None:
            if len(p.pattern) > MAX_PATTERN:
                out.append((at + ("pattern",), f"the pattern is longer than {MAX_PATTERN} characters", None))
                continue
            try:
                re.compile(p.pattern)
            except re.error as exc:
                out.append((at + ("pattern",), f"not a valid regular expression: {exc}",
                            "write a Python regular expression such as '[0-9]{4}-[0-9]{2}'"))
                continue
        for k, value in enumerate(p.values or []):
            why = value_problem(name, p, value, check_values=False)
            if why:
                out.append((at + ("values", k), why, None))
        if p.default is not None:
            why = value_problem(name, p, p.default)
            if why:
                out.append((at + ("default",), why, None))
    templated = set()
    for path, text in _templated_fields(plan):
        templated.add(path)
        for m in PLACEHOLDER.finditer(text):
            if m.group(1) not in declared:
                out.append((path, f"placeholder '{{{m.group(1)}}}' names no declared parameter",
                            did_you_mean(m.group(1), declared) or "declare it under parameters:"))
    used = {m.group(1) for _, text in _templated_fields(plan) for m in PLACEHOLDER.finditer(text)}
    for name in declared:
        if name not in used:
            out.append((("parameters", name), f"parameter '{name}' is declared but used nowhere",
                        "use {" + name + "} in a data file path or a title, or remove it"))
    dumped = plan.model_dump(mode="json", exclude={"parameters"})
    for path, text in _other_text(dumped, ()):
        if path in templated:
            continue
        for m in PLACEHOLDER.finditer(text):
            if m.group(1) in declared:
                out.append((path, f"parameter '{{{m.group(1)}}}' may be used only in data file paths and titles",
                            "write the value out here; parameters never change the analysis itself"))
    return out


def value_problem(name: str, p: Parameter, value: str, *, check_values: bool = True) -> str | None:
    """Why ``value`` is not acceptable for parameter ``name``, or None."""
    if not value:
        return f"parameter '{name}' is empty"
    if len(value) > MAX_VALUE:
        return f"the value of '{name}' is longer than {MAX_VALUE} characters"
    if FORBIDDEN.search(value):
        return (f"the value '{value}' of '{name}' holds a path separator, '..', a brace or a control "
                "character, which a parameter may never hold")
    if not _has_type(p.type, value):
        return f"the value '{value}' of '{name}' is not {TYPE_RULES[p.type]}"
    if p.pattern is not None and re.fullmatch(p.pattern, value) is None:
        return f"the value '{value}' of '{name}' does not match the pattern '{p.pattern}'"
    if check_values and p.values is not None and value not in p.values:
        return f"the value '{value}' of '{name}' is not one of the allowed values: {', '.join(p.values)}"
    return None


def _has_type(kind: str, value: str) -> bool:
    if kind == "integer":
        return re.fullmatch(r"-?[0-9]{1,18}", value) is not None
    if kind == "date":
        if re.fullmatch(r"[0-9]{4}-[0-9]{2}-[0-9]{2}", value) is None:
            return False
        try:
            dt.date.fromisoformat(value)
        except ValueError:
            return False
        return True
    if kind == "month":
        return re.fullmatch(r"[0-9]{4}-(0[1-9]|1[0-2])", value) is not None
    return True


def parse_assignments(items: list[str] | None) -> dict[str, str]:
    """`["month=2026-11"]` -> {"month": "2026-11"}; a name given twice is an error."""
    out: dict[str, str] = {}
    for item in items or []:
        name, sep, value = item.partition("=")
        if not sep or not name:
            raise PlanError(f"--param '{item}' is not NAME=VALUE", hint="write e.g. --param month=2026-11")
        if name in out:
            raise PlanError(f"--param {name} is given twice", hint="give each parameter once")
        out[name] = value
    return out


def resolve_values(plan: Plan, given: dict[str, str], *, require: bool = True) -> dict[str, str]:
    """The value of every declared parameter: from the command line, else its default.

    Without ``require`` a parameter with neither is left out (its placeholders stay unfilled)."""
    problems: list[str] = []
    declared = plan.parameters
    for name in given:
        if name not in declared:
            hint = did_you_mean(name, declared) or (
                f"declared: {', '.join(declared)}" if declared else "the plan declares no parameters")
            problems.append(f"--param {name}: the plan declares no parameter '{name}' ({hint})")
    values: dict[str, str] = {}
    for name, p in declared.items():
        value = given.get(name, p.default)
        if value is None:
            if not require:
                continue
            problems.append(f"--param {name}: no value given and the parameter has no default "
                            f"(add --param {name}=VALUE)")
            continue
        why = value_problem(name, p, value)
        if why:
            hint = f"allowed: {', '.join(p.values)}" if p.values else (
                f"pattern: {p.pattern}" if p.pattern else TYPE_RULES[p.type])
            problems.append(f"--param {name}: {why} ({hint})")
        values[name] = value
    if problems:
        raise PlanError("parameter values are not valid", problems=problems)
    return values


def substitute(text: str, values: dict[str, str]) -> str:
    return PLACEHOLDER.sub(lambda m: values.get(m.group(1), m.group(0)), text)


def apply(plan: Plan, values: dict[str, str]) -> Plan:
    """The plan with placeholders in file paths and titles replaced (nothing else changes)."""
    if not plan.parameters:
        return plan
    datasets = {name: ds.model_copy(update={"file": substitute(ds.file, values)})
                for name, ds in plan.datasets.items()}
    analyses = [a.model_copy(update={"title": substitute(a.title, values)}) if a.title is not None else a
                for a in plan.analyses]
    return plan.model_copy(update={"title": substitute(plan.title, values), "datasets": datasets,
                                   "analyses": analyses})
