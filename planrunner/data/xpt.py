"""The SAS transport format, version 5 (XPT), read from its published layout (SAS technical
support document TS-140, "The record layout of a data set in SAS transport (XPORT) format").

Our own reader rather than pandas': pandas reads an IBM zero as 5.4e-79 (the smallest IBM
number), a silent wrong number, and reads a file cut at an 80-byte boundary as fewer rows
without a word. Here numbers are converted exactly (every IEEE double is an IBM double: 56
mantissa bits hold its 53), missing values (`.`, `._`, `.A`-`.Z`) are None, and a file whose length
is not whole 80-byte records, or whose last record is not padded with blanks, is refused as
truncated.

Layout: 80-byte records. Library header, two records of library facts, the member header and
descriptor (dataset name and label), the NAMESTR header giving the number of variables, one
140-byte NAMESTR per variable (padded to a record), the OBS header, then the observations
packed back to back, the last record padded with blanks.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import numpy as np

from planrunner.errors import DataError

RECORD = 80
_LIBRARY = b"HEADER RECORD*******LIBRARY HEADER RECORD!!!!!!!000000000000000000000000000000  "
_LIBRARY_V8 = b"HEADER RECORD*******LIBV8   HEADER RECORD!!!!!!!"
_MEMBER = b"HEADER RECORD*******MEMBER  HEADER RECORD!!!!!!!"
_DESCRIPTOR = b"HEADER RECORD*******DSCRPTR HEADER RECORD!!!!!!!"
_NAMESTR = b"HEADER RECORD*******NAMESTR HEADER RECORD!!!!!!!"
_OBS = b"HEADER RECORD*******OBS     HEADER RECORD!!!!!!!"
# ntype nhfun nlng nvar0 nname nlabel nform nfl nfd nfj nfill niform nifl nifd npos rest
_NAMESTR_LAYOUT = struct.Struct(">hhhh8s40s8shhh2s8shhl52s")
# display formats whose numbers count days, or seconds, from 1960-01-01
DAY_FORMATS = ("DATE", "YYMMDD", "MMDDYY", "DDMMYY", "E8601DA", "IS8601DA", "B8601DA", "WEEKDATE", "WORDDATE",
               "MONYY", "YYMON", "JULIAN", "NLDATE", "EURDFDD", "MINGUO", "YYQ")
SECOND_FORMATS = ("DATETIME", "E8601DT", "IS8601DT", "B8601DT", "DATEAMPM", "NLDATM")
MISSING_FIRST_BYTES = frozenset(b"._ABCDEFGHIJKLMNOPQRSTUVWXYZ")


@dataclass(frozen=True)
class Variable:
    name: str
    label: str | None
    display_format: str | None  # e.g. DATE9. or 8.2
    numeric: bool
    length: int
    position: int


@dataclass(frozen=True)
class Transport:
    dataset: str
    label: str | None
    variables: tuple[Variable, ...]
    columns: dict[str, list[object]]  # None for a missing value; floats or str


def _text(raw: bytes) -> str:
    return raw.decode("ascii", "replace").rstrip(" \x00")


def _broken(shown: str, what: str, hint: str = "export the dataset again as a version 5 transport file") -> DataError:
    return DataError(f"the file cannot be read as XPT (SAS transport, version 5): {what}", where=shown, hint=hint)


def ibm_to_double(raw: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """IBM hexadecimal doubles (rows of 8 big-endian bytes) as IEEE doubles, and which are missing.

    An IBM double is a sign bit, a 7-bit exponent of 16 biased by 64, and a 56-bit fraction:
    value = ±fraction · 16^(exponent − 64) / 2^56. The fraction converts to a double with one correct
    rounding (exact when it has at most 53 significant bits, as every value written from a double
    has), and the scaling by a power of two is exact: IBM's range lies inside the doubles' normal range.
    """
    words = raw.view(">u8").reshape(-1).astype(np.uint64)
    first = raw[:, 0]
    rest_zero = ~raw[:, 1:].any(axis=1)
    missing = np.isin(first, list(MISSING_FIRST_BYTES)) & rest_zero
    fraction = words & np.uint64((1 << 56) - 1)
    exponent = ((words >> np.uint64(56)) & np.uint64(0x7F)).astype(np.int64)
    sign = np.where((words >> np.uint64(63)) == 1, -1.0, 1.0)
    values = sign * np.ldexp(fraction.astype(np.float64), 4 * (exponent - 64) - 56)
    values[fraction == 0] = 0.0  # whatever the exponent: a zero fraction is zero (never 16^-65)
    values[missing] = np.nan
    return values, missing


def read_xpt(data: bytes, shown: str) -> Transport:
    """The first (and only) member of a version 5 transport file."""
    if data.startswith(_LIBRARY_V8):
        raise _broken(shown, "it is a version 8 transport file", "save it as a version 5 transport file (XPT v5), "
                      "the version regulators accept")
    if not data.startswith(_LIBRARY):
        raise _broken(shown, "its first 80 bytes are not the library header record",
                      "check that the file is an .xpt export and was copied in binary mode")
    if len(data) % RECORD:
        complete = len(data) // RECORD
        raise _broken(shown, f"it is {len(data):,} bytes, not a whole number of 80-byte records: it is truncated "
                      f"or damaged after byte {complete * RECORD:,}", "copy the file again in binary mode")
    records = len(data) // RECORD

    def record(i: int) -> bytes:
        if i >= records:
            raise _broken(shown, f"it ends after {records} record(s), inside the header", "copy the file again")
        return data[i * RECORD:(i + 1) * RECORD]

    if not record(3).startswith(_MEMBER) or not record(4).startswith(_DESCRIPTOR):
        raise _broken(shown, "the member header records are missing (records 4 and 5)")
    namestr_size = int(record(3)[74:78].decode("ascii", "replace").strip() or "140")
    if namestr_size not in (136, 140):
        raise _broken(shown, f"a variable description (NAMESTR) of {namestr_size} bytes")
    dataset = _text(record(5)[8:16])
    label = _text(record(6)[32:72]) or None
    header = record(7)
    if not header.startswith(_NAMESTR):
        raise _broken(shown, "the NAMESTR header (record 8) is missing")
    try:
        count = int(header[54:58].decode("ascii"))
    except ValueError:
        raise _broken(shown, "the NAMESTR header does not give the number of variables") from None
    start = 8 * RECORD
    span = -(-count * namestr_size // RECORD) * RECORD  # padded to whole records
    if start + span + RECORD > len(data):
        raise _broken(shown, f"it ends inside the descriptions of its {count} variables")
    variables = []
    for i in range(count):
        chunk = data[start + i * namestr_size:start + (i + 1) * namestr_size].ljust(140, b" ")
        fields = _NAMESTR_LAYOUT.unpack(chunk)
        ntype, length, name, var_label, form, form_length, form_decimals, position = (
            fields[0], fields[2], _text(fields[4]), _text(fields[5]), _text(fields[6]), fields[7], fields[8],
            fields[14])
        if ntype not in (1, 2) or length < 1 or (ntype == 1 and not 2 <= length <= 8):
            raise _broken(shown, f"variable {i + 1} ('{name}') has type {ntype} and length {length}")
        shape = f"{form}{form_length or ''}.{form_decimals or ''}" if form else (
            f"{form_length}.{form_decimals or ''}" if form_length else None)
        variables.append(Variable(name, var_label or None, shape, ntype == 1, length, position))
    obs = start + span
    if not data[obs:obs + RECORD].startswith(_OBS):
        raise _broken(shown, f"the OBS header is not at byte {obs:,} where the {count} variable descriptions end")
    body = data[obs + RECORD:]
    if _second_member(body):
        raise _broken(shown, "it holds more than one dataset", "export each dataset to its own .xpt file")
    width = sum(v.length for v in variables)
    if width == 0:
        raise _broken(shown, "its observations have no bytes")
    rows = len(body) // width
    # the last record is padded with blanks: observations lying wholly in that padding are not data
    while rows and len(body) - (rows - 1) * width < RECORD and not body[(rows - 1) * width:rows * width].strip(b" "):
        rows -= 1
    tail = body[rows * width:]
    if tail.strip(b" "):
        raise _broken(shown, f"it ends inside observation {rows + 1} (the last record is not padded with blanks): "
                      f"the file is truncated", "copy the file again in binary mode")
    table = np.frombuffer(body[:rows * width], dtype=np.uint8).reshape(rows, width)
    columns: dict[str, list[object]] = {}
    for v in variables:
        cells = table[:, v.position:v.position + v.length]
        if v.numeric:
            padded = np.zeros((rows, 8), dtype=np.uint8)
            padded[:, :v.length] = cells
            values, missing = ibm_to_double(np.ascontiguousarray(padded))
            columns[v.name] = [None if m else float(x) for x, m in zip(values.tolist(), missing.tolist())]
        else:
            columns[v.name] = [_character(bytes(row), shown, i + 1, v.name) for i, row in enumerate(cells)]
    return Transport(dataset, label, tuple(variables), columns)


def _second_member(body: bytes) -> bool:
    """Another member's header: at the start of a record after this member's observations."""
    at = body.find(_MEMBER)
    while at >= 0:
        if at % RECORD == 0:
            return True
        at = body.find(_MEMBER, at + 1)
    return False


def _character(raw: bytes, shown: str, row: int, name: str) -> str:
    try:
        return raw.rstrip(b" \x00").decode("utf-8")
    except UnicodeDecodeError:
        raise DataError(f"column '{name}': the value on row {row} is not ASCII or UTF-8 text", where=shown,
                        hint="export the dataset with ASCII (or UTF-8) character values") from None
