"""One named sheet of an Office Open XML workbook (.xlsx), read with openpyxl.

Only values typed into cells are data: a formula is refused (its cached result depends on the
program that last saved the file, and openpyxl may hold none), and so are merged cells and
hidden rows or columns (what the reader of the sheet sees is then not what the analysis would
use). The first row is the header; observation 1 is the row under it.
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass

from planrunner.errors import DataError

SHOW = 5


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
