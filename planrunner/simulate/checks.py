"""Checks of a scenarios file against its plan: every problem, each at its path in the file.

A model may only describe the plan's own datasets and declared columns, in values those columns can
hold; group and strata levels must be the plan's levels; parameters must lie in their families'
ranges; and every column an analysis or a filter uses must be modelled or filled from `rows`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import numpy as np

from planrunner.plan.derived import dataset_columns, derivations
from planrunner.plan.expr import parse_expression
from planrunner.plan.load import GROUPING_TYPES
from planrunner.plan.problems import Problem, did_you_mean
from planrunner.plan.schema import Column, Plan
from planrunner.plan.yamlsafe import Path_
from planrunner.simulate.families import (
    CENSORING_PARAMETERS,
    FAMILIES,
    Family,
    association_problem,
    censoring_problem,
    cluster_effect,
    highest,
    parameter_problem,
)
from planrunner.simulate.generate import cluster_strata, ordered_levels
from planrunner.simulate.schema import (
    MAX_ROWS,
    ClusterRows,
    ColumnModel,
    DatasetModel,
    GroupRows,
    Rows,
    ScenariosSchema,
)

ID_TYPES = ("text", "integer")  # cluster and pair identifiers
DESIGN_ROLES = ("groups", "strata", "pairs", "clusters", "order")  # a text column here cannot be an id
SHARE_TOLERANCE = 1e-9


def file_problems(schema: ScenariosSchema, plan: Plan) -> list[Problem]:
    """Every problem of the file as written (the base models, the names, the search)."""
    out: list[Problem] = []
    if schema.scenarios_for != plan.plan:
        out.append(Problem(("scenarios_for",), f"this file was written for plan '{schema.scenarios_for}', "
                           f"but the plan is '{plan.plan}'", "simulate the plan the file names, or correct the id"))
    for name, model in schema.datasets.items():
        if name not in plan.datasets:
            out.append(Problem(("datasets", name), f"the plan has no dataset '{name}'",
                               did_you_mean(name, plan.datasets) or f"declared: {', '.join(plan.datasets)}",
                               at_key=True))
            continue
        out += dataset_problems(name, model, plan)
    used = sorted({a.data for a in plan.analyses} - set(schema.datasets))
    for name in used:
        out.append(Problem(("datasets",), f"the plan's analyses use dataset '{name}', which has no model here",
                           f"add datasets: {{{name}: {{rows: ..., columns: ...}}}}", at_key=True))
    seen: dict[str, int] = {}
    for i, spec in enumerate(schema.scenarios):
        if spec.name in seen:
            out.append(Problem(("scenarios", i, "name"), f"scenario name '{spec.name}' is used twice "
                               f"(also scenarios[{seen[spec.name]}])", "give every scenario its own name"))
        seen.setdefault(spec.name, i)
    if schema.search is not None:
        out += _search_problems(schema, plan)
    return out


def scenario_problems(models: Mapping[str, DatasetModel], plan: Plan) -> list[Problem]:
    """The dataset problems of one scenario (its base with its changes applied)."""
    return [p for name, model in models.items() if name in plan.datasets for p in dataset_problems(name, model, plan)]


def _search_problems(schema: ScenariosSchema, plan: Plan) -> list[Problem]:
    search = schema.search
    assert search is not None
    at = ("search",)
    out: list[Problem] = []
    names = [s.name for s in schema.scenarios]
    if search.scenario not in names:
        out.append(Problem(at + ("scenario",), f"no scenario is named '{search.scenario}'",
                           did_you_mean(search.scenario, names) or f"named: {', '.join(names)}"))
    ids = [a.id for a in plan.analyses]
    if search.analysis not in ids:
        out.append(Problem(at + ("analysis",), f"the plan has no analysis '{search.analysis}'",
                           did_you_mean(search.analysis, ids) or f"analyses: {', '.join(ids)}"))
    if len(set(search.sizes)) != len(search.sizes):
        out.append(Problem(at + ("sizes",), "sizes names a size twice", "list each size once"))
    for k, size in enumerate(search.sizes):
        for name, model in schema.datasets.items():
            clusters = model.rows.clusters
            if clusters is not None and size < clusters.count:
                out.append(Problem(at + ("sizes", k), f"{size} rows per group cannot fill the {clusters.count} "
                                   f"clusters of each group of dataset '{name}'",
                                   f"search sizes of at least {clusters.count}"))
    return out


# --- one dataset ----------------------------------------------------------------------------------

def dataset_problems(name: str, model: DatasetModel, plan: Plan) -> list[Problem]:
    ds = plan.datasets[name]
    at: Path_ = ("datasets", name)
    out = _rows_problems(at + ("rows",), model.rows, ds.columns)
    # a misspelt group level is one problem: the rules that compare levels with the groups wait for it
    groups = model.rows.groups
    levels_ok = groups is None or groups.column not in ds.columns or not any(
        level_problem(level, groups.column, ds.columns[groups.column]) for level in groups.sizes)
    events: dict[str, str] = {}
    for column, cm in model.columns.items():
        out += _column_problems(at + ("columns", column), column, cm, model, ds.columns, dataset_columns(ds),
                                levels_ok)
        if cm.event is not None:
            if cm.event in events:
                out.append(Problem(at + ("columns", column, "event"), f"column '{events[cm.event]}' already "
                                   f"fills the event column '{cm.event}'", "give each time its own event column"))
            events.setdefault(cm.event, column)
    out += _cycle_problems(at, model)
    out += _unmodelled_problems(at, name, model, plan, set(events))
    if levels_ok:
        out += _compared_groups_problems(at, name, model, plan)
    return out


def rows_columns(rows: Rows) -> dict[str, str]:
    """The columns `rows` fills → which part fills them."""
    parts = {"groups": rows.groups, "strata": rows.strata, "clusters": rows.clusters, "pairs": rows.pairs}
    return {part.column: key for key, part in parts.items() if part is not None}


def _declared(at: Path_, column: str, columns: Mapping[str, Column], allowed: tuple[str, ...],
              role: str) -> list[Problem]:
    if column not in columns:
        return [Problem(at, f"the plan's dataset declares no column '{column}'",
                        did_you_mean(column, columns) or f"declared: {', '.join(columns)}")]
    if columns[column].type not in allowed:
        return [Problem(at, f"column '{column}' is of type {columns[column].type}, which cannot hold {role}",
                        f"{role} needs a column of type {' or '.join(allowed)}")]
    return []


def level_problem(label: str, name: str, column: Column) -> tuple[str, str | None] | None:
    """(what is wrong, what to do) when `label` cannot be a value of the grouping column, else None."""
    if column.levels is not None and label not in column.levels:
        return (f"'{label}' is not a declared level of '{name}'",
                did_you_mean(label, column.levels) or f"declared: {', '.join(column.levels)}")
    if column.type == "boolean" and label not in ("true", "false"):
        return f"'{label}' is not a value of the true/false column '{name}'", "write true or false"
    if column.type == "integer" and not (label.lstrip("-").isdigit() and str(int(label)) == label):
        return f"'{label}' is not a whole number, as the integer column '{name}' holds", "write the number, e.g. 3"
    return None


def _levels_problems(at: Path_, labels: Mapping[str, object], column_name: str,
                     columns: Mapping[str, Column]) -> list[Problem]:
    if column_name not in columns:
        return []
    out = []
    for label in labels:
        problem = level_problem(label, column_name, columns[column_name])
        if problem is not None:
            out.append(Problem(at + (label,), problem[0], problem[1], at_key=True))
    return out


def _rows_problems(at: Path_, rows: Rows, columns: Mapping[str, Column]) -> list[Problem]:
    out: list[Problem] = []
    if rows.count is not None and rows.groups is not None:
        out.append(Problem(at + ("count",), "give either count (rows in all) or groups (rows per group), not both",
                           at_key=True))
    if rows.count is None and rows.groups is None:
        out.append(Problem(at, "the rows need a count, or groups with their sizes",
                           "add count: N, or groups: {column: COLUMN, sizes: {LEVEL: N, ...}}"))
    named = [(key, part.column) for key, part in (("groups", rows.groups), ("strata", rows.strata),
                                                   ("clusters", rows.clusters), ("pairs", rows.pairs)) if part]
    for k, (key, column) in enumerate(named):
        if column in [c for _, c in named[:k]]:
            out.append(Problem(at + (key, "column"), f"column '{column}' is already filled by another part of rows",
                               "fill each column once"))
    if rows.groups is not None:
        out += _declared(at + ("groups", "column"), rows.groups.column, columns, GROUPING_TYPES, "groups")
        if sum(rows.groups.sizes.values()) > MAX_ROWS:
            out.append(Problem(at + ("groups", "sizes"), f"{sum(rows.groups.sizes.values()):,} rows in all, more "
                               f"than a simulated data set may have ({MAX_ROWS:,})", "simulate smaller groups"))
        out += _levels_problems(at + ("groups", "sizes"), rows.groups.sizes, rows.groups.column, columns)
    if rows.strata is not None:
        strata = rows.strata
        out += _declared(at + ("strata", "column"), strata.column, columns, GROUPING_TYPES, "strata")
        out += _levels_problems(at + ("strata", "shares"), strata.shares, strata.column, columns)
        for level, share in strata.shares.items():
            if not 0 < share <= 1:
                out.append(Problem(at + ("strata", "shares", level), f"a share must lie in (0, 1] (got {share:g})"))
        total = math.fsum(strata.shares.values())
        if abs(total - 1) > SHARE_TOLERANCE:
            out.append(Problem(at + ("strata", "shares"), f"the shares add up to {total:g}, not 1",
                               "give each stratum's share of a group's rows"))
    if rows.clusters is not None:
        out += _clusters_problems(at, rows, columns, shares_ok=not out)
    if rows.pairs is not None:
        out += _pairs_problems(at, rows, columns)
    return out


def _clusters_problems(at: Path_, rows: Rows, columns: Mapping[str, Column], shares_ok: bool) -> list[Problem]:
    clusters = rows.clusters
    assert clusters is not None
    out = _declared(at + ("clusters", "column"), clusters.column, columns, ID_TYPES, "cluster identifiers")
    if clusters.icc is None and clusters.frailty is None:
        out.append(Problem(at + ("clusters",), "clusters need the strength of their effect",
                           "add icc: VALUE (normal, lognormal, gamma, bernoulli, binomial, poisson columns) "
                           "and/or frailty: VARIANCE (exponential and weibull times)", at_key=True))
    for key in ("icc", "frailty"):
        value = getattr(clusters, key)
        problem = association_problem(key, value) if value is not None else None
        if problem is not None:
            out.append(Problem(at + ("clusters", key), problem))
    smallest = min(rows.groups.sizes.values()) if rows.groups else rows.count
    if smallest is not None and clusters.count > smallest:
        out.append(Problem(at + ("clusters", "count"), f"{clusters.count} clusters per group, but a group has "
                           f"only {smallest} rows", "give every cluster at least one row"))
    strata = rows.strata
    if strata is not None and shares_ok and strata.column in columns:
        # clusters nested in strata: each group's clusters are shared out, so every stratum needs one
        levels = ordered_levels(strata.shares, columns[strata.column])
        counts = np.bincount(cluster_strata(clusters.count, [strata.shares[v] for v in levels]),
                             minlength=len(levels))
        for level, got in zip(levels, counts):
            if got == 0:
                share = strata.shares[level]
                out.append(Problem(at + ("strata", "shares", level), f"stratum '{level}' gets none of the "
                                   f"{clusters.count} clusters of a group (clusters lie within one stratum; "
                                   f"{clusters.count} × {share:g} rounds to 0)",
                                   f"give at least {math.ceil(1 / share)} clusters per group, or a larger share",
                                   at_key=True))
    return out


def _pairs_problems(at: Path_, rows: Rows, columns: Mapping[str, Column]) -> list[Problem]:
    pairs = rows.pairs
    assert pairs is not None
    out = _declared(at + ("pairs", "column"), pairs.column, columns, ID_TYPES, "pair identifiers")
    if not -1 < pairs.correlation < 1:
        out.append(Problem(at + ("pairs", "correlation"),
                           f"correlation must lie in (-1, 1) (got {pairs.correlation:g})"))
    sizes = rows.groups.sizes if rows.groups is not None else {}
    if len(sizes) != 2 or len(set(sizes.values())) != 1:
        out.append(Problem(at + ("pairs",), "pairs need exactly two groups of the same size (one row of each "
                           "pair in each group)", "give rows.groups two levels with equal sizes", at_key=True))
    if rows.clusters is not None:
        out.append(Problem(at + ("pairs",), "pairs and clusters together are not modelled: a cluster lies "
                           "within one group, a pair has a row in each, and no analysis of a plan resamples both",
                           "model a paired analysis's dataset with pairs, a clustered one's with clusters "
                           "(each its own plan dataset)", at_key=True))
    return out


# --- one column -----------------------------------------------------------------------------------

def _column_problems(at: Path_, name: str, cm: ColumnModel, model: DatasetModel, columns: Mapping[str, Column],
                     typed: Mapping[str, Column], levels_ok: bool) -> list[Problem]:
    if name not in columns:
        hint = ("it is derived by the plan: model the columns its expression uses" if name in typed
                else did_you_mean(name, columns) or f"declared: {', '.join(columns)}")
        return [Problem(at, f"the plan's dataset declares no column '{name}'", hint, at_key=True)]
    filled = rows_columns(model.rows)
    if name in filled:
        return [Problem(at, f"column '{name}' is filled from rows.{filled[name]}", "remove its model", at_key=True)]
    family = FAMILIES[cm.model.family]
    column = columns[name]
    out: list[Problem] = []
    if column.type not in family.column_types:
        out.append(Problem(at + ("model", "family"), f"a {family.name} model cannot fill column '{name}' of type "
                           f"{column.type}", f"a {family.name} value needs a column of type "
                           f"{' or '.join(family.column_types)}"))
    base = cm.model.parameters()
    out += _parameter_problems(at + ("model",), family, base, complete=True)
    out += _by_group_problems(at + ("by_group",), family, cm, model, levels_ok)
    out += _support_problems(at + ("model", "family"), family, [base, *({**base, **g} for g in cm.by_group.values())],
                             column, name)
    out += _covariate_problems(at + ("covariates",), name, cm, model)
    out += _censoring_problems(at, family, cm, columns, filled, model)
    out += _cluster_effect_problems(at, family, cm, model.rows.clusters)
    return out


def _cluster_effect_problems(at: Path_, family: Family, cm: ColumnModel, clusters: ClusterRows | None) -> list[Problem]:
    """A column's own icc or frailty must suit its family; a column whose family's kind of cluster
    effect rows.clusters does not give must give its own (README: clusters)."""
    out = []
    for key in ("icc", "frailty"):
        value = getattr(cm, key)
        if value is None:
            continue
        problem = association_problem(key, value)
        if clusters is None:
            out.append(Problem(at + (key,), f"{key} applies only with rows.clusters", f"remove {key}, or add clusters"))
        elif problem is not None:
            out.append(Problem(at + (key,), problem))
        elif key == "frailty" and family.cluster_effect != "frailty":
            out.append(Problem(at + (key,), f"frailty is the shared gamma frailty of exponential and weibull "
                               f"times; a {family.name} column's cluster effect is its icc", "write icc: VALUE"))
        elif key == "icc" and family.cluster_effect == "frailty" and value != 0:
            out.append(Problem(at + (key,), f"a {family.name} time's cluster effect is a shared gamma frailty, "
                               "not an icc", "write frailty: VARIANCE (two times of one cluster then have "
                               "Kendall's tau VARIANCE/(VARIANCE + 2)), or icc: 0 for none"))
    if not out and clusters is not None and cluster_effect(family, cm, clusters).missing:
        if family.cluster_effect == "frailty":
            out.append(Problem(at + ("model", "family"), f"rows.clusters gives an icc, but a {family.name} time's "
                               "cluster effect is a shared gamma frailty", "give frailty: VARIANCE here or in "
                               "rows.clusters (Kendall's tau VARIANCE/(VARIANCE + 2)), or icc: 0 for none"))
        else:
            out.append(Problem(at + ("model", "family"), f"rows.clusters gives a frailty, but a {family.name} "
                               "column's cluster effect is an intraclass correlation",
                               "give icc: VALUE here or in rows.clusters (0 for none)"))
    return out


def _covariate_problems(at: Path_, name: str, cm: ColumnModel, model: DatasetModel) -> list[Problem]:
    """A number effect needs a modelled column; effects per level need the column of groups or strata."""
    out = []
    filled = rows_columns(model.rows)
    for covariate, effect in cm.covariates.items():
        if isinstance(effect, dict):
            part = filled.get(covariate)
            rows_part = model.rows.groups if part == "groups" else model.rows.strata if part == "strata" else None
            if rows_part is None:
                out.append(Problem(at + (covariate,), f"effects per level apply to the column of rows.groups or "
                                   f"rows.strata, not '{covariate}'", "give a modelled column one effect",
                                   at_key=True))
                continue
            levels = rows_part.sizes if isinstance(rows_part, GroupRows) else rows_part.shares
            out += [Problem(at + (covariate, level), f"'{level}' is not a level of rows.{part}",
                            did_you_mean(level, levels) or f"levels: {', '.join(levels)}", at_key=True)
                    for level in effect if level not in levels]
        elif covariate == name:
            out.append(Problem(at + (covariate,), "a column cannot be its own covariate", at_key=True))
        elif covariate not in model.columns:
            out.append(Problem(at + (covariate,), f"'{covariate}' is not a modelled column of the dataset",
                               did_you_mean(covariate, model.columns) or "a covariate must have a model itself",
                               at_key=True))
    return out


def _parameter_problems(at: Path_, family: Family, parameters: Mapping[str, float], *,
                        complete: bool) -> list[Problem]:
    out = _keys_problems(at, f"a {family.name} model", family.parameters, parameters, complete=complete)
    for key, value in parameters.items():
        problem = parameter_problem(family, key, value) if key in family.parameters else None
        if problem is not None:
            out.append(Problem(at + (key,), *problem))
    return out


def _keys_problems(at: Path_, owner: str, wanted: tuple[str, ...], given: Mapping[str, float], *,
                   complete: bool) -> list[Problem]:
    """Parameters that `owner` does not take, and (when `complete`) those it needs but lacks."""
    out = [Problem(at + (key,), f"{owner} takes no {key}", did_you_mean(key, wanted) or f"it takes {', '.join(wanted)}",
                   at_key=True) for key in given if key not in wanted]
    missing = [k for k in wanted if k not in given]
    if complete and missing:
        out.append(Problem(at, f"{owner} needs {' and '.join(missing)}",
                           f"add {', '.join(f'{k}: VALUE' for k in missing)}"))
    return out


def _by_group_problems(at: Path_, family: Family, cm: ColumnModel, model: DatasetModel,
                       levels_ok: bool) -> list[Problem]:
    if not cm.by_group:
        return []
    groups = model.rows.groups
    if groups is None:
        return [Problem(at, "by_group needs rows.groups", "add groups to rows, or remove by_group", at_key=True)]
    out = []
    for level, parameters in cm.by_group.items():
        if level not in groups.sizes and levels_ok:
            out.append(Problem(at + (level,), f"'{level}' is not a group of rows.groups",
                               did_you_mean(level, groups.sizes) or f"groups: {', '.join(groups.sizes)}",
                               at_key=True))
        out += _parameter_problems(at + (level,), family, parameters, complete=False)
    return out


def _support_problems(at: Path_, family: Family, parameters: list[dict[str, float]], column: Column,
                      name: str) -> list[Problem]:
    """A family whose values can leave the column's declared [min, max] would make data the plan refuses
    (`parameters`: the model's, and each group's)."""
    low, high = family.lowest, max(highest(family, p) for p in parameters)
    out = []
    if column.min is not None and low < column.min:
        out.append(Problem(at, f"a {family.name} model can give values below column '{name}''s declared min "
                           f"{column.min:g}", "choose a family whose values stay in the declared range"))
    if column.max is not None and high > column.max:
        out.append(Problem(at, f"a {family.name} model can give values above column '{name}''s declared max "
                           f"{column.max:g}", "choose a family whose values stay in the declared range"))
    return out


def _censoring_problems(at: Path_, family: Family, cm: ColumnModel, columns: Mapping[str, Column],
                        filled: Mapping[str, str], model: DatasetModel) -> list[Problem]:
    out: list[Problem] = []
    if cm.censoring is not None:
        survival = ", ".join(f.name for f in FAMILIES.values() if f.survival)
        if not family.survival:
            out.append(Problem(at + ("censoring",), f"censoring cuts a positive time ({survival}), not a "
                               f"{family.name} value", "remove censoring", at_key=True))
        given = cm.censoring.parameters()
        out += _keys_problems(at + ("censoring",), f"{cm.censoring.family} censoring",
                              CENSORING_PARAMETERS[cm.censoring.family], given, complete=True)
        problem = censoring_problem(cm.censoring.family, given)
        if problem is not None:
            out.append(Problem(at + ("censoring", problem[0]), problem[1], problem[2]))
        if cm.event is None and family.survival:
            out.append(Problem(at + ("censoring",), "censoring needs the event column it fills",
                               "add event: COLUMN (the plan's true/false or 0/1 column)", at_key=True))
    if cm.event is not None:
        if cm.censoring is None:
            out.append(Problem(at + ("event",), "event applies only with censoring", "add censoring, or remove event"))
        out += _declared(at + ("event",), cm.event, columns, ("boolean", "integer"), "an event indicator")
        if cm.event in model.columns or cm.event in filled:
            out.append(Problem(at + ("event",), f"column '{cm.event}' is already filled otherwise",
                               "name a column that has no model of its own"))
    return out


def _cycle_problems(at: Path_, model: DatasetModel) -> list[Problem]:
    """Covariates must not depend on each other in a circle (a column is drawn after its covariates)."""
    graph = {name: [c for c, e in cm.covariates.items() if c in model.columns and c != name and not isinstance(e, dict)]
             for name, cm in model.columns.items()}
    state: dict[str, int] = {}
    out: list[Problem] = []

    def visit(node: str, trail: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                circle = trail[trail.index(nxt):] + [node, nxt] if nxt in trail else [node, nxt]
                out.append(Problem(at + ("columns", node, "covariates", nxt),
                                   f"the covariates go round in a circle: {' → '.join(circle)}",
                                   "a column can depend only on columns that do not depend on it", at_key=True))
            elif nxt not in state:
                visit(nxt, trail + [node])
        state[node] = 2

    for node in sorted(graph):
        if node not in state:
            visit(node, [])
    return out


# --- columns nobody modelled ----------------------------------------------------------------------

def column_uses(plan: Plan, dataset: str) -> dict[str, list[tuple[str, str]]]:
    """Declared column → (who uses it, in what role) over the plan's analyses and filters of `dataset`."""
    ds = plan.datasets[dataset]
    uses: dict[str, list[tuple[str, str]]] = {}

    def add(column: str | None, who: str, role: str) -> None:
        if column is not None and column in ds.columns:
            uses.setdefault(column, []).append((who, role))

    derived = derivations(ds)
    for name, expression in derived.items():
        for column in expression.columns:
            add(column, f"derived column '{name}'", "expression")
    for a in plan.analyses:
        if a.data != dataset:
            continue
        who = f"analysis '{a.id}'"
        names: list[str | None] = [a.outcome, a.predictor, a.event, *(a.covariates or [])]
        for used in names:
            for source in [used, *_through_derivations(used, derived)]:
                add(source, who, "outcome" if used == a.outcome else "column")
        for role in DESIGN_ROLES:
            design = a.groups.by if role == "groups" and a.groups else getattr(a, role, None)
            if isinstance(design, str):
                for source in [design, *_through_derivations(design, derived)]:
                    add(source, who, role)
    for key, text in (("the rows_where filter", ds.rows_where), *((f"set '{s}'", t) for s, t in ds.sets.items())):
        if text is not None:
            for column in parse_expression(text).columns:
                add(column, key, "filter")
    return uses


