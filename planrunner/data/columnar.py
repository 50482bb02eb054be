"""The fast path for large plain CSV/TSV files: typed columns from pyarrow's vectorised parser.

It vouches only for what it can prove gives exactly what the line-by-line reader in `tables` gives;
whenever it cannot (a quote, a blank line, a lone carriage return, a space at the edge of a field, a
text that is not already in Unicode's NFC form, a value its parser refuses, ...) it answers None and
the line-by-line reader reads the file, so every message keeps its file, line and fix.

Why the numbers are the same: pyarrow parses decimals with a correctly rounded algorithm, as pandas'
`to_numeric` (which the line-by-line reader uses) does; both were compared on hundreds of thousands
of 17-digit, halfway and extreme-exponent strings, and on every short string of digits, signs,
points, exponents and letters (tests/test_columnar.py keeps a sample of them). The forms pyarrow
takes and pandas does not are a leading or trailing space and hexadecimal integers, both ruled out
here beforehand. Integer columns are read as exact 64-bit integers, as the line-by-line reader
reads them (a value beyond that range makes pyarrow fail, and the line-by-line reader refuses it).
"""

from __future__ import annotations

import csv
import unicodedata
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

# Below this size the line-by-line reader is as fast as importing pyarrow (about half a second).
COLUMNAR_FROM_BYTES = 2 << 20
# What str.strip() removes that ASCII holds (tab and line feed are delimiters or line ends here).
_ASCII_SPACES = b" \t\x0b\x0c\x1c\x1d\x1e\x1f"
# ... and beyond ASCII: a file holding any of them is left to the line-by-line reader.
_WIDE_SPACES = tuple(chr(c) for c in range(0x80, 0x3001) if chr(c).isspace())

Kind = Literal["number", "integer", "text"]
# byte classes of the plainness scan
_DELIMITER, _NEWLINE, _RETURN, _SPACE, _WIDE, _REFUSED = 1, 2, 3, 4, 5, 6


@dataclass(frozen=True)
class Parsed:
    """One declared column as the fast path read it (missing-value markers flagged, not parsed)."""

    missing: np.ndarray  # bool per row: the field is one of the missing-value markers
    numbers: np.ndarray | None = None  # float64 per row (number columns)
    integers: np.ndarray | None = None  # int64 per row (integer columns)
    uniques: np.ndarray | None = None  # distinct texts (object array; text-like columns)
    codes: np.ndarray | None = None  # index into uniques per row

    def texts(self, rows: np.ndarray) -> np.ndarray:
        """The texts of some rows (an object array)."""
        assert self.uniques is not None and self.codes is not None
        return self.uniques[self.codes[rows]]


def plain_body(data: bytes, delimiter: str) -> bytes | None:
    """The bytes to parse (without a byte-order mark) when the file is plain enough to vouch for.

    Plain: UTF-8 already in NFC form, no quotes (so no record spans lines and line i + 1 holds
    record i), no NUL, no blank line, every carriage return part of a CRLF, a header and at least
    one line after it, no line longer than the csv module's field limit, and no field that starts
    or ends with white space. One pass over the bytes in slices (memory stays bounded).
    """
    body = data.removeprefix(b"\xef\xbb\xbf")
    view = np.frombuffer(body, dtype=np.uint8)
    classes = np.zeros(256, dtype=np.uint8)
    classes[ord(delimiter)] = _DELIMITER
    classes[list(_ASCII_SPACES)] = _SPACE
    classes[[10, 13]] = _NEWLINE, _RETURN
    classes[[ord('"'), 0]] = _REFUSED
    classes[128:] = _WIDE
    classes[ord(delimiter)] = _DELIMITER  # a tab delimiter is not white space inside a field
    wide, lines, longest, last_end = False, 0, 0, -1
    size, step = view.size, 1 << 22
    for low in range(0, size, step):
        # bytes 35..127 are plain (bar '!', classed plain below); shifting by 35 with wrap-around puts
        # every other byte above 92, so one comparison finds the few that need a look
        shifted = np.subtract(view[low:low + step], 35, dtype=np.uint8)
        at = np.flatnonzero(shifted > 92) + low
        del shifted
        marks = classes[view[at]]
        at = at[marks >= _NEWLINE]
        marks = marks[marks >= _NEWLINE]
        if (marks == _REFUSED).any():
            return None
        wide = wide or bool((marks == _WIDE).any())
        spaces = at[marks == _SPACE]
        if spaces.size:  # a white space next to a delimiter, a line end or the file's ends edges a field
            if spaces[0] == 0 or spaces[-1] == size - 1:
                return None
            if (np.isin(view[spaces - 1], (ord(delimiter), 10))
                    | np.isin(view[spaces + 1], (ord(delimiter), 10, 13))).any():
                return None
        returns = at[marks == _RETURN]
        if returns.size and (returns[-1] == size - 1 or (view[returns + 1] != 10).any()):
            return None
        ends = at[marks == _NEWLINE]
        if ends.size:  # each line's length without its line end; none may be empty (a blank line)
            lengths = np.diff(ends, prepend=last_end) - 1 - (view[np.maximum(ends - 1, 0)] == 13)
            if (lengths <= 0).any():
                return None
            lines, longest, last_end = lines + ends.size, max(longest, int(lengths.max())), int(ends[-1])
    if size - 1 > last_end:  # a last line without a line end
        lines, longest = lines + 1, max(longest, size - 1 - last_end)
    if lines < 2 or longest > csv.field_size_limit():
        return None
    if wide:
        try:
            text = body.decode("utf-8")
        except UnicodeDecodeError:
            return None
        if not unicodedata.is_normalized("NFC", text) or any(c in text for c in _WIDE_SPACES):
            return None
    return body


