"""Reading data files into typed columns, exactly as the plan declares them.

Everything here names the file and the line of a problem: a reader of the message should be able
to open the file at that line. Line numbers count the header as line 1 (the first data row is line 2).
"""

from __future__ import annotations

import csv
import errno
import hashlib
import io
import os
import re
import stat
import unicodedata
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date
from decimal import Decimal, InvalidOperation
from pathlib import Path
from typing import Any

import numpy as np

from planrunner.data.columnar import Parsed
from planrunner.data.formats import NULL, TEXT_FORMATS, Entry, format_of, in_rows, read_cells, text_dictionary
from planrunner.errors import DataError, ExpressionError
from planrunner.plan.derived import dataset_columns, derivations, needed_by
from planrunner.plan.expr import parse_expression
from planrunner.plan.schema import Column, Dataset

TRUE_WORDS = {"true", "yes", "1"}
FALSE_WORDS = {"false", "no", "0"}
SHOW_LINES = 5  # how many offending lines a message lists
GROUPING_TYPES = ("category", "boolean", "integer", "text")
INT64_MAX = 2**63 - 1  # an integer column holds 64-bit integers: beyond this it is refused
FLOAT_EXACT = 2**53  # a double holds every whole number up to here, and not every one above
_ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")
_PLAIN_DATE = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")
# a column of plain decimals or dates up to this many values is read without pandas (a value costs
# about half again as much as in pandas' parser, importing pandas half a second)
PLAIN_VALUES_UP_TO = 200_000
# a decimal that pandas' to_numeric and Python's float read as the same double (no "+": pandas then
# reads some decimals one unit in the last place off; tests/test_light_paths.py compares them)
_PLAIN_NUMBER = re.compile(r"-?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]{1,4})?")


@dataclass(frozen=True)
class Exclusion:
    reason: str
    rows: int
    lines: tuple[int, ...]  # file lines of the first few excluded rows


@dataclass(frozen=True)
class Dropped:
    """The rows read but not kept, for counts per group: whether each had a missing value (else the
    keep filter removed it), and its grouping-type columns as groups.compare names them (None where
    the value itself was missing)."""

    missing: np.ndarray  # bool, one per dropped row
    labels: Mapping[str, np.ndarray]  # column -> object array of labels, one per dropped row


NO_ROWS_DROPPED = Dropped(np.zeros(0, dtype=bool), {})


@dataclass(frozen=True)
class Table:
    """A dataset as read: typed columns of the rows kept, and how we got there."""

    name: str
    file: str  # as written in the plan
    path: Path  # resolved
    sha256: str
    bytes: int
    rows_read: int
    excluded: tuple[Exclusion, ...]
    columns: Mapping[str, np.ndarray]
    lines: np.ndarray  # file line of each kept row
    ignored_columns: tuple[str, ...] = ()  # header columns the plan does not declare
    # distinct values (as groups.compare names them) of each grouping-type column over every row
    # read, before missing values and the rows_where filter: tells "absent from the file" apart from
    # "removed by the filter"
    values_read: Mapping[str, tuple[str, ...]] = field(default_factory=dict)
    derived: tuple[tuple[str, str, str], ...] = ()  # (name, expression, type) of each derived column
    format: str = "csv"  # csv, tsv, xpt, dataset-json, parquet, xlsx
    dictionary: tuple[Entry, ...] = ()  # what the file says of each declared column (labels, formats)
    dropped: Dropped = NO_ROWS_DROPPED  # the rows not kept, for missing and excluded counts per group
    sets: tuple[Any, ...] = ()  # the dataset's analysis sets (data/sets.py AnalysisSet), in the plan's order

    @property
    def rows_used(self) -> int:
        return int(self.lines.size)


def resolve_data_path(plan_folder: Path, file: str, *, data_root: Path | None = None) -> Path:
    """The data file's real path, refused when it leaves its root (symlinks resolved).

    The root is the plan's folder, or `data_root` when the command line names one
    (`--data-root DIR`): then the plan's relative paths are looked up under DIR instead, so a plan
    written beside its data runs unchanged against a locked data folder elsewhere.
    """
    base = plan_folder if data_root is None else Path(data_root)
    if data_root is not None and not base.is_dir():
        raise DataError("the data root is not a folder", where=str(data_root),
                        hint="name an existing folder with --data-root")
    try:
        root = base.resolve()
        path = (base / file).resolve()
    except (RuntimeError, OSError) as exc:  # a symlink loop (RuntimeError before Python 3.13)
        raise DataError(f"data file '{file}' cannot be resolved: {exc}", where=file,
                        hint="a symbolic link on this path points (directly or not) back to itself; "
                             "replace it with the file or a link to the file") from None
    if not path.is_relative_to(root):
        allowed = "the plan's folder" if data_root is None else "the data root"
        raise DataError(f"data file '{file}' resolves to {path}, outside {allowed} {root}",
                        where=file, hint="keep data inside the plan's folder, or name the folder that holds "
                                         "it with --data-root DIR" if data_root is None else
                                         "keep data inside the data root")
    return path


