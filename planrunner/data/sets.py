"""Analysis sets: named row selections of one dataset (ICH E9 §5.2: full analysis set,
per-protocol set, safety set), declared once under `sets:` and chosen by an analysis with `set:`.

A set is a condition in the row-filter language, evaluated on the rows the dataset keeps (after
missing values, `rows_where` and the derived columns). An analysis with `set: NAME` sees only the
set's rows; the record lists each set's rows and the rows it leaves out, with the condition as the
reason.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from planrunner.data.tables import SHOW_LINES, Dropped, Exclusion, Table, group_value
from planrunner.errors import DataError, ExpressionError
from planrunner.plan.expr import parse_expression
from planrunner.plan.schema import Dataset


@dataclass(frozen=True)
class AnalysisSet:
    name: str
    condition: str
    rows: np.ndarray  # which of the table's rows belong to the set


def evaluate_sets(name: str, spec: Dataset, table: Table) -> Table:
    """The table with its sets evaluated (every set's rows, or an error naming the lines)."""
    if not spec.sets:
        return table
    found = []
    for set_name, condition in spec.sets.items():
        try:
            rows = parse_expression(condition).evaluate(dict(table.columns))
        except ExpressionError as exc:
            lines = table.lines[list(exc.rows)] if exc.rows else ()
            on = (f" (line(s) {', '.join(str(int(n)) for n in lines[:SHOW_LINES])} of {table.file})"
                  if exc.rows else "")
            raise DataError(f"set '{set_name}' cannot be evaluated: {exc.message}{on}",
                            where=f"datasets.{name}.sets.{set_name}", hint=exc.hint) from None
        found.append(AnalysisSet(set_name, condition, np.asarray(rows, dtype=bool)))
    return replace(table, sets=tuple(found))


def select(table: Table, set_name: str | None) -> Table:
    """The table an analysis sees: the whole table, or the rows of its set (and why others are out)."""
    if set_name is None:
        return table
    chosen = next(s for s in table.sets if s.name == set_name)  # the plan check names only declared sets
    out = ~chosen.rows
    excluded = table.excluded
    if out.any():
        excluded += (Exclusion(f"set {set_name}: not ({chosen.condition})", int(out.sum()),
                               tuple(int(n) for n in table.lines[out][:SHOW_LINES])),)
    # the rows the set leaves out count as excluded (not missing) in the analysis's descriptive table
    labels = {c: np.concatenate([v, np.array([group_value(x) for x in table.columns[c][out]], dtype=object)])
              for c, v in table.dropped.labels.items() if c in table.columns}
    dropped = Dropped(np.concatenate([table.dropped.missing, np.zeros(int(out.sum()), dtype=bool)]), labels)
    return replace(table, columns={c: v[chosen.rows] for c, v in table.columns.items()},
                   lines=table.lines[chosen.rows], excluded=excluded, dropped=dropped)


def set_entries(table: Table) -> list[dict]:
    """The record's account of each set: its condition, its rows, and the rows it leaves out."""
    return [{"name": s.name, "condition": s.condition, "rows": int(s.rows.sum()),
             "excluded": {"reason": f"not ({s.condition})", "rows": int((~s.rows).sum()),
                          "first_lines": [int(n) for n in table.lines[~s.rows][:SHOW_LINES]]}}
            for s in table.sets]