def _through_derivations(column: str | None, derived: Mapping) -> set[str]:
    """The declared columns a derived column is computed from."""
    out: set[str] = set()
    pending = [column] if column in derived else []
    while pending:
        for used in derived[pending.pop()].columns:
            if used in derived:
                pending.append(used)
            else:
                out.add(used)
    return out


def _unmodelled_problems(at: Path_, name: str, model: DatasetModel, plan: Plan, events: set[str]) -> list[Problem]:
    ds = plan.datasets[name]
    provided = set(model.columns) | set(rows_columns(model.rows)) | events
    out = []
    for column, users in column_uses(plan, name).items():
        if column in provided:
            continue
        design = [(who, role) for who, role in users if role in DESIGN_ROLES]
        if ds.columns[column].type == "text" and not design:
            continue  # filled with sequential identifiers
        who, role = (design or users)[0]
        out.append(Problem(at + ("columns",), f"{who} uses column '{column}' ({role}), which has no model",
                           "model it under columns, or fill it from rows (groups, strata, clusters, pairs)",
                           at_key=True))
    return out


def _compared_groups_problems(at: Path_, name: str, model: DatasetModel, plan: Plan) -> list[Problem]:
    """Every group an analysis compares needs rows."""
    groups = model.rows.groups
    out = []
    for a in plan.analyses:
        if a.data == name and a.groups is not None and groups is not None and a.groups.by == groups.column:
            for level in a.groups.compare:
                if level not in groups.sizes:
                    out.append(Problem(at + ("rows", "groups", "sizes"), f"analysis '{a.id}' compares group '{level}', "
                                       "which gets no rows here", f"add {level}: N"))
    return out