def read_regular_file(path: Path, shown: str, key: str) -> bytes:
    """The bytes of a regular file, opened once and checked on the opened descriptor.

    Checking the path first and opening it after would let a file swapped for a pipe in between
    hang the run, or a swapped-in symlink lead elsewhere: open without following a final symlink
    and without blocking on a pipe, then ask the open descriptor what it is.
    """
    flags = os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | getattr(os, "O_NONBLOCK", 0)
    try:
        descriptor = os.open(path, flags)
    except FileNotFoundError:
        raise DataError("data file not found", where=shown,
                        hint=f"the plan expects it at {path}; check {key}") from None
    except IsADirectoryError:
        raise DataError("this is a folder, not a data file", where=shown,
                        hint=f"name the CSV or TSV file inside it in {key}") from None
    except OSError as exc:
        what = ("it was replaced by a symbolic link after its path was checked" if exc.errno == errno.ELOOP
                else exc.strerror or str(exc))
        raise DataError(f"the data file cannot be opened: {what}", where=shown,
                        hint=f"check the file at {path}") from None
    try:
        mode = os.fstat(descriptor).st_mode
        if stat.S_ISDIR(mode):
            raise DataError("this is a folder, not a data file", where=shown,
                            hint=f"name the CSV or TSV file inside it in {key}")
        if not stat.S_ISREG(mode):
            raise DataError("this is not a regular file (a device or a pipe?)", where=shown,
                            hint=f"name a CSV or TSV file in {key}")
    except DataError:
        os.close(descriptor)
        raise
    with os.fdopen(descriptor, "rb") as handle:
        return handle.read()


def file_sha256(path: Path) -> tuple[str, int]:
    digest = hashlib.sha256()
    size = 0
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
            size += len(chunk)
    return digest.hexdigest(), size


def first_lines(mask: np.ndarray, line_of: np.ndarray) -> list[int]:
    """The file lines of the first SHOW_LINES rows ``mask`` selects (``line_of``: each row's line)."""
    return [int(n) for n in line_of[np.flatnonzero(mask)[:SHOW_LINES]]]


def lines_text(lines: Sequence[int] | np.ndarray, total: int | None = None) -> str:
    """Line numbers as a message lists them: the first SHOW_LINES, then 'and N more' of ``total``
    (default: as many as are given), e.g. '3, 8, 9 and 12 more'."""
    shown = [int(n) for n in lines[:SHOW_LINES]]
    total = len(lines) if total is None else total
    return ", ".join(str(n) for n in shown) + (f" and {total - len(shown)} more" if total > len(shown) else "")


def read_table(name: str, spec: Dataset, plan_folder: Path, *, data_root: Path | None = None) -> Table:
    """Read one dataset: hash it, check its columns and types, handle missing values, filter rows."""
    path = resolve_data_path(plan_folder, spec.file, data_root=data_root)
    shown = spec.file
    # hash the very bytes that are parsed: a file changing between two reads cannot slip past a pin
    data = read_regular_file(path, shown, f"datasets.{name}.file")
    sha, size = hashlib.sha256(data).hexdigest(), len(data)
    if spec.sha256 is not None and spec.sha256 != sha:
        raise DataError(f"the file has changed: its sha256 is {sha}, the plan pins {spec.sha256}",
                        where=shown, hint="use the file the plan was written for, or update the pin "
                                          "(a deviation to document)")
    fmt = format_of(spec, path)
    if fmt in TEXT_FORMATS:
        fast = _columnar(data, fmt, spec, name, shown)
        if fast is not None:
            parsed, line_of, ignored = fast
            try:
                return _checked_table(name, spec, shown, {}, line_of, set(), parsed=parsed, path=path, sha256=sha,
                                      bytes=size, ignored_columns=ignored, format=fmt,
                                      dictionary=text_dictionary(spec))
            except (DataError, _Unvouched):
                pass  # read again line by line: that reader locates every problem, all at once
        header, rows, line_of = read_rows(data, fmt, shown)
        index = _column_index(header, spec, name, fmt, shown)
        raw = {c: np.array([row[index[c]].strip() for row in rows], dtype=object) for c in spec.columns}
        ignored = tuple(h or f"(unnamed column {i + 1})" for i, h in enumerate(header) if h not in spec.columns)
        dictionary, nulls = text_dictionary(spec), set()
        if not rows:
            raise DataError("the file has a header but no data rows", where=shown,
                            hint="check that the extract is complete")
    else:  # typed formats: the declared columns as text, one value per observation (data/formats.py)
        cells = read_cells(data, fmt, shown, name, spec)
        raw, line_of, ignored, dictionary, nulls = cells.columns, cells.rows, cells.ignored, cells.dictionary, {NULL}
    try:
        return _checked_table(name, spec, shown, raw, line_of, nulls, path=path, sha256=sha, bytes=size,
                              ignored_columns=ignored, format=fmt, dictionary=dictionary)
    except DataError as exc:  # a typed file's rows are observations, not lines of text
        raise (exc if fmt in TEXT_FORMATS else in_rows(exc)) from None


