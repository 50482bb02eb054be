"""One named sheet of an Office Open XML workbook (.xlsx), read with openpyxl.

Only values typed into cells are data: a formula is refused (its cached result depends on the
program that last saved the file, and openpyxl may hold none), and so are merged cells and
hidden rows or columns (what the reader of the sheet sees is then not what the analysis would
use). The first row is the header; observation 1 is the row under it.

`write_sheet` writes a workbook of one sheet (what `planrunner rehearse` writes for an .xlsx
dataset) whose bytes depend on nothing but the values: openpyxl stamps the workbook's created and
modified times with the clock and zipfile each entry's date, so the document properties are
replaced by fixed ones (`FIXED_TIME`, creator `CREATOR`) and the package is zipped again, in
openpyxl's order, with every entry dated `FIXED_TIME` and stored (no compression, so the bytes
do not depend on the zlib build either).
"""

from __future__ import annotations

import datetime as dt
import io
import math
import re
import warnings
import zipfile
from dataclasses import dataclass

from planrunner.errors import DataError

SHOW = 5
# the earliest moment a zip entry can carry (MS-DOS dates start in 1980): never the clock
FIXED_TIME = dt.datetime(1980, 1, 1)
CREATOR = "planrunner"
CORE_PART = "docProps/core.xml"  # the document properties (Office Open XML, part 2)
# Excel's limits: rows and columns of a sheet, characters of a cell, a sheet's name
MAX_ROWS, MAX_COLUMNS, MAX_CELL, MAX_TITLE = 1_048_576, 16_384, 32_767, 31
BAD_TITLE = re.compile(r"[\\*?:/\[\]]")


@dataclass(frozen=True)
class Sheet:
    names: list[str]
    columns: dict[str, list[object]]
    number_formats: dict[str, str | None]


def missing_package(package: str, what: str, shown: str) -> DataError:
    return DataError(f"reading {what} needs the optional package {package}, which is not installed", where=shown,
                     hint="pip install 'planrunner[formats]'")


def _cells(refs: list[str]) -> str:
    return ", ".join(refs[:SHOW]) + (f" and {len(refs) - SHOW} more" if len(refs) > SHOW else "")


def read_sheet(data: bytes, sheet: str | None, shown: str, key: str) -> Sheet:
    try:
        import openpyxl
        from openpyxl.utils import get_column_letter
    except ImportError:
        raise missing_package("openpyxl", "Excel workbooks (.xlsx)", shown) from None
    try:
        with warnings.catch_warnings():  # openpyxl warns about workbook features it does not read
            warnings.simplefilter("ignore")
            book = openpyxl.load_workbook(io.BytesIO(data), data_only=False, read_only=False)
    except Exception as exc:  # a damaged zip, not a workbook: openpyxl raises many kinds
        raise DataError(f"the file cannot be read as an .xlsx workbook: {exc}", where=shown,
                        hint="save it again as an Excel workbook (.xlsx)") from None
    names = book.sheetnames
    if sheet is None:
        raise DataError(f"a workbook needs the sheet to read; it has: {', '.join(names)}", where=shown,
                        hint=f"name one in {key}")
    if sheet not in names:
        raise DataError(f"the workbook has no sheet '{sheet}'; it has: {', '.join(names)}", where=shown,
                        hint=f"check the spelling (and case) in {key}")
    ws = book[sheet]
    where = f"{shown} [sheet {sheet}]"
    problems = []
    if ws.merged_cells.ranges:
        ranges = [str(r) for r in ws.merged_cells.ranges]
        problems.append(DataError(f"merged cells: {_cells(ranges)}", where=where,
                                  hint="unmerge them and write the value into each cell it stands for"))
    hidden_rows = [r for r, d in ws.row_dimensions.items() if d.hidden and r <= ws.max_row]
    if hidden_rows:
        problems.append(DataError(f"hidden rows: sheet row(s) {_cells([str(r) for r in sorted(hidden_rows)])}",
                                  where=where, hint="show or delete them: every row of the sheet is data"))
    hidden_columns = [c for c, d in ws.column_dimensions.items() if d.hidden]
    if hidden_columns:
        problems.append(DataError(f"hidden columns: {_cells(sorted(hidden_columns))}", where=where,
                                  hint="show or delete them: whoever reads the sheet must see every column"))
    formulas = [cell.coordinate for row in ws.iter_rows() for cell in row if cell.data_type == "f"]
    if formulas:
        problems.append(DataError(f"{len(formulas)} cell(s) hold a formula, not a value: {_cells(formulas)}",
                                  where=where, hint="replace the formulas by their values (paste as values)"))
    if problems:
        raise DataError.of_all(problems, where)
    rows = [list(r) for r in ws.iter_rows(values_only=True)]
    while rows and all(v is None or (isinstance(v, str) and not v.strip()) for v in rows[-1]):
        rows.pop()  # rows after the data that only ever held formatting
    if not rows:
        raise DataError("the sheet is empty", where=where, hint="a header row and data rows are expected")
    header = rows[0]
    while header and header[-1] is None:
        header = header[:-1]
    bad = [f"{get_column_letter(i + 1)}1" for i, h in enumerate(header) if not isinstance(h, str) or not h.strip()]
    if bad:
        raise DataError(f"header cell(s) {_cells(bad)} hold no column name", where=where,
                        hint="the first row names every column")
    names_ = [h.strip() for h in header]
    columns: dict[str, list[object]] = {n: [] for n in names_}
    formats: dict[str, str | None] = {n: None for n in names_}
    width = len(names_)
    for number, row in enumerate(rows[1:], start=1):
        extra = [f"{get_column_letter(i + 1)}{number + 1}" for i, v in enumerate(row[width:], start=width)
                 if v is not None]
        if extra:
            raise DataError(f"cell(s) {_cells(extra)} (row {number}) lie right of the last named column",
                            where=where, hint="name their column in the header row, or clear them")
        for name, value in zip(names_, list(row) + [None] * (width - len(row))):
            columns[name].append(value)
    for i, name in enumerate(names_):
        cell = ws.cell(row=2, column=i + 1) if len(rows) > 1 else None
        formats[name] = cell.number_format if cell is not None and cell.number_format != "General" else None
    return Sheet(names_, columns, formats)


