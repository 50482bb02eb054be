"""Data formats beside CSV and TSV: XPT (v5), CDISC Dataset-JSON, Parquet and .xlsx workbooks.

Each is read into what the CSV reader makes: the file's column names, and each declared column as
text values, one per row, with the row's number (the observation number: the first data row is
row 1). So every declared check (type, levels, range, missing values, the row filter) runs
unchanged in `tables.py`. The text of a value is the one a CSV export would hold: a whole number
without a decimal point, any other double in the shortest form that reads back to the same double,
a date as YYYY-MM-DD, a boolean as true/false. A null (an XPT missing value, JSON null, an empty
cell) is a missing value whatever `missing_values` lists.

What a typed file adds is checked first: a column stored as text where the plan declares numbers
(or dates) is refused with its rows, never parsed from its text; and each file's own variable
labels and display formats go into the record's data dictionary.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path

import numpy as np

from planrunner.errors import DataError
from planrunner.plan.schema import DATA_SUFFIXES, Dataset

TEXT_FORMATS = ("csv", "tsv")
TYPED_FORMATS = ("xpt", "dataset-json", "parquet", "xlsx")
FORMAT_WORDS = {"xpt": "XPT", "dataset-json": "Dataset-JSON", "parquet": "Parquet", "xlsx": ".xlsx"}
NULL = "\x00null"  # the text of a null cell: never a value of a text file (NUL bytes are refused there)
SHOW = 5
SAS_EPOCH = dt.date(1960, 1, 1)
# which storage kinds each declared type accepts (the values' own checks follow, as for CSV)
ACCEPTS = {"number": {"integer", "number"}, "integer": {"integer", "number"},
           "boolean": {"boolean", "integer", "number", "text"}, "date": {"date", "datetime", "text"},
           "category": {"text", "integer", "number", "boolean", "date"},
           "text": {"text", "integer", "number", "boolean", "date", "datetime"}}
KIND_WORDS = {"text": "text", "integer": "whole numbers", "number": "numbers", "boolean": "true/false values",
              "date": "dates", "datetime": "date-times"}


@dataclass(frozen=True)
class Entry:
    """One column of the data dictionary: what the file says about it."""

    name: str
    label: str | None
    display_format: str | None
    stored_as: str


@dataclass(frozen=True)
class Cells:
    columns: dict[str, np.ndarray]  # declared columns as text (object arrays), NULL where null
    rows: np.ndarray  # observation number of each row (1, 2, ...)
    ignored: tuple[str, ...]
    dictionary: tuple[Entry, ...]  # declared columns, in the plan's order


def format_of(spec: Dataset, path: Path) -> str:
    """The plan's `format`, else the one the file's ending names (CSV when it names none)."""
    return spec.format or DATA_SUFFIXES.get(path.suffix.lower(), "csv")


def text_dictionary(spec: Dataset) -> tuple[Entry, ...]:
    return tuple(Entry(c, None, None, "text") for c in spec.columns)


def read_cells(data: bytes, fmt: str, shown: str, name: str, spec: Dataset) -> Cells:
    """The declared columns of a typed file as text, with the file's dictionary."""
    if not data:
        raise DataError("the file is empty", where=shown, hint=f"a {FORMAT_WORDS[fmt]} file with data rows is expected")
    names, values, entries = read_columns(data, fmt, shown, sheet=spec.sheet, key=f"datasets.{name}.sheet",
                                          wanted=set(spec.columns))
    absent = [c for c in spec.columns if c not in names]
    if absent:
        raise DataError(f"declared column(s) missing from the file: {', '.join(absent)}", where=shown,
                        hint=f"the file has: {', '.join(names)}; check the spelling in datasets.{name}.columns")
    repeated = sorted({n for n in names if names.count(n) > 1 and n in spec.columns})
    if repeated:
        raise DataError(f"column(s) named more than once in the file: {', '.join(repeated)}", where=shown,
                        hint="rename or remove the repeated columns so that the plan names one of them")
    extra = [n for n in names if n not in spec.columns]
    if extra and spec.undeclared_columns == "refuse":
        raise DataError(f"column(s) not declared in the plan: {', '.join(extra)}", where=shown,
                        hint=f"declare them in datasets.{name}.columns, remove them from the file, or set "
                             f"datasets.{name}.undeclared_columns: ignore")
    count = len(values[names[0]]) if names else 0
    if count == 0:
        raise DataError("the file has columns but no data rows", where=shown, hint="check that the extract is complete")
    problems = []
    columns: dict[str, np.ndarray] = {}
    for column, declared in spec.columns.items():
        try:
            columns[column] = _as_text(values[column], column, declared.type, shown)
        except DataError as exc:
            problems.append(exc)
    if problems:
        raise DataError.of_all(problems, shown)
    by_name = {e.name: e for e in entries}
    return Cells(columns, np.arange(1, count + 1, dtype=np.int64), tuple(extra),
                 tuple(by_name[c] for c in spec.columns))


def _kind(value: object) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "boolean"
    if isinstance(value, (int, np.integer)):
        return "integer"
    if isinstance(value, (float, np.floating, Decimal)):
        return "number"
    if isinstance(value, dt.datetime):
        return "datetime"
    if isinstance(value, dt.date):
        return "date"
    if isinstance(value, str):
        return "text"
    return type(value).__name__


def value_text(value: object) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        number = float(value)
        if math.isfinite(number) and number == math.floor(number) and abs(number) < 2.0**63:
            return str(int(number))  # as a CSV export writes a whole number: 3, not 3.0
        return repr(number)  # the shortest text that reads back to the same double
    if isinstance(value, dt.datetime):
        return value.date().isoformat() if value.time() == dt.time(0) and value.tzinfo is None else value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    return str(value).strip()


