"""The scenarios file of `planrunner simulate`: how the plan's data are to be invented (a model per
column, the rows), the null and the alternatives (each a named set of changes to that base), and an
optional sample-size search (README, "The scenarios file").

Read with the plan's own YAML rules and problem reporting (`plan/yamlsafe.py`, `plan/load.py`): no
tags, anchors, aliases or duplicate keys, at most MAX_PLAN_BYTES, and every problem of the file at
once as FILE:LINE:COL: path: what (hint). The file names no other files.
"""

from __future__ import annotations

import copy
import hashlib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import pydantic

from planrunner.errors import PlanError
from planrunner.plan.load import format_problems, problem_from_pydantic, read_yaml_file
from planrunner.plan.problems import Problem, did_you_mean
from planrunner.plan.schema import Plan
from planrunner.plan.yamlsafe import LoadedYaml, Path_, dotted
from planrunner.simulate.checks import file_problems, scenario_problems
from planrunner.simulate.families import PARAMETER_NAMES
from planrunner.simulate.schema import DatasetModel, ScenarioSpec, ScenariosSchema, Search

__all__ = ["DatasetModel", "Scenario", "ScenarioFile", "Search", "load_scenarios"]

EXAMPLE = "plans/liner-trial/scenarios.yaml"


@dataclass(frozen=True)
class Scenario:
    """One scenario: the base models with its changes applied."""

    name: str
    replicates: int
    datasets: Mapping[str, DatasetModel]
    description: str | None = None
    changes: Mapping[str, Any] = field(default_factory=dict)  # as written, for the record

    def with_group_sizes(self, n: int) -> Scenario:
        """Every group's size set to n (used by the sample-size search)."""
        if n < 1:
            raise ValueError(f"a group needs at least one row, not {n}")
        return replace(self, datasets={name: ds.with_group_sizes(n) for name, ds in self.datasets.items()})


@dataclass(frozen=True)
class ScenarioFile:
    file: Path
    sha256: str  # of the file's bytes
    text: str
    plan_id: str
    seed: int
    title: str
    description: str | None
    scenarios: tuple[Scenario, ...]
    search: Search | None

    def scenario(self, name: str) -> Scenario:
        return next(s for s in self.scenarios if s.name == name)


def load_scenarios(path: str | Path, plan: Plan) -> ScenarioFile:
    """Read a scenarios file and check it against `plan`; one PlanError lists every problem."""
    shown = str(path)
    raw, text, loaded = read_yaml_file(path, kind="scenarios file", example=EXAMPLE)
    if not isinstance(loaded.data, dict):
        raise PlanError("a scenarios file must be a mapping of keys (scenarios_for, title, seed, datasets, "
                        "scenarios)", where=f"{shown}:1:1")
    schema = _validated(loaded.data, loaded, shown)
    problems = file_problems(schema, plan)
    in_base = {(p.path, p.message) for p in problems}
    scenarios: list[Scenario] = []
    for i, spec in enumerate(schema.scenarios):
        datasets, changed, found = _changed_datasets(loaded.data["datasets"], spec, i)
        problems += found
        if found:
            continue
        at = ("scenarios", i)
        try:
            models = _DATASETS.validate_python(datasets)
        except pydantic.ValidationError as exc:
            errors = [{**e, "loc": ("datasets", *e["loc"])} for e in exc.errors()]
            problems += _located_in_scenario(_pydantic_problems(errors, {"datasets": datasets}), changed, at,
                                             spec.name, in_base)
            continue
        problems += _located_in_scenario(scenario_problems(models, plan), changed, at, spec.name, in_base)
        scenarios.append(Scenario(name=spec.name, replicates=spec.replicates, datasets=models,
                                  description=spec.description, changes=dict(spec.change)))
    if problems:
        raise PlanError("the scenarios file is not valid", problems=format_problems(problems, loaded, shown))
    return ScenarioFile(file=Path(path).resolve(), sha256=hashlib.sha256(raw).hexdigest(), text=text,
                        plan_id=schema.scenarios_for, seed=schema.seed, title=schema.title,
                        description=schema.description, scenarios=tuple(scenarios), search=schema.search)


def _validated(data: dict, loaded: LoadedYaml, shown: str) -> ScenariosSchema:
    try:
        return ScenariosSchema.model_validate(data)
    except pydantic.ValidationError as exc:
        problems = _pydantic_problems(list(exc.errors()), data)
        raise PlanError("the scenarios file is not valid", problems=format_problems(problems, loaded, shown)) from None


