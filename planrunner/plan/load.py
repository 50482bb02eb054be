"""Load a plan file and check it completely before any data are read.

Every problem is reported at once as `FILE:LINE:COL: dotted.path: what is wrong (what to do)`,
so a plan author can fix them all in one pass.
"""

from __future__ import annotations

import hashlib
import typing
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path, PurePosixPath, PureWindowsPath
from typing import Any

import pydantic
from pydantic import BaseModel

from planrunner.engines.statistics import PARAMETERS, STATISTICS
from planrunner.errors import ExpressionError, PlanError
from planrunner.plan import permrules as permcheck
from planrunner.plan.decisions import decision_problems
from planrunner.plan.derived import dataset_columns, derived_problems
from planrunner.plan.designrules import check_resampling_design
from planrunner.plan.expr import parse_expression
from planrunner.plan.modelrules import model_checks
from planrunner.plan.params import parameter_problems
from planrunner.plan.problems import Problem, did_you_mean
from planrunner.plan.roles import estimand_problems
from planrunner.plan.schema import (
    DATA_SUFFIXES,
    METHOD_MODELS,
    METHODS,
    RENAMED_KEYS,
    RENAMED_VALUES,
    Dataset,
    Plan,
    precision_of,
)
from planrunner.plan.survrules import censoring_checks
from planrunner.plan.yamlsafe import MAX_PLAN_BYTES, LoadedYaml, Path_, dotted, load_yaml

NUMERIC_TYPES = ("number", "integer", "boolean")
# design keys each method can honour; anything else is refused rather than silently ignored
SUPPORTED_DESIGNS: dict[str, tuple[str, ...]] = {"bootstrap": ("pairs", "clusters", "order"),
                                                 "permutation": ("pairs", "clusters", "covariates"),
                                                 "jackknife": ("clusters",)}
GROUPING_TYPES = ("category", "boolean", "integer", "text")


@dataclass(frozen=True)
class LoadedPlan:
    plan: Plan
    file: Path  # resolved path of the plan file
    text: str  # the plan exactly as read
    sha256: str  # of the file's bytes
    yaml: LoadedYaml

    @property
    def folder(self) -> Path:
        return self.file.parent


def read_plan(path: str | Path) -> LoadedPlan:
    """Read, parse, validate and cross-check a plan; raise one PlanError listing every problem."""
    file = Path(path)
    shown = str(path)
    raw, text, loaded = read_yaml_file(path, kind="plan", example="plans/liner-trial/plan.yaml")
    if not isinstance(loaded.data, dict):
        raise PlanError("a plan must be a mapping of keys (plan, title, seed, datasets, analyses)",
                        where=f"{shown}:1:1")
    try:
        plan = Plan.model_validate(loaded.data)
    except pydantic.ValidationError as exc:
        problems = [problem_from_pydantic(err, loaded.data) for err in exc.errors()]
        raise PlanError("the plan is not valid", problems=format_problems(problems, loaded, shown)) from None
    problems = cross_check(plan)
    if problems:
        raise PlanError("the plan is not valid", problems=format_problems(problems, loaded, shown))
    return LoadedPlan(plan=plan, file=file.resolve(), text=text,
                      sha256=hashlib.sha256(raw).hexdigest(), yaml=loaded)


def read_yaml_file(path: str | Path, *, kind: str, example: str) -> tuple[bytes, str, LoadedYaml]:
    """The bytes, text and positioned YAML of a settings file (`kind`: "plan", "scenarios file"), under
    the plan's rules: at most MAX_PLAN_BYTES, UTF-8, and the narrow YAML of `yamlsafe`."""
    file = Path(path)
    shown = str(path)
    file_kind = kind if kind.endswith(" file") else f"{kind} file"
    try:
        with file.open("rb") as handle:  # read no more than the limit: a plan may be a huge file
            raw = handle.read(MAX_PLAN_BYTES + 1)
    except FileNotFoundError:
        raise PlanError(f"{file_kind} not found", where=shown,
                        hint=f"check the path; {kind}s are YAML files such as {example}") from None
    except IsADirectoryError:
        raise PlanError(f"this is a folder, not a {file_kind}", where=shown,
                        hint="name the YAML file inside it") from None
    except OSError as exc:
        raise PlanError(f"cannot read the {kind}: {exc.strerror}", where=shown) from None
    if len(raw) > MAX_PLAN_BYTES:
        raise PlanError(f"the {kind} is larger than {MAX_PLAN_BYTES} bytes", where=shown,
                        hint=f"a {kind} holds settings, not data; put data in the files it names")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        raise PlanError(f"the {kind} is not UTF-8 text (byte 0x{raw[exc.start]:02x} at offset {exc.start})",
                        where=f"{shown}:{line}",
                        hint=f"save the {kind} as UTF-8") from None
    return raw, text, load_yaml(text, shown)