class _Unvouched(Exception):
    """The columnar reader met something only the line-by-line reader may judge."""


def _columnar(data: bytes, fmt: str, spec: Dataset, name: str,
              shown: str) -> tuple[dict[str, Parsed], np.ndarray, tuple[str, ...]] | None:
    """A large plain file's declared columns from pyarrow's vectorised parser (data/columnar.py),
    each row's line and the ignored header columns; None when the file is small or not plain, or
    pyarrow finds a problem."""
    from planrunner.data import columnar

    delimiter = "\t" if fmt == "tsv" else ","
    if len(data) < columnar.COLUMNAR_FROM_BYTES:
        return None
    body = columnar.plain_body(data, delimiter)
    if body is None:
        return None
    header = [h.strip() for h in columnar.header_fields(body, delimiter)]
    try:
        index = _column_index(header, spec, name, fmt, shown)
    except DataError:
        return None
    kinds: dict[str, columnar.Kind] = {c: "number" if spec.columns[c].type == "number" else
                                       "integer" if spec.columns[c].type == "integer" else "text"
                                       for c in spec.columns}
    parsed_at = columnar.read_columns(body, delimiter, len(header), {index[c]: kinds[c] for c in spec.columns},
                                      list(spec.missing_values))
    if parsed_at is None:
        return None
    parsed = {c: parsed_at[index[c]] for c in spec.columns}
    rows_read = int(parsed[next(iter(spec.columns))].missing.size)
    line_of = np.arange(2, rows_read + 2, dtype=np.int64)  # no blank line, no quoted line break
    ignored = tuple(h or f"(unnamed column {i + 1})" for i, h in enumerate(header) if h not in spec.columns)
    return parsed, line_of, ignored


def _checked_table(name: str, spec: Dataset, shown: str, raw: dict[str, np.ndarray], line_of: np.ndarray,
                   nulls: set[str], parsed: Mapping[str, Parsed] | None = None, **facts: Any) -> Table:
    """Missing values, types, levels and ranges of the declared columns, the derived columns and the
    row filter; `facts` are the file's (path, hash, size, format, dictionary, ignored columns).

    `parsed` holds the columnar reader's columns instead of `raw` (text-like ones as their distinct
    texts); a value it cannot vouch for raises _Unvouched, and the caller reads the file line by line
    instead."""
    rows_read = int(line_of.size)
    keep = np.ones(rows_read, dtype=bool)
    excluded: list[Exclusion] = []
    parsed = parsed or {}

    markers = set(spec.missing_values) | nulls
    # a columnar-read integer column's distinct values are named only when asked for (ValuesRead)
    values_read = {c: _distinct(_texts_read(parsed[c]) if c in parsed else raw[c], spec.columns[c].type, markers)
                   for c in spec.columns if spec.columns[c].type in GROUPING_TYPES
                   and (c not in parsed or parsed[c].uniques is not None)}
    integers = {c: (p.integers, p.missing) for c, p in parsed.items() if p.integers is not None}
    problems: dict[str, DataError] = {}  # every column's first problem, reported together
    for column in spec.columns:
        if column in parsed:
            missing = parsed[column].missing & keep
        else:
            missing = np.isin(raw[column], list(markers)) & keep if markers else np.zeros(rows_read, bool)
        if missing.any():
            count = int(missing.sum())
            if spec.missing == "refuse":
                problems[column] = DataError(
                    f"column '{column}' has {count} missing value(s) on line(s) "
                    f"{lines_text(first_lines(missing, line_of), count)}", where=shown,
                    hint=f"fill them in, or set datasets.{name}.missing: drop to exclude those rows")
                continue
            excluded.append(Exclusion(f"missing value in '{column}'", count, tuple(first_lines(missing, line_of))))
            keep &= ~missing

    columns = {}
    for c in spec.columns:
        if c in problems:
            continue
        try:
            columns[c] = (_vouched(parsed[c], keep, c, spec.columns[c], shown) if c in parsed
                          else _convert(raw[c], keep, c, spec.columns[c], shown, line_of))
        except DataError as exc:
            problems[c] = exc
    if problems:
        raise DataError.of_all([problems[c] for c in spec.columns if c in problems], shown)
    # the rows that missing values left (no copy when they left every row: a large file's columns are big)
    table_columns = columns if keep.all() else {c: v[keep] for c, v in columns.items()}
    table_columns = filtered_and_derived(name, spec, shown, table_columns, line_of, keep, excluded)
    derived = {c: table_columns[c] for c in spec.derive if table_columns[c].dtype == bool}
    return Table(name=name, file=shown, **facts, rows_read=rows_read,
                 excluded=tuple(excluded), columns=table_columns, lines=line_of[keep],
                 values_read=ValuesRead({**values_read, **{c: tuple(sorted({group_value(v) for v in values}))
                                                           for c, values in derived.items()}}, integers),
                 derived=derived_facts(spec),
                 dropped=_dropped(raw, keep, markers, spec, parsed))


