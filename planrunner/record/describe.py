"""The descriptive table of an analysis: what a reviewer reads about the data before the results.

Per group (and per stratum within a group, when the analysis has strata) and per variable (the
outcome, then the predictor and covariates when the analysis has them): the rows used, the clusters
(with a cluster design), mean, s.d. (divisor n − 1), median, quartiles, minimum and maximum; for a
0/1 variable also the events and their proportion; and, from the rows read but not kept, how many
of the group's rows had a missing value and how many the rows_where filter excluded. Computed once, from
the dataset as read, when the record is built; the reports only show it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from planrunner.compile.design import labels_of
from planrunner.data.tables import Table
from planrunner.plan.derived import dataset_columns
from planrunner.plan.schema import Analysis, Dataset
from planrunner.record.canonical import plain_number as _f

QUARTILE_RULE = ("quartiles by linear interpolation between order statistics "
                 "(Hyndman & Fan 1996, definition 7)")
NUMERIC_TYPES = ("number", "integer", "boolean")


def _variables(analysis: Analysis, spec: Dataset) -> list[str]:
    """The outcome, then the predictor and covariates that are numbers (a category has no mean)."""
    columns = dataset_columns(spec)
    named = [analysis.outcome, analysis.predictor, *(getattr(analysis, "covariates", None) or [])]
    out: list[str] = []
    for name in named:
        if name is not None and name not in out and columns[name].type in NUMERIC_TYPES:
            out.append(name)
    return out


def _summary(values: np.ndarray, clusters: np.ndarray | None, binary: bool) -> dict[str, Any]:
    n = int(values.size)
    row: dict[str, Any] = {"n": n, "clusters": None if clusters is None else int(np.unique(clusters).size),
                           "mean": None, "sd": None, "median": None, "q1": None, "q3": None,
                           "min": None, "max": None, "events": None, "proportion": None}
    if n == 0:
        return row
    q1, median, q3 = np.quantile(values, [0.25, 0.5, 0.75])  # numpy's default: definition 7
    row.update(mean=_f(values.mean()), sd=_f(values.std(ddof=1)) if n > 1 else None, median=_f(median),
               q1=_f(q1), q3=_f(q3), min=_f(values.min()), max=_f(values.max()))
    if binary:
        events = int(np.count_nonzero(values == 1.0))
        row.update(events=events, proportion=_f(events / n))
    return row


def _dropped_counts(table: Table, by: dict[str, str | None]) -> dict[str, int | None]:
    """Rows of this cell (``by``: column -> label) that were read but not kept: with a missing value,
    and excluded by the rows_where filter. None when a column's labels of dropped rows are not known."""
    dropped = table.dropped
    mask = np.ones(dropped.missing.size, dtype=bool)
    for column, label in by.items():
        if label is None:
            continue
        labels = dropped.labels.get(column)
        if labels is None:
            return {"missing": None, "excluded": None}
        mask &= labels == label
    return {"missing": int(np.count_nonzero(mask & dropped.missing)),
            "excluded": int(np.count_nonzero(mask & ~dropped.missing))}


def descriptives(analysis: Analysis, spec: Dataset, table: Table) -> dict[str, Any]:
    """The descriptive table of one analysis (the record's ``analyses[].descriptives``)."""
    columns = dataset_columns(spec)
    rows_total = table.rows_used
    if analysis.groups is None:
        cells: list[tuple[str, np.ndarray, dict[str, str | None]]] = [("all rows", np.ones(rows_total, bool), {})]
    else:
        group_labels = labels_of(table, analysis.groups.by)
        cells = [(level, group_labels == level, {analysis.groups.by: level}) for level in analysis.groups.compare]
    strata = labels_of(table, analysis.strata) if analysis.strata is not None else None
    clusters = labels_of(table, analysis.clusters) if analysis.clusters is not None else None
    rows: list[dict[str, Any]] = []
    for variable in _variables(analysis, spec):
        values = table.columns[variable].astype(float)
        binary = columns[variable].type == "boolean" or bool(np.isin(values, (0.0, 1.0)).all())
        for group, mask, by in cells:
            parts: list[tuple[str | None, np.ndarray, dict[str, str | None]]] = [(None, mask, by)]
            if strata is not None and analysis.strata is not None:
                parts += [(str(s), mask & (strata == s), {**by, analysis.strata: str(s)})
                          for s in sorted({str(v) for v in strata[mask]})]
            for stratum, cell, cell_by in parts:
                rows.append({"variable": variable, "group": group, "stratum": stratum,
                             **_summary(values[cell], None if clusters is None else clusters[cell], binary),
                             **_dropped_counts(table, cell_by)})
    return {"quartiles": QUARTILE_RULE, "rows": rows}
