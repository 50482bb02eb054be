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

`write_xpt` writes the same layout (what `planrunner rehearse` writes for an XPT dataset): every
number as an IBM double (`double_to_ibm`, exact for every double in IBM's range), a missing number
as `.` followed by seven zero bytes, character values in UTF-8 padded with blanks to the longest
value (at most 200 bytes), names of at most 8 characters, labels of at most 40. The date and time
fields of the headers hold `FIXED_STAMP`, never the clock: the same columns give the same bytes.
"""

from __future__ import annotations

import re
import struct
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from planrunner.errors import DataError

RECORD = 80
_LIBRARY = b"HEADER RECORD*******LIBRARY HEADER RECORD!!!!!!!000000000000000000000000000000  "
_LIBRARY_V8 = b"HEADER RECORD*******LIBV8   HEADER RECORD!!!!!!!"
_MEMBER = b"HEADER RECORD*******MEMBER  HEADER RECORD!!!!!!!"
_DESCRIPTOR = b"HEADER RECORD*******DSCRPTR HEADER RECORD!!!!!!!"
_NAMESTR = b"HEADER RECORD*******NAMESTR HEADER RECORD!!!!!!!"
_OBS = b"HEADER RECORD*******OBS     HEADER RECORD!!!!!!!"
_ZEROS = b"000000000000000000000000000000  "  # the rest of a header record without numbers
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


# ------------------------------------------------------------------ writing (the same layout)

# The created and modified fields of the headers (ddMMMyy:hh:mm:ss): the origin of SAS dates, never
# the clock, so that the same columns give the same bytes (a rehearsal's `verify` makes the file
# again and compares every byte; the record keeps when the rehearsal ran). Readers with two-digit
# years may show it as 1960 or 2060; it is a fixed mark, not a time.
FIXED_STAMP = b"01JAN60:00:00:00"
NAME_LENGTH, LABEL_LENGTH, CHARACTER_LENGTH, MAX_VARIABLES = 8, 40, 200, 9999
SAS_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]{0,7}")
# IBM's range: 16^-65 (fraction 1/16, exponent 0) up to just below 16^63; every double between has
# 53 significant bits, which IBM's 56 fraction bits hold exactly
IBM_SMALLEST, IBM_LIMIT = 16.0 ** -65, 16.0 ** 63
_MISSING = b"." + bytes(7)


@dataclass(frozen=True)
class XptColumn:
    """One variable to write: numbers (float64, NaN where missing) or text values (str, None where
    missing)."""

    name: str
    values: np.ndarray
    numeric: bool
    label: str = ""
    display_format: tuple[str, int, int] | None = None  # (name, width, decimals), e.g. ("DATE", 9, 0)

    @cached_property
    def encoded(self) -> list[bytes]:
        """Text values as UTF-8 (None, a missing value, as all blanks)."""
        return [b"" if v is None else str(v).encode("utf-8") for v in self.values]

    @cached_property
    def length(self) -> int:
        """Bytes per observation: 8 for a number, the longest value's for text (at least 1)."""
        return 8 if self.numeric else max([1, *(len(v) for v in self.encoded)])


def double_to_ibm(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """IEEE doubles as IBM hexadecimal doubles (rows of 8 big-endian bytes), and which could not be.

    |x| = m · 2^e with m in [1/2, 1) (frexp); with q = ceil(e / 4) and r = 4q − e in 0..3,
    |x| = (m · 2^−r) · 16^q, and m · 2^−r lies in [1/16, 1): the IBM fraction is m · 2^(56−r), the
    53-bit significand shifted left by 3 − r bits (exact), and the exponent is q + 64. NaN becomes
    the missing value `.`; zero (of either sign) all zero bytes; infinities and values outside
    [16^-65, 16^63) are flagged, never rounded to zero or to the largest IBM number."""
    x = np.asarray(values, dtype=np.float64).reshape(-1)
    magnitude = np.abs(x)
    inside = np.isfinite(x) & (magnitude >= IBM_SMALLEST) & (magnitude < IBM_LIMIT)
    refused = ~inside & ~np.isnan(x) & (magnitude != 0.0)
    m, e = np.frexp(np.where(inside, magnitude, 1.0))
    q = -((-e) // 4)
    shift = (3 - (4 * q - e)).astype(np.uint64)
    fraction = np.ldexp(m, 53).astype(np.uint64) << shift
    exponent = (q + 64).astype(np.uint64) << np.uint64(56)
    sign = np.signbit(x).astype(np.uint64) << np.uint64(63)
    words = np.where(inside, sign | exponent | fraction, np.uint64(0))
    rows = words.astype(">u8").view(np.uint8).reshape(-1, 8).copy()
    rows[np.isnan(x)] = np.frombuffer(_MISSING, dtype=np.uint8)
    return rows, refused


def column_problems(column: XptColumn) -> list[tuple[str, str, str]]:
    """What keeps a column out of a version 5 file: (the part at fault: name, label or values; what;
    what to do), none when it can be written."""
    problems = []
    if not SAS_NAME.fullmatch(column.name):
        problems.append(("name", f"'{column.name}' is not a version 5 variable name (at most {NAME_LENGTH} letters, "
                                 "digits or underscores, not starting with a digit)",
                         f"rename the column, e.g. to '{suggested_name(column.name)}', here and in the file"))
    if len(column.label) > LABEL_LENGTH or not column.label.isascii():
        problems.append(("label", f"its label is not ASCII text of at most {LABEL_LENGTH} characters",
                         f"shorten the label to {LABEL_LENGTH} characters"))
    if column.numeric:
        _, refused = double_to_ibm(column.values)
        if refused.any():
            first = float(np.asarray(column.values, dtype=np.float64)[refused][0])
            problems.append(("values", f"{int(refused.sum())} value(s) lie outside the range of IBM doubles, e.g. "
                                       f"{first!r} (non-zero magnitudes from 16^-65 ≈ 5.4e-79 to below 16^63 ≈ 7.2e75)",
                             "declare min and max inside that range"))
    elif column.length > CHARACTER_LENGTH:
        problems.append(("values", f"its longest value is {column.length} bytes; a version 5 character variable "
                                   f"holds at most {CHARACTER_LENGTH}",
                         f"shorten the values to {CHARACTER_LENGTH} bytes"))
    return problems


def suggested_name(name: str) -> str:
    """A version 5 name close to ``name``: its letters, digits and underscores, cut to 8."""
    kept = re.sub(r"[^A-Za-z0-9_]", "_", name)
    kept = kept if kept[:1] and not kept[0].isdigit() else f"_{kept}"
    return kept[:NAME_LENGTH]


def _header(prefix: bytes, *fields: bytes) -> bytes:
    record = prefix + b"".join(fields)
    assert len(record) == RECORD, record  # a layout slip is a bug here, never a file
    return record


def _namestr(number: int, column: XptColumn, position: int) -> bytes:
    form, width, decimals = column.display_format or ("", 0, 0)
    return _NAMESTR_LAYOUT.pack(1 if column.numeric else 2, 0, column.length, number,
                                column.name.encode("ascii").ljust(8), column.label.encode("ascii").ljust(40),
                                form.encode("ascii").ljust(8), width, decimals, 0, bytes(2), b" " * 8, 0, 0,
                                position, bytes(52))


def _padded(data: bytes) -> bytes:
    return data + b" " * (-len(data) % RECORD)


def write_xpt(member: str, label: str, columns: list[XptColumn]) -> bytes:
    """A version 5 transport file of one member (dataset) holding ``columns`` (of equal length).

    The member name follows the variable names' rule, the label theirs; a column with a problem
    (`column_problems`) is refused as a DataError naming it."""
    problems = [DataError(f"column '{c.name}': {what}", where=member, hint=hint)
                for c in columns for _, what, hint in column_problems(c)]
    if not SAS_NAME.fullmatch(member) or len(label) > LABEL_LENGTH or not label.isascii():
        problems.append(DataError(f"'{member}' / '{label}' is not a version 5 dataset name and label", where=member))
    if not 1 <= len(columns) <= MAX_VARIABLES:
        problems.append(DataError(f"{len(columns)} variables; a version 5 file holds 1 to {MAX_VARIABLES}",
                                  where=member))
    if problems:
        raise DataError.of_all(problems, member)
    blank = b" " * 8
    head = [_LIBRARY,
            _header(b"SAS     SAS     SASLIB  ", blank, blank, b" " * 24, FIXED_STAMP),
            _header(FIXED_STAMP, b" " * 64),
            _header(_MEMBER, b"000000000000000001600000000140  "),
            _header(_DESCRIPTOR, _ZEROS),
            _header(b"SAS     ", member.encode("ascii").ljust(8), b"SASDATA ", blank, blank, b" " * 24, FIXED_STAMP),
            _header(FIXED_STAMP, b" " * 16, label.encode("ascii").ljust(40), blank),
            _header(_NAMESTR, f"000000{len(columns):04d}00000000000000000000  ".encode("ascii"))]
    positions = np.cumsum([0] + [c.length for c in columns])
    descriptions = b"".join(_namestr(i + 1, c, int(positions[i])) for i, c in enumerate(columns))
    rows = len(columns[0].values)
    table = np.empty((rows, int(positions[-1])), dtype=np.uint8)
    for column, start, stop in zip(columns, positions[:-1], positions[1:]):
        if column.numeric:
            table[:, start:stop] = double_to_ibm(column.values)[0]
        else:
            cells = b"".join(v.ljust(column.length) for v in column.encoded)
            table[:, start:stop] = np.frombuffer(cells, dtype=np.uint8).reshape(rows, column.length)
    return (b"".join(head) + _padded(descriptions) + _header(_OBS, _ZEROS) + _padded(table.tobytes()))