def derived_facts(spec: Dataset) -> tuple[tuple[str, str, str], ...]:
    """(name, expression, type) of each derived column, as a `Table` records them."""
    types = dataset_columns(spec)
    return tuple((c, d.expression, types[c].type) for c, d in spec.derived().items())


def filtered_and_derived(name: str, spec: Dataset, shown: str, table_columns: dict[str, np.ndarray],
                         line_of: np.ndarray, keep: np.ndarray, excluded: list[Exclusion]) -> dict[str, np.ndarray]:
    """The declared columns of the kept rows with the derived columns and the rows_where filter
    applied, in the order the README states (the derived columns the filter uses, the filter, the
    other derived columns). ``keep`` (over every row read) is narrowed in place and the filter's
    exclusion appended to ``excluded``."""
    rows_read = int(line_of.size)
    early = needed_by(spec, parse_expression(spec.rows_where).columns) if spec.rows_where is not None else set()
    table_columns.update(_derive(name, spec, early, table_columns, line_of[keep], shown))
    if spec.rows_where is not None:
        try:
            kept = parse_expression(spec.rows_where).evaluate(table_columns)
        except ExpressionError as exc:
            lines = line_of[np.flatnonzero(keep)[list(exc.rows)]] if exc.rows else ()
            on = f" (line(s) {lines_text(lines)} of {shown})" if exc.rows else ""
            raise DataError(f"the rows_where filter cannot be applied: {exc.message}{on}",
                            where=f"datasets.{name}.rows_where", hint=exc.hint) from None
        dropped = np.zeros(rows_read, dtype=bool)
        dropped[np.flatnonzero(keep)[~kept]] = True
        if dropped.any():
            excluded.append(Exclusion(f"rows_where: {spec.rows_where}", int(dropped.sum()),
                                      tuple(first_lines(dropped, line_of))))
        keep &= ~dropped
        table_columns = {c: v[kept] for c, v in table_columns.items()}
    table_columns.update(_derive(name, spec, set(spec.derive) - early, table_columns, line_of[keep], shown))
    return table_columns


def _vouched(column: Parsed, keep: np.ndarray, name: str, declared: Column, shown: str) -> np.ndarray:
    """A columnar-read column typed as `_convert` types it, or _Unvouched where `_convert` must judge."""
    whole = column.integers
    numbers = whole.astype(float) if whole is not None else column.numbers
    if numbers is not None:
        low = declared.min if declared.min is not None else -np.inf
        high = declared.max if declared.max is not None else np.inf
        if not (np.isfinite(numbers) & (numbers >= low) & (numbers <= high) | ~keep).all():
            raise _Unvouched(name)
        # pandas reads '-0' as +0.0 in a column of whole numbers and as -0.0 beside a decimal: the
        # line-by-line reader decides, so that the sign of a zero is as it always was
        if declared.type == "number" and (np.signbit(numbers) & (numbers == 0) & keep).any():
            raise _Unvouched(name)
        return numbers if whole is None else whole
    assert column.uniques is not None and column.codes is not None
    used = np.zeros(column.uniques.size, dtype=bool)
    used[column.codes[keep]] = True
    if declared.type == "date":
        dates = _plain_dates(column.uniques, used)
        if dates is None:
            raise _Unvouched(name)
        return dates[column.codes]
    try:  # elementwise, so converting each distinct text once gives the same array
        typed = _convert(column.uniques, used, name, declared, shown, np.zeros(used.size, dtype=np.int64))
    except DataError:
        raise _Unvouched(name) from None
    return typed[column.codes]


