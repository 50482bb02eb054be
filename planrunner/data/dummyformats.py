"""A rehearsal's dummy files for XPT and .xlsx datasets: the declared columns' values (made by
`dummy.py`) handed to the writers of those formats (`xpt.write_xpt`, `sheets.write_sheet`), and
what a format cannot hold as one located message per column, with the fix.

XPT (SAS transport, version 5): numbers, integers and booleans (1/0) as numeric variables, dates as
days from 1960-01-01 with the DATE9. display format (the reader takes them back as dates), category
and text columns as character variables as long as their longest value. The member is named after
the file (`adsl.xpt` → `ADSL`) when that is a version 5 name, else after the dataset, else `DUMMY`,
and labelled `LABEL`. A workbook: one sheet, named by the plan's `sheet`, the column names in row 1,
typed cells under them (numbers, true/false, dates, text).
"""

from __future__ import annotations

import datetime as dt
from pathlib import PurePosixPath
from typing import Any

import numpy as np

from planrunner.data.formats import SAS_EPOCH
from planrunner.data.sheets import MAX_ROWS, cell_problems, title_problems, write_sheet
from planrunner.data.xpt import SAS_NAME, XptColumn, column_problems, write_xpt
from planrunner.errors import PlanError
from planrunner.plan.load import LoadedPlan, format_problems
from planrunner.plan.problems import Problem
from planrunner.plan.schema import Dataset

LABEL = "REHEARSAL DUMMY DATA"
EXACT_INTEGERS = 2 ** 53  # integers beyond this are not all doubles: an XPT file would change them


def _refuse(loaded: LoadedPlan, name: str, fmt: str, problems: list[Problem]) -> None:
    if problems:
        raise PlanError(f"rehearse cannot write dataset '{name}' as {fmt}",
                        problems=format_problems(problems, loaded.yaml, str(loaded.file)))


def _column_path(name: str, column: str) -> tuple[str, ...]:
    return ("datasets", name, "columns", column)


def _xpt_column(column: str, kind: str, values: np.ndarray) -> XptColumn:
    if kind == "date":
        days = (values.astype("datetime64[D]") - np.datetime64(SAS_EPOCH, "D")).astype(np.int64).astype(np.float64)
        return XptColumn(column, days, True, display_format=("DATE", 9, 0))
    if kind in ("number", "integer", "boolean"):
        return XptColumn(column, np.asarray(values, dtype=np.float64), True)
    return XptColumn(column, np.asarray(values, dtype=object), False)


def _largest(whole: np.ndarray) -> int:
    """The largest magnitude of whole numbers, in Python integers (no float rounding, no overflow)."""
    return max(abs(int(whole.min())), abs(int(whole.max()))) if whole.size else 0


def member_name(name: str, file: str) -> str:
    """The file's stem, else the dataset's name, when one is a version 5 name; else DUMMY."""
    for candidate in (PurePosixPath(file).stem, name):
        if SAS_NAME.fullmatch(candidate):
            return candidate.upper()
    return "DUMMY"


def dummy_xpt(loaded: LoadedPlan, name: str, spec: Dataset, columns: dict[str, np.ndarray]) -> bytes:
    """The dummy file of an XPT dataset; a column version 5 cannot hold is refused at its line."""
    problems = []
    variables = []
    for column, declared in spec.columns.items():
        variable = _xpt_column(column, declared.type, columns[column])
        found = column_problems(variable)
        if declared.type == "integer" and _largest(columns[column]) > EXACT_INTEGERS:
            found.append(("values", "whole numbers beyond ±2^53 are not all exact as doubles, the only numbers a "
                                    "version 5 file holds", f"declare min and max within ±{EXACT_INTEGERS}"))
        problems += [Problem(_column_path(name, column), what, hint, at_key=part == "name")
                     for part, what, hint in found]
        variables.append(variable)
    _refuse(loaded, name, "XPT (SAS transport, version 5)", problems)
    return write_xpt(member_name(name, spec.file), LABEL, variables)


def _cells(kind: str, values: np.ndarray) -> list[Any]:
    """A column's values as the Python objects a typed cell holds."""
    if kind == "date":
        return [dt.date.fromisoformat(str(v)) for v in values.astype("datetime64[D]")]
    if kind == "number":
        return [float(v) for v in values]
    if kind == "integer":
        return [int(v) for v in values]
    if kind == "boolean":
        return [bool(v) for v in values]
    return [str(v) for v in values]


def dummy_xlsx(loaded: LoadedPlan, name: str, spec: Dataset, columns: dict[str, np.ndarray]) -> bytes:
    """The dummy workbook of an .xlsx dataset, its one sheet named by the plan's `sheet`."""
    assert spec.sheet is not None  # the plan check requires it for a workbook
    rows = next(iter(columns.values())).size
    if rows >= MAX_ROWS:
        raise PlanError(f"dataset '{name}' would have {rows:,} dummy rows; a sheet holds {MAX_ROWS - 1:,} under its "
                        "header", where="--units", hint="rehearse with fewer units")
    cells = {c: _cells(d.type, columns[c]) for c, d in spec.columns.items()}
    problems = [Problem(("datasets", name, "sheet"), what, hint) for what, hint in title_problems(spec.sheet)]
    problems += [Problem(_column_path(name, c), what, hint) for c, values in cells.items()
                 for what, hint in cell_problems([c, *values])]
    _refuse(loaded, name, ".xlsx", problems)
    return write_sheet(spec.sheet, list(spec.columns), list(cells.values()))