def format_problems(problems: list[Problem], loaded: LoadedYaml, shown: str) -> list[str]:
    """Each problem as FILE:LINE:COL: dotted.path: what (hint), sorted by place, duplicates once."""
    lines = []
    for p in problems:
        pos = loaded.position(p.path, key=p.at_key)
        hint = f" ({p.hint})" if p.hint else ""
        lines.append(f"{shown}:{pos.line}:{pos.column + p.offset}: {dotted(p.path)}: {p.message}{hint}")
    return sorted(set(lines), key=lambda s: _line_col(s, shown))


def _line_col(line: str, shown: str) -> tuple[int, int]:
    rest = line[len(shown) + 1:].split(":", 2)
    return int(rest[0]), int(rest[1])


# --- pydantic errors in plain words ---------------------------------------------------------------

def _strip_union_tags(loc: tuple, data: Any) -> Path_:
    """Drop the discriminator tags pydantic inserts into locations ('analyses', 0, 'bootstrap', ...)."""
    path: list[str | int] = []
    node = data
    for part in loc:
        if isinstance(node, dict) and part not in node and part in METHODS and isinstance(
                node.get("method"), str):
            continue  # a tag, not a key the user wrote
        path.append(part)
        if isinstance(node, dict):
            node = node.get(part)
        elif isinstance(node, list) and isinstance(part, int) and part < len(node):
            node = node[part]
        else:
            node = None
    return tuple(path)


def _model_at(path: Path_, data: Any, root: type[BaseModel] = Plan) -> type[BaseModel] | None:
    """The model whose fields apply at `path`, so that unknown keys get a 'did you mean'."""
    annotation: Any = root
    node = data
    for part in path:
        annotation = _resolve(annotation, node)
        if isinstance(annotation, type) and issubclass(annotation, BaseModel):
            field = annotation.model_fields.get(str(part))
            if field is None:
                return None
            annotation = field.annotation
        else:
            origin = typing.get_origin(annotation)
            args = typing.get_args(annotation)
            if origin in (list, dict) and args:
                annotation = args[-1]
            else:
                return None
        node = node.get(part) if isinstance(node, dict) else (
            node[part] if isinstance(node, list) and isinstance(part, int) and part < len(node) else None)
    annotation = _resolve(annotation, node)
    return annotation if isinstance(annotation, type) and issubclass(annotation, BaseModel) else None


def _resolve(annotation: Any, node: Any) -> Any:
    """Unwrap Annotated / Optional, and pick the union member a discriminated union would pick."""
    while True:
        origin = typing.get_origin(annotation)
        args = typing.get_args(annotation)
        if origin is typing.Annotated:
            annotation = args[0]
        elif origin in (typing.Union, __import__("types").UnionType):
            members = [a for a in args if a is not type(None)]
            models = [m for m in members if isinstance(m, type) and issubclass(m, BaseModel)]
            if len(members) == 1:
                annotation = members[0]
            elif models and isinstance(node, dict):
                chosen = [m for m in models if "method" in m.model_fields and
                          node.get("method") in typing.get_args(m.model_fields["method"].annotation)]
                annotation = chosen[0] if chosen else models[0]
            else:
                return annotation
        else:
            return annotation


_TYPE_WORDS = {
    "int_type": "must be a whole number", "int_from_float": "must be a whole number",
    "float_type": "must be a number", "string_type": "must be text (put it in quotes)",
    "bool_type": "must be true or false", "list_type": "must be a list", "dict_type": "must be a mapping",
    "model_type": "must be a mapping of keys", "model_attributes_type": "must be a mapping of keys",
}