_DATASETS = pydantic.TypeAdapter(dict[str, DatasetModel])


def _pydantic_problems(errors: list[Any], data: dict) -> list[Problem]:
    """pydantic's errors in the plan's words. A covariate's effect is a number or a mapping of levels
    to numbers; pydantic tries both and names each try in the location (`float`, `dict[str,float]`):
    only the try that matches what was written is kept, without its name."""
    problems = []
    for err in errors:
        loc = tuple(err["loc"])
        if "covariates" in loc[:-2]:
            cut = loc.index("covariates") + 2
            written = _value_at(data, loc[:cut])
            if (loc[cut] == "float") == isinstance(written, dict):
                continue
            err = {**err, "loc": loc[:cut] + loc[cut + 1:]}
        problems.append(problem_from_pydantic(err, data, ScenariosSchema))
    return problems


def _value_at(data: Any, path: tuple) -> Any:
    for part in path:
        data = data.get(part) if isinstance(data, dict) else None
    return data


# --- a scenario's changes -------------------------------------------------------------------------

def _changed_datasets(base: dict, spec: ScenarioSpec, index: int) -> tuple[dict, dict[Path_, str], list[Problem]]:
    """The base datasets (as read) with the scenario's changes applied; each changed path (from
    `datasets`) → the change key that made it; problems of change keys that name nothing."""
    datasets = copy.deepcopy(base)
    changed: dict[Path_, str] = {}
    problems: list[Problem] = []
    for key, value in spec.change.items():
        at = ("scenarios", index, "change", key)
        path, problem = _resolve_path(datasets, key)
        if problem is not None:
            problems.append(Problem(at, problem[0], problem[1], at_key=True))
            continue
        node = datasets
        for part in path[:-1]:
            node = node.setdefault(part, {})
        node[path[-1]] = copy.deepcopy(value)
        changed[path] = key
    return datasets, changed, problems


def _resolve_path(datasets: dict, key: str) -> tuple[Path_, tuple[str, str | None] | None]:
    """The path a dotted change key names. Names may hold dots themselves ('a.b' as a level), so at
    each step the longest existing key that the rest of the text starts with is taken."""
    path: list[str] = []
    node: Any = datasets
    rest = key
    while True:
        if not isinstance(node, dict):
            return (), (f"'{dotted(tuple(path))}' is a value, so '{rest}' cannot be below it",
                        "end the path at the value to change")
        matches = [k for k in node if rest == k or rest.startswith(f"{k}.")]
        if matches:
            name = max(matches, key=len)
            path.append(name)
            if rest == name:
                return tuple(path), None
            node, rest = node[name], rest[len(name) + 1:]
            continue
        head, _, tail = rest.partition(".")
        if not tail:  # a new key at the end: the schema and the checks judge it
            return (*path, head), None
        if path and path[-1] == "by_group":  # a new group level (with its parameter)
            return (*path, *_level_and_parameter(rest)), None
        if head == "by_group":  # a column's first group override
            return (*path, head, *_level_and_parameter(tail)), None
        if head == "covariates":  # a column's first covariate
            return (*path, head, tail), None
        where = f"'{dotted(tuple(path))}'" if path else "datasets"
        hint = did_you_mean(head, node) or (f"{where} holds: {', '.join(node)}" if node else None)
        return (), (f"the change names '{head}', which is not in {where} of the base", hint)


def _level_and_parameter(text: str) -> tuple[str, ...]:
    """'LEVEL.PARAMETER' → both when the last part names a parameter, else the whole text is the level
    (a level may hold dots)."""
    level, _, parameter = text.rpartition(".")
    return (level, parameter) if level and parameter in PARAMETER_NAMES else (text,)


def _located_in_scenario(problems: list[Problem], changed: dict[Path_, str], at: Path_, name: str,
                         in_base: set[tuple[Path_, str]]) -> list[Problem]:
    """A scenario's problems, each at the change key that caused it (else at the scenario's name);
    problems the base has too are reported once, at the base."""
    out = []
    for p in problems:
        if (p.path, p.message) in in_base:
            continue
        rel = p.path[1:]
        cause = next((key for path, key in changed.items()
                      if rel[:len(path)] == path or path[:len(rel)] == rel), None)
        where: Path_ = (*at, "change", cause) if cause is not None else (*at, "name")
        out.append(Problem(where, f"in scenario '{name}', {dotted(p.path)}: {p.message}", p.hint,
                           at_key=cause is not None))
    return out
