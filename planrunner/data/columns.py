"""Datasets held as typed columns rather than read from a file (a simulated data set): the same
checks of declared levels and ranges, derived columns, rows_where filter and analysis sets as a
file read by `data.tables`, through the readers' own steps."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path

import numpy as np

from planrunner.data.sets import evaluate_sets
from planrunner.data.tables import Exclusion, Table, derived_facts, filtered_and_derived, first_lines, lines_text
from planrunner.errors import DataError
from planrunner.plan.schema import Column, Dataset


def table_from_columns(name: str, spec: Dataset, columns: Mapping[str, np.ndarray], *, source: str) -> Table:
    """A dataset held as typed columns (one array per declared column, typed as `read_table` types
    them: float64 numbers, int64 integers, bool booleans, datetime64[D] dates, object texts), made
    into the `Table` an analysis reads: the declared levels and ranges checked, the derived columns,
    the rows_where filter and the analysis sets applied by the readers' own steps. ``source`` names
    the data in messages and stands for the file (e.g. 'simulated data set 12 of scenario null');
    row r is called line r + 1, as if the columns had been read from a file with a header."""
    absent = [c for c in spec.columns if c not in columns]
    if absent:
        raise DataError(f"no values for declared column(s) {', '.join(absent)}", where=source,
                        hint=f"give every column of datasets.{name}.columns")
    rows = {int(np.asarray(columns[c]).shape[0]) for c in spec.columns}
    if len(rows) != 1:
        raise DataError(f"the columns have different lengths ({', '.join(map(str, sorted(rows)))})", where=source,
                        hint="give one value per row in every column")
    rows_read = rows.pop()
    line_of = np.arange(2, rows_read + 2, dtype=np.int64)
    keep = np.ones(rows_read, dtype=bool)
    problems = [problem for c in spec.columns
                if (problem := outside_declared(c, spec.columns[c], np.asarray(columns[c]), source, line_of))]
    if problems:
        raise DataError.of_all(problems, source)
    excluded: list[Exclusion] = []
    typed = filtered_and_derived(name, spec, source, {c: np.asarray(columns[c]) for c in spec.columns},
                                 line_of, keep, excluded)
    return evaluate_sets(name, spec, Table(
        name=name, file=source, path=Path(source), sha256="", bytes=0, rows_read=rows_read,
        excluded=tuple(excluded), columns=typed, lines=line_of[keep],
        derived=derived_facts(spec),
        format="columns"))


def outside_declared(name: str, declared: Column, values: np.ndarray, source: str,
                      line_of: np.ndarray) -> DataError | None:
    """A typed column's values outside its declared levels or range (as `_convert` refuses them)."""
    if declared.levels is not None:
        bad = ~np.isin(values.astype(object), declared.levels)
        what = "are not among the declared levels " + ", ".join(declared.levels)
    elif values.dtype.kind in "fiu":
        low = declared.min if declared.min is not None else -np.inf
        high = declared.max if declared.max is not None else np.inf
        bad = ~(np.isfinite(values) & (values >= low) & (values <= high))
        what = "are not finite numbers within the declared range"
    else:
        return None
    if not bad.any():
        return None
    count = int(bad.sum())
    return DataError(f"column '{name}' ({declared.type}): {count} value(s) {what}, e.g. "
                     f"'{values[np.flatnonzero(bad)[0]]}' on line(s) {lines_text(first_lines(bad, line_of), count)}",
                     where=source, hint=f"check the model of '{name}' against the plan's declaration")