def problem_from_pydantic(err: Mapping[str, Any], data: Any, root: type[BaseModel] = Plan) -> Problem:
    """One pydantic error of a file whose top model is `root`, in plain words at its path."""
    path = _strip_union_tags(tuple(err["loc"]), data)
    kind = err["type"]
    ctx = err.get("ctx") or {}
    if kind == "extra_forbidden":
        new_key = RENAMED_KEYS.get((str(path[0]), str(path[-1]))) if path else None
        if new_key is not None:
            return Problem(path, f"'{path[-1]}' is now written '{new_key}'",
                           f"rename the key to {new_key}: same expression, same meaning", at_key=True)
        model = _model_at(path[:-1], data, root)
        allowed = sorted(model.model_fields) if model else []
        analysis_models = list(METHOD_MODELS.values())
        owners = [m for m in analysis_models if model in analysis_models and str(path[-1]) in m.model_fields]
        if owners:  # a key of another method: say whose it is rather than guessing a spelling
            names = " and ".join(name for name, m in METHOD_MODELS.items() if m in owners)
            return Problem(path, f"'{path[-1]}' applies only to {names} analyses", "remove the key", at_key=True)
        hint = did_you_mean(str(path[-1]), allowed) or (
            f"allowed here: {', '.join(allowed)}" if allowed else None)
        return Problem(path, f"unknown key '{path[-1]}'", hint, at_key=True)
    if kind == "missing":
        return Problem(path[:-1], f"missing required key '{path[-1]}'")
    if kind == "union_tag_not_found":
        return Problem(path, "missing required key 'method'", f"one of: {', '.join(METHODS)}")
    if kind == "union_tag_invalid":
        given = ctx.get("tag", "")
        hint = did_you_mean(given, METHODS) or f"one of: {', '.join(METHODS)}"
        return Problem(path + ("method",), f"unknown method '{given}'", hint)
    if kind == "literal_error":
        expected = str(ctx.get("expected", "")).replace("'", "")
        choices = [c.strip() for c in expected.replace(" or ", ",").split(",") if c.strip()]
        given = err.get("input")
        renamed = RENAMED_VALUES.get((str(path[0]), str(path[-1])), {}) if path else {}
        if isinstance(given, str) and given in renamed:
            return Problem(path, f"'{given}' is now written '{renamed[given]}'", f"write {path[-1]}: {renamed[given]}")
        hint = did_you_mean(str(given), choices) if isinstance(given, str) else None
        return Problem(path, f"'{given}' is not allowed; one of: {', '.join(choices)}", hint)
    if kind == "string_pattern_mismatch":
        if path and path[-1] == "sha256":
            return Problem(path, "not a SHA-256 digest", "write the 64 lower-case hex digits of the file's hash")
        return Problem(path, f"'{err.get('input')}' is not a valid identifier",
                       "use letters, digits, '-', '_' or '.', starting with a letter or digit, at most 64 characters")
    if kind in ("greater_than", "greater_than_equal", "less_than", "less_than_equal"):
        bound = next(iter(ctx.values()), "")
        word = {"greater_than": "more than", "greater_than_equal": "at least",
                "less_than": "less than", "less_than_equal": "at most"}[kind]
        return Problem(path, f"must be {word} {bound} (got {err.get('input')!r})")
    if kind in ("too_short", "too_long"):
        return Problem(path, err["msg"].replace("List", "the list").replace("Dictionary", "the mapping"))
    if kind == "value_error":
        return Problem(path, str(ctx.get("error", err["msg"])))
    if kind in _TYPE_WORDS:
        return Problem(path, f"{_TYPE_WORDS[kind]} (got {err.get('input')!r})")
    return Problem(path, err["msg"][0].lower() + err["msg"][1:])


# --- rules across the plan ------------------------------------------------------------------------

