"""Reading data files into typed columns, exactly as the plan declares them.

Everything here names the file and the line of a problem: a reader of the message should be able
to open the file at that line. Line numbers count the header as line 1 (the first data row is line 2).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from .errors import DataError, ExpressionError
from .expr import parse_expression
from .schema import Column, Dataset

TRUE_WORDS = {"true", "yes", "1"}
FALSE_WORDS = {"false", "no", "0"}
SHOW_LINES = 5  # how many offending lines a message lists


@dataclass(frozen=True)
class Exclusion:
    reason: str
    rows: int
    lines: tuple[int, ...]  # file lines of the first few excluded rows


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

    @property
    def rows_used(self) -> int:
        return int(self.lines.size)


def resolve_data_path(plan_folder: Path, file: str, *, data_root: Path | None = None) -> Path:
    """The data file's real path, refused when it leaves the plan's folder (symlinks resolved)."""
    root = (data_root or plan_folder).resolve()
    path = (plan_folder / file).resolve()
    if not path.is_relative_to(root):
        raise DataError(f"data file '{file}' resolves to {path}, outside {root}",
                        where=file, hint="keep data inside the plan's folder")
    return path


def file_sha256(path: Path) -> tuple[str, int]:
    digest = hashlib.sha256()
    size = 0
    with path.open("rb") as handle:
        for chunk in iter(lambda: handle.read(1 << 20), b""):
            digest.update(chunk)
            size += len(chunk)
    return digest.hexdigest(), size


def _lines(mask: np.ndarray) -> list[int]:
    return [int(i) + 2 for i in np.flatnonzero(mask)[:SHOW_LINES]]


def _list(lines: list[int], total: int) -> str:
    text = ", ".join(str(n) for n in lines)
    return text + (f" and {total - len(lines)} more" if total > len(lines) else "")


def read_table(name: str, spec: Dataset, plan_folder: Path, *, data_root: Path | None = None) -> Table:
    """Read one dataset: hash it, check its columns and types, handle missing values, filter rows."""
    path = resolve_data_path(plan_folder, spec.file, data_root=data_root)
    shown = spec.file
    if not path.is_file():
        raise DataError("data file not found", where=shown,
                        hint=f"the plan expects it at {path}; check datasets.{name}.file")
    sha, size = file_sha256(path)
    if spec.sha256 is not None and spec.sha256 != sha:
        raise DataError(f"the file has changed: its sha256 is {sha}, the plan pins {spec.sha256}",
                        where=shown, hint="use the file the plan was written for, or update the pin "
                                          "(a deviation to document)")
    fmt = spec.format or ("tsv" if path.suffix.lower() in (".tsv", ".tab") else "csv")
    try:
        frame = pd.read_csv(path, sep="\t" if fmt == "tsv" else ",", dtype=str, keep_default_na=False,
                            na_filter=False, encoding="utf-8", skipinitialspace=False)
    except UnicodeDecodeError as exc:
        raise DataError(f"the file is not UTF-8 text (byte {exc.start})", where=shown,
                        hint="save the file as UTF-8") from None
    except pd.errors.EmptyDataError:
        raise DataError("the file is empty", where=shown, hint="a header line and data rows are expected") from None
    except pd.errors.ParserError as exc:
        raise DataError(f"the file cannot be read as {fmt.upper()}: {exc}".strip(), where=shown,
                        hint="check the delimiter and quoting on that line") from None
    frame.columns = [str(c).strip() for c in frame.columns]
    absent = [c for c in spec.columns if c not in frame.columns]
    if absent:
        raise DataError(f"declared column(s) missing from the header: {', '.join(absent)}",
                        where=f"{shown}:1", hint=f"the header has: {', '.join(frame.columns)}")
    raw = {c: frame[c].str.strip().to_numpy(dtype=object) for c in spec.columns}
    rows_read = len(frame)
    keep = np.ones(rows_read, dtype=bool)
    excluded: list[Exclusion] = []

    markers = set(spec.missing_values)
    for column in spec.columns:
        missing = np.isin(raw[column], list(markers)) & keep if markers else np.zeros(rows_read, bool)
        if missing.any():
            count = int(missing.sum())
            if spec.missing == "refuse":
                raise DataError(f"column '{column}' has {count} missing value(s) on line(s) "
                                f"{_list(_lines(missing), count)}", where=shown,
                                hint=f"fill them in, or set datasets.{name}.missing: drop to exclude those rows")
            excluded.append(Exclusion(f"missing value in '{column}'", count, tuple(_lines(missing))))
            keep &= ~missing

    columns = {c: _convert(raw[c], keep, c, spec.columns[c], shown) for c in spec.columns}
    if spec.keep is not None:
        try:
            kept = parse_expression(spec.keep).evaluate({c: v[keep] for c, v in columns.items()})
        except ExpressionError as exc:
            raise DataError(f"the keep filter cannot be applied: {exc.message}", where=f"datasets.{name}.keep",
                            hint=exc.hint) from None
        dropped = np.zeros(rows_read, dtype=bool)
        dropped[np.flatnonzero(keep)[~kept]] = True
        if dropped.any():
            excluded.append(Exclusion(f"keep: {spec.keep}", int(dropped.sum()), tuple(_lines(dropped))))
        keep &= ~dropped
    return Table(name=name, file=shown, path=path, sha256=sha, bytes=size, rows_read=rows_read,
                 excluded=tuple(excluded), columns={c: v[keep] for c, v in columns.items()},
                 lines=np.flatnonzero(keep) + 2)


def _convert(values: np.ndarray, keep: np.ndarray, name: str, spec: Column, shown: str) -> np.ndarray:
    """Typed array for one column; rows not kept get a neutral filler and are never used."""
    kind = spec.type

    def refuse(bad: np.ndarray, what: str, hint: str) -> DataError:
        count = int(bad.sum())
        first = values[np.flatnonzero(bad)[0]]
        return DataError(f"column '{name}' ({kind}): {count} value(s) {what}, e.g. '{first}' on line(s) "
                         f"{_list(_lines(bad), count)}", where=shown, hint=hint)

    if kind in ("number", "integer"):
        text = np.where(keep, values, "0")
        numbers = pd.to_numeric(pd.Series(text), errors="coerce").to_numpy(dtype=float)
        bad = ~np.isfinite(numbers) & keep
        if bad.any():
            raise refuse(bad, "are not finite numbers", "fix the values, declare the missing-value "
                         "markers (missing_values), or declare the column as text")
        if kind == "integer":
            bad = (numbers != np.round(numbers)) & keep
            if bad.any():
                raise refuse(bad, "are not whole numbers", "declare the column as number")
        for bound, outside in (("min", numbers < (spec.min if spec.min is not None else -np.inf)),
                               ("max", numbers > (spec.max if spec.max is not None else np.inf))):
            if (outside & keep).any():
                raise refuse(outside & keep, f"are outside the declared {bound} "
                             f"{getattr(spec, bound):g}", "check the file, or the declared range")
        return numbers.astype(np.int64) if kind == "integer" else numbers
    if kind == "boolean":
        lowered = np.array([str(v).lower() for v in values], dtype=object)
        truth = np.isin(lowered, list(TRUE_WORDS))
        bad = ~(truth | np.isin(lowered, list(FALSE_WORDS))) & keep
        if bad.any():
            raise refuse(bad, "are not true/false", "use true/false, yes/no or 1/0")
        return truth
    if kind == "date":
        text = np.where(keep, values, "1970-01-01")
        dates = pd.to_datetime(pd.Series(text), format="%Y-%m-%d", errors="coerce")
        bad = dates.isna().to_numpy() & keep
        if bad.any():
            raise refuse(bad, "are not dates of the form YYYY-MM-DD", "write dates as 2026-11-30")
        return dates.to_numpy().astype("datetime64[D]")
    # category and text
    if spec.levels is not None:
        bad = ~np.isin(values, spec.levels) & keep
        if bad.any():
            raise refuse(bad, "are not among the declared levels " + ", ".join(spec.levels),
                         "add the level to the plan, or fix the file")
    return values