def _plain_dates(texts: np.ndarray, used: np.ndarray) -> np.ndarray | None:
    """The dates of the used texts, without pandas, when each is a calendar date of ASCII digits
    whose year pandas reads whatever its time resolution (1678 to 2261); None otherwise (then
    `_convert` decides, through pandas, as it always has)."""
    dates = np.zeros(texts.size, dtype="datetime64[D]")
    for i in np.flatnonzero(used):
        text = texts[i]
        if _PLAIN_DATE.fullmatch(text) is None or not 1678 <= int(text[:4]) <= 2261:
            return None
        try:
            date(int(text[:4]), int(text[5:7]), int(text[8:]))
        except ValueError:
            return None
        dates[i] = np.datetime64(text, "D")
    return dates


def _texts_read(column: Parsed) -> np.ndarray:
    """The distinct texts of a columnar-read text-like column, over every row read."""
    assert column.uniques is not None and column.codes is not None
    return column.uniques[np.unique(column.codes[~column.missing])]


class ValuesRead(Mapping[str, tuple[str, ...]]):
    """`Table.values_read`, where a columnar-read integer column's distinct values (up to one per
    row, and only ever shown in a message) are named on first use rather than on every read."""

    def __init__(self, named: dict[str, tuple[str, ...]],
                 integers: dict[str, tuple[np.ndarray, np.ndarray]]) -> None:
        self._named = dict(named)
        self._integers = {c: v for c, v in integers.items() if c not in named}  # values, missing rows

    def __getitem__(self, key: str) -> tuple[str, ...]:
        if key not in self._named and key in self._integers:
            values, missing = self._integers.pop(key)
            self._named[key] = tuple(sorted(str(v) for v in np.unique(values[~missing]).tolist()))
        return self._named[key]

    def __iter__(self):
        return iter([*self._named, *self._integers])

    def __len__(self) -> int:
        return len(self._named) + len(self._integers)


def _dropped(raw: Mapping[str, np.ndarray], keep: np.ndarray, markers: set[str], spec: Dataset,
             parsed: Mapping[str, Parsed]) -> Dropped:
    """The rows not kept, each with why and with its grouping-type columns as labels."""
    rows = np.flatnonzero(~keep)
    missing = np.zeros(rows.size, dtype=bool)
    labels = {}
    for column, declared in spec.columns.items():
        if column in parsed and parsed[column].uniques is None:  # a columnar-read number or integer column
            absent = parsed[column].missing[rows]
            missing |= absent
            whole = parsed[column].integers
            if whole is not None and declared.type in GROUPING_TYPES:  # exact integers: named as _label names them
                labels[column] = np.array([None if gone else str(v) for v, gone in zip(whole[rows].tolist(), absent)],
                                          dtype=object)
            continue
        values = raw[column][rows] if column not in parsed else parsed[column].texts(rows)
        absent = np.isin(values, list(markers)) if markers else np.zeros(rows.size, dtype=bool)
        missing |= absent
        if declared.type in GROUPING_TYPES:
            labels[column] = np.array([None if gone else _label(text, declared.type)
                                       for text, gone in zip(values.tolist(), absent)], dtype=object)
    return Dropped(missing, labels)


def _label(text: str, kind: str) -> str:
    """A value read as text, named as groups.compare names it (booleans as true/false)."""
    if kind == "boolean" and text.lower() in TRUE_WORDS | FALSE_WORDS:
        return "true" if text.lower() in TRUE_WORDS else "false"
    if kind == "integer":
        exact = _exact_integer(text)
        return text if exact is None else str(exact)
    return text


def _derive(name: str, spec: Dataset, which: set[str], rows: dict[str, np.ndarray], lines: np.ndarray,
            shown: str) -> dict[str, np.ndarray]:
    """The derived columns named in `which`, in the order written, computed on `rows` (file lines
    `lines`). A value that is not a finite number (log of 0, a quotient by zero) is an error naming
    the file's lines, never a NaN passed on to an analysis."""
    out: dict[str, np.ndarray] = {}
    for column, expression in derivations(spec).items():
        if column not in which:
            continue
        try:
            values = expression.evaluate({**rows, **out})
        except ExpressionError as exc:
            bad = lines[list(exc.rows)] if exc.rows else np.array([], dtype=int)
            on = f" on line(s) {lines_text(bad)} of {shown}" if exc.rows else ""
            raise DataError(f"derived column '{column}' cannot be computed: {exc.message}{on}",
                            where=f"{shown}:{int(bad[0])}" if exc.rows else shown,
                            hint=f"exclude those rows with datasets.{name}.rows_where (a filter that does not use "
                                 f"'{column}' is applied before it is computed), or change "
                                 f"datasets.{name}.derive.{column}") from None
        if spec.derived()[column].type == "number" and values.dtype == bool:
            values = values.astype(np.float64)
        out[column] = values
    return out