def cross_check(plan: Plan) -> list[Problem]:
    """Rules that relate parts of the plan to each other. Returns every problem found."""
    problems: list[Problem] = []
    for name, ds in plan.datasets.items():
        problems += _check_dataset_file(name, ds.file)
        problems += derived_problems(name, ds)
        problems += _check_sheet(name, ds)
        if ds.rows_where is not None:
            problems += _check_expression(("datasets", name, "rows_where"), ds.rows_where, dataset_columns(ds))
        for set_name, condition in ds.sets.items():
            problems += _check_expression(("datasets", name, "sets", set_name), condition, dataset_columns(ds))
    seen: dict[str, int] = {}
    for i, a in enumerate(plan.analyses):
        at = ("analyses", i)
        if a.id in seen:
            problems.append(Problem(at + ("id",), f"analysis id '{a.id}' is used twice (also analyses[{seen[a.id]}])",
                                    "give every analysis its own id"))
        seen.setdefault(a.id, i)
        problems += _check_analysis(at, a, plan)
    for j, fam in enumerate(plan.multiplicity):
        for k, member in enumerate(fam.family):
            if member not in seen:
                problems.append(Problem(("multiplicity", j, "family", k), f"no analysis has id '{member}'",
                                        did_you_mean(member, seen)))
        if len(set(fam.family)) != len(fam.family):
            problems.append(Problem(("multiplicity", j, "family"), "the family names an analysis twice"))
        if fam.method == "max-t" and all(member in seen for member in fam.family):
            problems += permcheck.max_t_checks(("multiplicity", j), [plan.analyses[seen[m]] for m in fam.family])
        for k, member in enumerate(fam.family):
            if member in seen and plan.analyses[seen[member]].method == "bootstrap" \
                    and getattr(plan.analyses[seen[member]], "null_value", None) is None \
                    and not getattr(plan.analyses[seen[member]], "impose_null", None):
                problems.append(Problem(("multiplicity", j, "family", k),
                                        f"analysis '{member}' is a bootstrap without null_value and has no p-value",
                                        f"add null_value: V to analysis '{member}' (its p-value inverts its "
                                        "first interval), or leave it out of the family"))
            if member in seen and plan.analyses[seen[member]].method == "jackknife":
                problems.append(Problem(("multiplicity", j, "family", k),
                                        f"analysis '{member}' is a jackknife and has no p-value",
                                        "adjust only bootstrap or permutation analyses"))
    problems += precision_problems(plan)
    problems += [Problem(path, message, hint) for path, message, hint in parameter_problems(plan)]
    problems += estimand_problems(plan)
    problems += decision_problems(plan)
    return problems


def precision_problems(plan: Plan) -> list[Problem]:
    """``precision`` rules: the target fits the method, replaces ``resamples`` rather than joining
    it, and is not asked of a computation that cannot stop early (a shift interval, a max-t family's
    joint run, an exhaustive bootstrap)."""
    out: list[Problem] = []
    in_max_t = {m for fam in plan.multiplicity if fam.method == "max-t" for m in fam.family}
    for i, a in enumerate(plan.analyses):
        if a.method == "jackknife":
            continue
        at = ("analyses", i, "precision")
        own = a.precision
        if own is not None and a.resamples is not None:
            out.append(Problem(at, "give either resamples or precision, not both",
                               "precision chooses the resamples (up to max_resamples)"))
        if own is not None and a.method == "permutation" and own.decision_risk is None \
                and not (own.se_relative or own.interval_end_sd):
            out.append(Problem(at, "a permutation test's precision is its decision_risk",
                               "give decision_risk, e.g. 0.001"))
        if own is not None and a.method == "permutation" and (own.se_relative or own.interval_end_sd):
            out.append(Problem(at, "se_relative and interval_end_sd apply to bootstrap analyses",
                               "give a permutation test decision_risk only"))
        if own is not None and a.method == "bootstrap" and own.se_relative is None and own.interval_end_sd is None \
                and own.decision_risk is None:
            out.append(Problem(at, "a bootstrap's precision is se_relative and/or interval_end_sd",
                               "give se_relative, e.g. 0.01, or interval_end_sd in the statistic's units"))
        if own is not None and a.method == "bootstrap" and own.decision_risk is not None:
            out.append(Problem(at, "decision_risk applies to permutation tests",
                               "give a bootstrap se_relative or interval_end_sd"))
        if precision_of(a, plan.defaults) is None:
            continue
        if a.method == "bootstrap" and a.exhaustive:
            out.append(Problem(at, "an exhaustive bootstrap has no Monte Carlo error to choose resamples for",
                               "remove precision (or exhaustive)"))
        if a.method == "permutation" and a.intervals:
            out.append(Problem(at, "a shift interval needs a fixed number of resamples",
                               "give resamples instead of precision, or drop intervals: [shift]"))
        if a.id in in_max_t:
            out.append(Problem(at, "a max-t family's joint run draws a fixed number of resamples",
                               "give resamples instead of precision, or adjust the family with holm"))
    return out