def _copy_out(array: Any, values: np.ndarray, missing: np.ndarray) -> None:
    """A fixed-width pyarrow array's values and nulls into numpy arrays (a null's value is left 0)."""
    validity, data = array.buffers()[:2]
    offset, size = array.offset, len(array)
    values[:] = np.frombuffer(data, dtype=values.dtype, count=offset + size)[offset:]
    if validity is not None and array.null_count:
        valid = np.unpackbits(np.frombuffer(validity, dtype=np.uint8), count=offset + size, bitorder="little")
        missing[:] = valid[offset:] == 0
        values[missing] = 0


def _may_hold_hexadecimal(body: bytes) -> bool:
    """pyarrow reads '0x1F' as an integer, pandas (and so the line-by-line reader) refuses it."""
    start = body.index(b"\n")
    return body.find(b"x", start) >= 0 and b"0x" in body or body.find(b"X", start) >= 0 and b"0X" in body


def header_fields(body: bytes, delimiter: str) -> list[str]:
    """The header line's fields as the csv module splits a line without quotes."""
    first = body[:body.index(b"\n")].removesuffix(b"\r").decode("utf-8")
    return first.split(delimiter)


def read_columns(body: bytes, delimiter: str, width: int, wanted: dict[int, Kind],
                 markers: list[str]) -> dict[int, Parsed] | None:
    """The wanted columns (by position) of a plain body, or None when pyarrow finds any problem
    (a row of another width, a value that is not a number, ...): the caller then reads line by line."""
    try:
        import pyarrow as pa
        import pyarrow.csv as pcsv
    except ImportError:  # pyarrow is a dependency; an installation without it still reads, more slowly
        return None
    names = [f"c{i}" for i in range(width)]
    types = {names[i]: pa.float64() if kind == "number" else
             pa.int64() if kind == "integer" else pa.dictionary(pa.int32(), pa.string())
             for i, kind in wanted.items()}
    if "integer" in wanted.values() and _may_hold_hexadecimal(body):
        return None
    try:  # one thread: on two cores it is barely slower, and it holds fewer blocks in memory at once
        table = pcsv.read_csv(
            pa.py_buffer(body),
            read_options=pcsv.ReadOptions(skip_rows=1, column_names=names, use_threads=False),
            parse_options=pcsv.ParseOptions(delimiter=delimiter, quote_char=False, double_quote=False,
                                            escape_char=False, newlines_in_values=False,
                                            ignore_empty_lines=False),
            convert_options=pcsv.ConvertOptions(column_types=types, include_columns=[names[i] for i in wanted],
                                                null_values=markers, strings_can_be_null=True,
                                                quoted_strings_can_be_null=True, check_utf8=True))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None
    if table.num_rows == 0:
        return None
    out: dict[int, Parsed] = {}
    rows = table.num_rows
    for i, kind in wanted.items():
        column: Any = table.column(names[i])
        table = table.drop_columns([names[i]])  # each column's buffers go as soon as it is copied out
        if kind == "text":
            column = column.unify_dictionaries()
            if not column.num_chunks or len(column.chunks[0].dictionary) == 0:  # every value missing
                return None
        # the buffers are copied out directly: pyarrow's own conversions would import pandas
        missing = np.zeros(rows, dtype=bool)  # exactly the markers: no field has white space at its edges
        values = np.zeros(rows, dtype=np.int32 if kind == "text" else np.int64 if kind == "integer" else np.float64)
        start = 0
        for chunk in column.chunks:
            stop = start + len(chunk)
            _copy_out(chunk.indices if kind == "text" else chunk, values[start:stop], missing[start:stop])
            start = stop
        if kind == "integer":  # exact 64-bit integers: pyarrow refuses a value beyond them
            out[i] = Parsed(missing, integers=values)
        elif kind == "number":
            out[i] = Parsed(missing, numbers=values)
        else:
            dictionary = column.chunks[0].dictionary.to_pylist()
            uniques = np.array([value.strip() for value in dictionary], dtype=object)
            out[i] = Parsed(missing, uniques=uniques, codes=values)
        del column
    pa.default_memory_pool().release_unused()
    return out