def _distinct(values: np.ndarray, kind: str, markers: set[str]) -> tuple[str, ...]:
    """Distinct values of a column as groups.compare names them, over every row read."""
    return tuple(sorted({_label(text, kind) for text in set(values.tolist()) - markers}))


def group_value(value: object) -> str:
    """A column value as groups.compare and strata name it (booleans as true/false)."""
    return str(value).lower() if isinstance(value, (bool, np.bool_)) else str(value)


def group_values(values: np.ndarray) -> np.ndarray:
    """`group_value` of every element (an object array), without a Python call per row where the
    column's type allows: a million group labels are named in milliseconds, not a second."""
    if values.dtype == bool:
        return np.where(values, "true", "false").astype(object)
    if values.dtype.kind in "iu":  # each distinct whole number named once
        distinct, inverse = np.unique(values, return_inverse=True)
        return np.array([str(v) for v in distinct.tolist()], dtype=object)[inverse.reshape(-1)]
    if values.dtype == object and all(type(v) is str for v in values.tolist()):
        return values.copy()  # text and category columns: already their own names
    return np.array([group_value(v) for v in values], dtype=object)


def read_rows(data: bytes, fmt: str, shown: str) -> tuple[list[str], list[list[str]], np.ndarray]:
    """Header, rows and the file line where each row starts.

    Read with the csv module rather than pandas so that every row keeps its true line number
    (blank lines and quoted line breaks would otherwise shift them), and so that a row with too
    few fields is an error instead of being padded with empty values.
    """
    if not data.strip():
        raise DataError("the file is empty", where=shown, hint="a header line and data rows are expected")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        utf16 = data[:2] in (b"\xff\xfe", b"\xfe\xff")
        raise DataError(f"line {line}: the file is not UTF-8 text (byte 0x{data[exc.start]:02x} at offset "
                        f"{exc.start}{'; it looks like UTF-16' if utf16 else ''})", where=shown,
                        hint="save the file as UTF-8 ('CSV UTF-8' in most spreadsheet programs)") from None
    text = text.removeprefix("\ufeff")  # a byte-order mark written by some spreadsheet programs
    # One Unicode form (NFC) for every value and name, as for the plan: a composed and a decomposed
    # 'é' look the same and must compare equal (only the hash sees the bytes as written).
    text = unicodedata.normalize("NFC", text)
    delimiter = "\t" if fmt == "tsv" else ","
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter, strict=True)
    numbered: list[tuple[int, list[str]]] = []
    end = 0
    try:
        if '"' not in text:
            # No quotes, so no record spans lines: record i is line i + 1 and the whole file can be
            # read in one call (several times faster than asking the reader for each line number).
            numbered = [(i + 1, r) for i, r in enumerate(reader) if r]
        else:
            for record in reader:
                start, end = end + 1, reader.line_num
                if record:
                    numbered.append((start, record))
    except csv.Error as exc:
        line = reader.line_num if '"' not in text else end + 1
        raise _unreadable(exc, line, fmt, shown) from None
    if not numbered:
        raise DataError("the file is empty", where=shown, hint="a header line and data rows are expected")
    header_line, first = numbered[0]
    header = [h.strip() for h in first]
    rows = [r for _, r in numbered[1:]]
    width = len(header)
    for line, record in numbered[1:]:
        if len(record) != width:
            _refuse_decimal_commas(header, record, line, fmt, shown)
            raise DataError(f"line {line} has {len(record)} field(s) but the header (line {header_line}) has "
                            f"{width}", where=shown,
                            hint="check the delimiter and the quotes on that line: every row needs one "
                                 "value per column")
    return header, rows, np.array([line for line, _ in numbered[1:]], dtype=np.int64)