def _check_dataset_file(name: str, file: str) -> list[Problem]:
    at = ("datasets", name, "file")
    if PurePosixPath(file).is_absolute() or PureWindowsPath(file).is_absolute() or PureWindowsPath(file).drive:
        return [Problem(at, "data paths must be relative to the plan's folder",
                        "move the file next to the plan and name it relative to it")]
    if ".." in PurePosixPath(file.replace("\\", "/")).parts:
        return [Problem(at, "data paths may not leave the plan's folder ('..')",
                        "keep data in the plan's folder or below it")]
    if any(not c.isprintable() or c in "`<>" for c in file):
        # the path is shown in reports, inside Markdown code spans and HTML: keep it plain
        return [Problem(at, "data paths may not contain control characters, backticks or angle brackets",
                        "rename the file")]
    return []


def _check_sheet(name: str, ds: Dataset) -> list[Problem]:
    """A workbook is read from one named sheet; no other format has sheets."""
    fmt = ds.format or DATA_SUFFIXES.get(PurePosixPath(ds.file).suffix.lower(), "csv")
    if fmt == "xlsx" and ds.sheet is None:
        return [Problem(("datasets", name), "a workbook (.xlsx) needs the sheet to read: add 'sheet: NAME'",
                        "name the sheet that holds the data, exactly as its tab is labelled")]
    if fmt != "xlsx" and ds.sheet is not None:
        return [Problem(("datasets", name, "sheet"), f"sheet applies only to .xlsx workbooks, and this file is {fmt}",
                        "remove sheet, or set format: xlsx if the file is a workbook")]
    return []


def _check_expression(at: Path_, text: str, columns: dict) -> list[Problem]:
    try:
        expression = parse_expression(text)
    except ExpressionError as exc:
        return [Problem(at, f"{exc.message} in the filter", exc.hint, offset=exc.position)]
    return [Problem(at, f"the filter names column '{c}', which the dataset does not declare",
                    did_you_mean(c, columns)) for c in sorted(expression.columns - set(columns))]