def title_problems(sheet: str) -> list[tuple[str, str]]:
    """What keeps ``sheet`` from naming a sheet: (what, what to do)."""
    if len(sheet) > MAX_TITLE or BAD_TITLE.search(sheet) or sheet.startswith("'") or sheet.endswith("'"):
        return [(f"'{sheet}' cannot name a sheet (at most {MAX_TITLE} characters, none of \\ / ? * : [ ], "
                 "no quote at either end)", "name the sheet as its tab is labelled in the workbook")]
    return []


def cell_problems(values: list[object]) -> list[tuple[str, str]]:
    """What keeps a column's values out of a sheet (text too long, control characters)."""
    from openpyxl.cell.cell import ILLEGAL_CHARACTERS_RE

    texts = [v for v in values if isinstance(v, str)]
    problems = []
    if any(len(v) > MAX_CELL for v in texts):
        problems.append((f"a value longer than {MAX_CELL:,} characters, the most a cell holds",
                         "shorten the values"))
    if any(ILLEGAL_CHARACTERS_RE.search(v) for v in texts):
        problems.append(("a value holds a control character, which a workbook cannot hold",
                         "remove the control characters from the levels"))
    if any(isinstance(v, float) and not math.isfinite(v) for v in values):
        problems.append(("a number is NaN or infinite, which a cell cannot hold (an empty cell is a missing value)",
                         "write None for a missing value"))
    return problems


def write_sheet(sheet: str, names: list[str], columns: list[list[object]]) -> bytes:
    """An .xlsx workbook of one sheet: the names in row 1, then one row per value (None: an empty
    cell). Numbers, booleans, dates and text are typed cells; a text that starts with '=' stays text."""
    try:
        import openpyxl
        from openpyxl.packaging.core import DocumentProperties
        from openpyxl.xml.functions import tostring
    except ImportError:
        raise missing_package("openpyxl", "Excel workbooks (.xlsx)", sheet) from None
    rows = len(columns[0]) if columns else 0
    problems = title_problems(sheet) + [p for c in columns for p in cell_problems(c)]
    if rows + 1 > MAX_ROWS or len(names) > MAX_COLUMNS:
        problems.append((f"{rows:,} rows and {len(names)} columns; a sheet holds {MAX_ROWS - 1:,} rows under its "
                         f"header and {MAX_COLUMNS:,} columns", "write fewer rows"))
    if problems:
        raise DataError.of_all([DataError(what, where=sheet, hint=hint) for what, hint in problems], sheet)
    book = openpyxl.Workbook()
    ws = book.active
    ws.title = sheet
    for j, values in enumerate([names, *zip(*columns)] if columns else [names]):
        for i, value in enumerate(values):
            cell = ws.cell(row=j + 1, column=i + 1, value=value)
            if cell.data_type == "f":  # openpyxl takes text starting with '=' for a formula
                cell.data_type = "s"
    buffer = io.BytesIO()
    book.save(buffer)
    core = tostring(DocumentProperties(creator=CREATOR, created=FIXED_TIME, modified=FIXED_TIME).to_tree())
    return _fixed_zip(buffer.getvalue(), {CORE_PART: core})


def _fixed_zip(data: bytes, replaced: dict[str, bytes]) -> bytes:
    """The same zip entries in the same order, every one dated `FIXED_TIME` and stored, with no
    file attributes from the machine that wrote it; ``replaced`` entries get the bytes given."""
    out = io.BytesIO()
    with zipfile.ZipFile(io.BytesIO(data)) as source, zipfile.ZipFile(out, "w") as target:
        for info in source.infolist():
            entry = zipfile.ZipInfo(info.filename, date_time=FIXED_TIME.timetuple()[:6])
            entry.compress_type = zipfile.ZIP_STORED
            entry.create_system = 0  # else 3 on Unix and 0 on Windows: the same bytes everywhere
            entry.external_attr = 0
            target.writestr(entry, replaced.get(info.filename, source.read(info)))
    return out.getvalue()