def _unreadable(exc: csv.Error, line: int, fmt: str, shown: str) -> DataError:
    """The csv module's complaint, with the cause it points to."""
    if "field larger than field limit" in str(exc):
        return DataError(f"line {line}: a field is longer than {csv.field_size_limit():,} characters", where=shown,
                         hint="a field this long is usually a whole file read as one value: check the "
                              "delimiter and the line breaks of that line (or an unclosed quote before it)")
    return DataError(f"line {line}: cannot be read as {fmt.upper()}: {exc}", where=shown,
                     hint="check the quotes on that line (a quote opened and never closed?)")


def _refuse_decimal_commas(header: list[str], record: list[str], line: int, fmt: str, shown: str) -> None:
    """A semicolon-separated file with decimal commas, read as CSV, splits at every decimal comma."""
    if fmt != "csv" or len(header) != 1 or ";" not in header[0]:
        return
    sample = ",".join(record)
    raise DataError(f"the file seems to separate fields with semicolons and to write decimals with commas "
                    f"(line {line}: '{sample[:60]}'), but the plan reads it as CSV (fields separated by commas)",
                    where=shown, hint="save the file as CSV with commas between fields and points in numbers "
                                      "(1.5, not 1,5)")


_OTHER_DELIMITERS = {";": "semicolons", "\t": "tabs", ",": "commas", "|": "bars"}


def _column_index(header: list[str], spec: Dataset, name: str, fmt: str, shown: str) -> dict[str, int]:
    """Where each declared column is in the header; refuses missing, repeated or (if asked) extra columns."""
    absent = [c for c in spec.columns if c not in header]
    if absent:
        used = "\t" if fmt == "tsv" else ","
        seen = [d for d in _OTHER_DELIMITERS if d != used and any(d in h for h in header)]
        if seen and len(header) < len(spec.columns):
            raise DataError(f"the header has {len(header)} column(s) and seems to be separated by "
                            f"{_OTHER_DELIMITERS[seen[0]]}, but the plan reads this file as {fmt.upper()} "
                            f"(separated by {_OTHER_DELIMITERS[used]})", where=f"{shown}:1",
                            hint="save the file with the plan's delimiter, or set "
                                 f"datasets.{name}.format (csv: commas, tsv: tabs)")
        raise DataError(f"declared column(s) missing from the header: {', '.join(absent)}",
                        where=f"{shown}:1", hint=f"the header has: {', '.join(header)}; "
                                                 f"check the spelling in datasets.{name}.columns")
    for c in spec.columns:
        places = [i + 1 for i, h in enumerate(header) if h == c]
        if len(places) > 1:
            raise DataError(f"column '{c}' appears {len(places)} times in the header (columns "
                            f"{', '.join(map(str, places))})", where=f"{shown}:1",
                            hint="rename or remove the repeated columns so that the plan names one of them")
    extra = [h or f"(unnamed column {i + 1})" for i, h in enumerate(header) if h not in spec.columns]
    if extra and spec.undeclared_columns == "refuse":
        raise DataError(f"column(s) not declared in the plan: {', '.join(extra)}", where=f"{shown}:1",
                        hint=f"declare them in datasets.{name}.columns, remove them from the file, or set "
                             f"datasets.{name}.undeclared_columns: ignore")
    return {c: header.index(c) for c in spec.columns}