def _check_analysis(at: Path_, a: Any, plan: Plan) -> list[Problem]:
    out: list[Problem] = []
    ds = plan.datasets.get(a.data)
    if ds is None:
        return [Problem(at + ("data",), f"no dataset is named '{a.data}'",
                        did_you_mean(a.data, plan.datasets) or f"declared: {', '.join(plan.datasets)}")]
    cols = dataset_columns(ds)
    if a.set is not None and a.set not in ds.sets:
        out.append(Problem(at + ("set",), f"dataset '{a.data}' declares no set '{a.set}'",
                           did_you_mean(a.set, ds.sets) or (f"declared: {', '.join(ds.sets)}" if ds.sets else
                                                           f"declare it under datasets.{a.data}.sets")))

    def column(path: Path_, name: str, allowed: tuple[str, ...], role: str) -> bool:
        if name not in cols:
            out.append(Problem(path, f"dataset '{a.data}' declares no column '{name}'",
                               did_you_mean(name, cols) or f"declared: {', '.join(cols)}"))
            return False
        if cols[name].type not in allowed:
            out.append(Problem(path, f"column '{name}' is of type {cols[name].type}, which cannot be {role}",
                               f"{role} needs a column of type {' or '.join(allowed)}"))
            return False
        return True

    column(at + ("outcome",), a.outcome, NUMERIC_TYPES, "an outcome")
    if a.predictor is not None:
        column(at + ("predictor",), a.predictor, NUMERIC_TYPES, "a predictor")
    statistic = STATISTICS.get(a.statistic)
    if statistic is None:
        out.append(Problem(at + ("statistic",), f"unknown statistic '{a.statistic}'",
                           did_you_mean(a.statistic, STATISTICS) or f"one of: {', '.join(sorted(STATISTICS))}"))
    if a.groups is not None:
        if column(at + ("groups", "by"), a.groups.by, GROUPING_TYPES, "a grouping"):
            levels = cols[a.groups.by].levels
            if levels is not None:
                for k, level in enumerate(a.groups.compare):
                    if level not in levels:
                        out.append(Problem(at + ("groups", "compare", k),
                                           f"'{level}' is not a declared level of '{a.groups.by}'",
                                           did_you_mean(level, levels) or f"declared: {', '.join(levels)}"))
        if a.groups.by == a.outcome:
            out.append(Problem(at + ("groups", "by"), "the grouping column is the outcome itself"))
    if a.strata is not None:
        column(at + ("strata",), a.strata, GROUPING_TYPES, "a stratum")
        if a.strata in (a.outcome, a.groups.by if a.groups else None):
            out.append(Problem(at + ("strata",), f"'{a.strata}' cannot be both the strata and the outcome or groups"))
    for key in ("pairs", "clusters", "order"):
        name = getattr(a, key)
        if name is not None:
            column(at + (key,), name, GROUPING_TYPES + ("date", "number"), f"the {key} column")
            if name in (a.outcome, a.predictor, a.groups.by if a.groups else None, a.strata):
                out.append(Problem(at + (key,), f"'{name}' is already used as outcome, predictor, groups or strata"))
            if key not in SUPPORTED_DESIGNS[a.method]:
                out.append(Problem(at + (key,), f"{key} are not yet supported with method {a.method}",
                                   "remove the key, or choose a method that supports this design"))
    model = statistic is not None and statistic.form == "model"
    for k, name in enumerate(a.covariates or []):
        column(at + ("covariates", k), name, NUMERIC_TYPES + (("category",) if model else ()), "a covariate")
    if a.covariates is not None and "covariates" not in SUPPORTED_DESIGNS[a.method] and not model:
        out.append(Problem(at + ("covariates",), f"covariates are not yet supported with method {a.method}",
                           "remove the key, or choose a method that supports this design"))
    if statistic is not None and a.groups is not None and statistic.samples == 2 and len(a.groups.compare) != 2:
        out.append(Problem(at + ("groups", "compare"), f"'{a.statistic}' compares exactly two groups, "
                           f"but {len(a.groups.compare)} levels are listed", "list two levels: [FIRST, SECOND]"))
    if statistic is not None:
        for key in PARAMETERS:
            if key == statistic.parameter and getattr(a, key) is None:
                out.append(Problem(at + ("statistic",), f"'{a.statistic}' needs its {key}",
                                   f"add {key}: VALUE" + (" (e.g. quantile: 0.9)" if key == "quantile" else "")))
            if key != statistic.parameter and getattr(a, key) is not None:
                out.append(Problem(at + (key,), f"'{a.statistic}' takes no {key}",
                                   "remove the key, or choose a statistic that uses it"))
        if statistic.samples == 2 and a.groups is None:
            out.append(Problem(at + ("statistic",),
                               f"'{a.statistic}' compares two groups but the analysis has no groups",
                               "add groups: {by: COLUMN, compare: [FIRST, SECOND]}"))
        if statistic.samples == 1 and a.groups is not None:
            one_to_two = {"mean": "mean_difference", "median": "median_difference",
                          "quantile": "quantile_difference", "proportion": "risk_difference"}
            out.append(Problem(at + ("statistic",),
                               f"'{a.statistic}' describes one group but the analysis compares two",
                               f"use {one_to_two.get(a.statistic, 'a two-group statistic')} or remove groups"))
        out += censoring_checks(at, a, cols)
        if statistic.columns == 2 and a.predictor is None and statistic.outcome != "censored":
            out.append(Problem(at + ("statistic",),
                               f"'{a.statistic}' relates two columns but the analysis has no predictor",
                               "add predictor: COLUMN (the outcome is the other column)"))
        if statistic.columns == 1 and a.predictor is not None:
            out.append(Problem(at + ("predictor",), f"'{a.statistic}' uses one column; predictor does not apply",
                               "remove predictor, or use a statistic of two columns such as correlation"))
        if statistic.outcome == "binary" and a.outcome in cols and cols[a.outcome].type not in ("boolean", "integer"):
            out.append(Problem(at + ("outcome",), f"'{a.statistic}' needs a 0/1 or true/false outcome",
                               "declare the outcome as boolean, or as integer holding 0 and 1"))
        out += model_checks(at, a, statistic)
        if not model:
            out += check_resampling_design(at, a, statistic)
        if statistic.samples == 0 and a.groups is None:
            out.append(Problem(at + ("statistic",), f"'{a.statistic}' compares two or more groups but the analysis "
                               "has no groups", "add groups: {by: COLUMN, compare: [FIRST, SECOND, ...]}"))
        out += permcheck.statistic_checks(at, a)
        if a.method == "permutation":
            out += permcheck.permutation_checks(at, a, statistic)
    return out
