"""Derived columns (``derive:`` in a dataset): their types and their problems, before any data are read.

A derivation is written in the row-filter language (`planrunner.plan.expr`): parsed by its own parser,
never evaluated as code. Its type follows from the types of the columns it names: arithmetic and the
numeric functions give a number, a comparison gives true/false. A derivation may name the declared
columns and the derived columns written before it; every other stage then sees it as one more column
(`dataset_columns`).
"""

from __future__ import annotations

from planrunner.errors import ExpressionError
from planrunner.plan.expr import DERIVED_KINDS, Kind, ValueExpression, parse_value_expression
from planrunner.plan.problems import Problem, did_you_mean
from planrunner.plan.schema import Column, Dataset

_TYPE_OF_KIND = {"number": "number", "bool": "boolean"}


def _typed(ds: Dataset) -> tuple[dict[str, Column], list[Problem]]:
    """Declared plus derived columns (each derived one typed), and the derivations' problems."""
    columns = dict(ds.columns)
    kinds: dict[str, Kind] = {name: DERIVED_KINDS[spec.type] for name, spec in ds.columns.items()}
    problems: list[Problem] = []
    for name, spec in ds.derived().items():
        at: tuple[str | int, ...] = ("derive", name) if isinstance(ds.derive[name], str) else ("derive", name,
                                                                                               "expression")
        kind = None
        if name in ds.columns:
            problems.append(Problem(("derive", name), f"'{name}' is a declared column of the dataset",
                                    "give the derived column its own name", at_key=True))
            continue
        try:
            expression = parse_value_expression(spec.expression)
            unknown = sorted(expression.columns - set(kinds))
            for column in unknown:
                later = column in ds.derive
                problems.append(Problem(at, f"the expression names column '{column}', which "
                                        + ("is derived after it" if later else "the dataset does not declare"),
                                        "derive it before this one" if later else did_you_mean(column, kinds)))
            if not unknown:
                kind = expression.kind(kinds)
                if kind not in _TYPE_OF_KIND:
                    problems.append(Problem(at, "a derived column must be a number or true/false, but this "
                                            f"expression gives {kind}", "compute a number or a condition"))
                    kind = None
        except ExpressionError as exc:
            problems.append(Problem(at, f"{exc.message} in the expression", exc.hint, offset=exc.position))
        declared = spec.type
        if kind is not None and declared is not None and _TYPE_OF_KIND[kind] != declared:
            problems.append(Problem(("derive", name, "type"), f"declared {declared}, but the expression gives "
                                    f"{'a number' if kind == 'number' else 'true/false'}",
                                    f"declare type: {_TYPE_OF_KIND[kind]}, or change the expression"))
        column_type = declared or (_TYPE_OF_KIND[kind] if kind is not None else "number")
        columns[name] = Column(type=column_type, unit=spec.unit)  # type: ignore[arg-type]  # a checked literal
        kinds[name] = DERIVED_KINDS[column_type]
    return columns, problems


def dataset_columns(ds: Dataset) -> dict[str, Column]:
    """Every column an analysis may name: the declared ones, then the derived ones, typed."""
    return _typed(ds)[0]


def derived_problems(dataset: str, ds: Dataset) -> list[Problem]:
    """Every problem of a dataset's derivations, located at `datasets.NAME.derive...`."""
    return [Problem(("datasets", dataset, *p.path), p.message, p.hint, at_key=p.at_key, offset=p.offset)
            for p in _typed(ds)[1]]


def derivations(ds: Dataset) -> dict[str, ValueExpression]:
    """The parsed derivations in the order written (call after the plan has been checked)."""
    return {name: parse_value_expression(spec.expression) for name, spec in ds.derived().items()}


def needed_by(ds: Dataset, names: frozenset[str]) -> set[str]:
    """The derived columns that `names` use, directly or through other derived columns."""
    parsed = derivations(ds)
    needed: set[str] = set()
    pending = [n for n in names if n in parsed]
    while pending:
        name = pending.pop()
        if name not in needed:
            needed.add(name)
            pending += [n for n in parsed[name].columns if n in parsed]
    return needed