def _as_text(values: list[object], column: str, kind: str, shown: str) -> np.ndarray:
    """One column's values as text, after checking that their storage suits the declared type."""
    allowed = ACCEPTS[kind]
    wrong = [i for i, v in enumerate(values) if not _is_null(v) and _kind(v) not in allowed]
    if wrong:
        first = values[wrong[0]]
        stored = KIND_WORDS.get(_kind(first), _kind(first))
        rows = ", ".join(str(i + 1) for i in wrong[:SHOW]) + (f" and {len(wrong) - SHOW} more"
                                                              if len(wrong) > SHOW else "")
        raise DataError(f"column '{column}' ({kind}): {len(wrong)} value(s) are stored as {stored}, e.g. "
                        f"'{value_text(first)}' on row(s) {rows}", where=shown,
                        hint=f"store the column as {KIND_WORDS['number' if kind == 'integer' else kind]} in the "
                             f"file, or declare its type as it is stored")
    return np.array([NULL if _is_null(v) else value_text(v) for v in values], dtype=object)


def _is_null(value: object) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value))


# ------------------------------------------------------------------ the readers, one per format

Read = tuple[list[str], Mapping[str, list[object]], list[Entry]]


def read_columns(data: bytes, fmt: str, shown: str, *, sheet: str | None, key: str,
                 wanted: set[str] | None = None) -> Read:
    """The file's column names, the values (Python objects, None where null) of the `wanted` columns
    (every column when None), and its dictionary; `key` is the plan key that names a sheet."""
    return _READERS[fmt](data, shown, sheet, key, wanted)


def _xpt(data: bytes, shown: str, sheet: str | None, key: str, wanted: set[str] | None) -> Read:
    from planrunner.data.xpt import DAY_FORMATS, SECOND_FORMATS, read_xpt

    transport = read_xpt(data, shown)
    columns = dict(transport.columns)
    entries = []
    for v in transport.variables:
        form = (v.display_format or "").upper()
        base = re.sub(r"[\d.]+$", "", form)
        if v.numeric and base in SECOND_FORMATS:
            columns[v.name] = [None if x is None else _sas_moment(float(x), seconds=True)  # type: ignore[arg-type]
                               for x in columns[v.name]]
        elif v.numeric and base in DAY_FORMATS:
            columns[v.name] = [None if x is None else _sas_moment(float(x), seconds=False)  # type: ignore[arg-type]
                               for x in columns[v.name]]
        entries.append(Entry(v.name, v.label, v.display_format, "numeric" if v.numeric else f"character({v.length})"))
    return [v.name for v in transport.variables], columns, entries


def _sas_moment(value: float, *, seconds: bool) -> object:
    """A SAS date (days) or date-time (seconds) from 1960-01-01; a fraction of a day stays a number."""
    days = value / 86400 if seconds else value
    if days != math.floor(days) or abs(days) > 3_000_000:
        return value  # not a whole day: left as a number, which a date column refuses with its rows
    return SAS_EPOCH + dt.timedelta(days=int(days))


def _dataset_json(data: bytes, shown: str, sheet: str | None, key: str, wanted: set[str] | None) -> Read:
    from planrunner.data.datasetjson import read_dataset_json

    document = read_dataset_json(data, shown)
    return ([i.name for i in document.items], document.columns,
            [Entry(i.name, i.label, i.display_format, i.data_type) for i in document.items])


def _parquet(data: bytes, shown: str, sheet: str | None, key: str, wanted: set[str] | None) -> Read:
    from planrunner.data.sheets import missing_package

    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise missing_package("pyarrow", "Parquet files", shown) from None
    try:
        table = pq.read_table(pa.BufferReader(data))
    except Exception as exc:  # pyarrow raises its own error kinds for damaged files
        raise DataError(f"the file cannot be read as Parquet: {exc}", where=shown,
                        hint="the file is damaged or truncated; write it again") from None
    names = list(table.column_names)
    columns = {n: table.column(i).to_pylist() for i, n in enumerate(names) if wanted is None or n in wanted}
    entries = []
    for field in table.schema:
        meta = {k.decode(): v.decode("utf-8", "replace") for k, v in (field.metadata or {}).items()}
        entries.append(Entry(field.name, meta.get("label") or meta.get("description"), None, str(field.type)))
    return names, columns, entries


def _xlsx(data: bytes, shown: str, sheet: str | None, key: str, wanted: set[str] | None) -> Read:
    from planrunner.data.sheets import read_sheet

    found = read_sheet(data, sheet, shown, key)
    return found.names, found.columns, [Entry(n, None, found.number_formats[n], "cells") for n in found.names]


_READERS = {"xpt": _xpt, "dataset-json": _dataset_json, "parquet": _parquet, "xlsx": _xlsx}


# ------------------------------------------------------------------ messages in rows, not lines

_LINE_WORDS = [(re.compile(r"\bline\(s\)"), "row(s)"), (re.compile(r"\blines\b"), "rows"),
               (re.compile(r"\bline (?=\d)"), "row ")]


def in_rows(exc: DataError) -> DataError:
    """The same error, counting rows (observations) where the text readers count file lines."""

    def words(text: str | None) -> str | None:
        if text is None:
            return None
        for pattern, word in _LINE_WORDS:
            text = pattern.sub(word, text)
        return text

    return DataError(words(exc.message) or "", where=exc.where, hint=words(exc.hint),
                     problems=[in_rows(p) for p in exc.problems])