def _convert(values: np.ndarray, keep: np.ndarray, name: str, spec: Column, shown: str,
             line_of: np.ndarray) -> np.ndarray:
    """Typed array for one column; rows not kept get a neutral filler and are never used."""
    kind = spec.type

    def refuse(bad: np.ndarray, what: str, hint: str) -> DataError:
        count = int(bad.sum())
        first = str(values[np.flatnonzero(bad)[0]])
        if not first.isprintable():  # a control character would garble the terminal
            first = first.encode("unicode_escape").decode("ascii")
        return DataError(f"column '{name}' ({kind}): {count} value(s) {what}, e.g. '{first}' on line(s) "
                         f"{lines_text(first_lines(bad, line_of), count)}", where=shown, hint=hint)

    if kind in ("number", "integer"):
        text = np.where(keep, values, "0")
        numbers = _plain_numbers(text)
        if numbers is None:
            import pandas as pd  # only for a column that is not all plain decimals (half a second to import)

            numbers = pd.to_numeric(pd.Series(text), errors="coerce").to_numpy(dtype=float)
        bad = ~np.isfinite(numbers) & keep
        if bad.any():
            raise refuse(bad, "are not finite numbers", "fix the values, declare the missing-value "
                         "markers (missing_values), or declare the column as text")
        whole = None
        if kind == "integer":
            whole = _whole_numbers(text, numbers, keep, refuse)
        for bound, outside in (("min", numbers < (spec.min if spec.min is not None else -np.inf)),
                               ("max", numbers > (spec.max if spec.max is not None else np.inf))):
            if (outside & keep).any():
                raise refuse(outside & keep, f"are outside the declared {bound} "
                             f"{getattr(spec, bound):g}", "check the file, or the declared range")
        return whole if whole is not None else numbers
    if kind == "boolean":
        lowered = np.array([str(v).lower() for v in values], dtype=object)
        truth = np.isin(lowered, list(TRUE_WORDS))
        bad = ~(truth | np.isin(lowered, list(FALSE_WORDS))) & keep
        if bad.any():
            raise refuse(bad, "are not true/false", "use true/false, yes/no or 1/0")
        return truth
    if kind == "date":
        # 1970-01-01 for the rows not kept, as below
        plain = _plain_dates(values, keep) if values.size <= PLAIN_VALUES_UP_TO else None
        if plain is not None:
            return plain
        import pandas as pd

        text = np.where(keep, values, "1970-01-01")
        dates = pd.to_datetime(pd.Series(text), format="%Y-%m-%d", errors="coerce")
        # the same strict form as a date in a rows_where filter: four, two and two digits
        padded = np.array([_ISO_DATE.fullmatch(str(v)) is not None for v in text], dtype=bool)
        bad = (dates.isna().to_numpy() | ~padded) & keep
        if bad.any():
            raise refuse(bad, "are not dates of the form YYYY-MM-DD", "write dates with four, two and two "
                         "digits, e.g. 2026-01-05")
        return dates.to_numpy().astype("datetime64[D]")
    # category and text
    if spec.levels is not None:
        bad = ~np.isin(values, spec.levels) & keep
        if bad.any():
            raise refuse(bad, "are not among the declared levels " + ", ".join(spec.levels),
                         "add the level to the plan, or fix the file")
    return values


def _plain_numbers(text: np.ndarray) -> np.ndarray | None:
    """The column as doubles without pandas, when every text is a plain ASCII decimal of at most 40
    characters that pandas' `to_numeric` reads as Python's correctly rounded `float` does (see
    `_PLAIN_NUMBER`); None otherwise (then pandas decides, as it always has), and for a column of
    more than `PLAIN_VALUES_UP_TO` values, where pandas' parser repays its import. pandas reads a column
    of integers alone (none with a point or an exponent, each within 64 bits) as integers first, so
    '-0' there is +0.0: that path is kept."""
    if text.size > PLAIN_VALUES_UP_TO:
        return None
    values = text.tolist()
    if any(len(v) > 40 or _PLAIN_NUMBER.fullmatch(v) is None for v in values):
        return None
    if any(("." in v or "e" in v or "E" in v) for v in values):
        return np.array([float(v) for v in values], dtype=np.float64)
    if any(len(v.lstrip("-")) > 18 for v in values):
        return None  # beyond int64, pandas' own conversions decide
    return np.array([int(v) for v in values], dtype=np.int64).astype(np.float64)


def _exact_integer(text: str) -> int | None:
    """The whole number a text writes ('12', '-3', '1.0', '1e3'), exactly; None if it writes none."""
    try:
        number = Decimal(text)
    except InvalidOperation:
        return None
    if not number.is_finite() or number != number.to_integral_value():
        return None
    return int(number)


def _whole_numbers(text: np.ndarray, numbers: np.ndarray, keep: np.ndarray, refuse) -> np.ndarray:
    """An integer column as exact 64-bit integers.

    The values parse as doubles first (fast); a double is exact up to 2**53, so only the values
    beyond it are parsed again exactly from their text. A value beyond the 64-bit range is refused,
    never wrapped or rounded.
    """
    bad = (numbers != np.round(numbers)) & keep
    if bad.any():
        raise refuse(bad, "are not whole numbers", "declare the column as number")
    large = (np.abs(numbers) >= FLOAT_EXACT) & keep
    exact = {int(i): _exact_integer(str(text[i])) for i in np.flatnonzero(large)}
    bad = np.zeros(numbers.size, dtype=bool)
    for i, value in exact.items():
        bad[i] = value is None or not -INT64_MAX - 1 <= value <= INT64_MAX
    if bad.any():
        raise refuse(bad, f"are outside the range of a 64-bit integer (±{INT64_MAX:,}) or not whole",
                     "declare the column as text if it holds identifiers, or as number if it holds "
                     "measurements (stored as doubles, about 16 significant digits)")
    whole = np.where(large, 0.0, numbers).astype(np.int64)
    for i, value in exact.items():
        whole[i] = int(value or 0)  # every value is a checked 64-bit integer by now
    return whole
