"""Column types read off a data file, for `planrunner init` (a plan skeleton).

Only the *kind* of each column is inferred, never anything about its values' sizes: no means, no
ranges, no counts per level. The statistician who writes the plan stays blind to the outcomes; the
levels of a category column are listed because the plan must declare them (and they name groups,
not results).

A column is boolean when every value is true/false or yes/no; integer when every value is a whole
number; number when every value is a finite number; date when every value is a YYYY-MM-DD date;
category when it has at most MAX_LEVELS distinct values and repeats some; else text. Missing values
(empty, NA, nulls of typed files) are skipped.
"""

from __future__ import annotations

import datetime as dt
import math
import re
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation

from planrunner.data import formats
from planrunner.data.tables import read_rows

MAX_LEVELS = 20
MISSING = {"", "NA"}
_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")
_BOOLEAN = {"true", "false", "yes", "no"}


@dataclass(frozen=True)
class Inferred:
    name: str
    type: str  # number, integer, boolean, date, category, text
    levels: tuple[str, ...] | None  # category only
    label: str | None  # the file's own label (XPT, Dataset-JSON), if any
    missing: bool  # some values are missing


def infer_columns(data: bytes, fmt: str, shown: str, sheet: str | None) -> list[Inferred]:
    """Each column of the file with the type its values allow."""
    if fmt in formats.TEXT_FORMATS:
        header, rows, _ = read_rows(data, fmt, shown)
        columns: dict[str, list[object]] = {h: [r[i].strip() for r in rows] for i, h in enumerate(header)}
        labels: dict[str, str | None] = {}
        names = header
    else:
        names, read, entries = formats.read_columns(data, fmt, shown, sheet=sheet, key="--sheet")
        columns = {n: list(read[n]) for n in names}
        labels = {e.name: e.label for e in entries}
    return [_infer(n, columns[n], labels.get(n)) for n in names]


def _is_missing(value: object) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value)) or (
        isinstance(value, str) and value.strip() in MISSING)


def _infer(name: str, values: list[object], label: str | None) -> Inferred:
    present = [v for v in values if not _is_missing(v)]
    missing = len(present) < len(values)
    if not present:
        return Inferred(name, "text", None, label, missing)
    texts = [formats.value_text(v) for v in present]
    if all(isinstance(v, bool) for v in present) or all(t.lower() in _BOOLEAN for t in texts):
        return Inferred(name, "boolean", None, label, missing)
    if all(isinstance(v, (dt.date, dt.datetime)) and _whole_day(v) for v in present) or all(
            isinstance(v, str) and _DATE.fullmatch(t) and _valid_date(t) for v, t in zip(present, texts)):
        return Inferred(name, "date", None, label, missing)
    numbers = [_number(v, t) for v, t in zip(present, texts)]
    if all(n is not None for n in numbers):
        whole = all(n == n.to_integral_value() for n in numbers if n is not None)
        return Inferred(name, "integer" if whole else "number", None, label, missing)
    distinct = sorted(set(texts))
    if len(distinct) <= MAX_LEVELS and len(distinct) < len(texts):
        return Inferred(name, "category", tuple(distinct), label, missing)
    return Inferred(name, "text", None, label, missing)


def _whole_day(value: object) -> bool:
    return not isinstance(value, dt.datetime) or value.time() == dt.time(0)


def _valid_date(text: str) -> bool:
    try:
        dt.date.fromisoformat(text)
    except ValueError:
        return False
    return True


def _number(value: object, text: str) -> Decimal | None:
    if isinstance(value, bool):
        return None
    try:
        number = Decimal(text)
    except InvalidOperation:
        return None
    return number if number.is_finite() else None
