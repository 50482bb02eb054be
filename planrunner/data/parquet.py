"""planrunner's own Parquet writer: flat tables of text, doubles, 64-bit integers and booleans.

Written from the open Apache Parquet format specification (parquet-format: the file layout and
`parquet.thrift`) and the Apache Thrift compact protocol specification, and nothing else: a file is
`PAR1`, one row group holding one column chunk per column, each chunk one data page (version 1,
PLAIN encoding, UNCOMPRESSED), then the file's metadata in the Thrift compact protocol, its length
(4 bytes, little endian) and `PAR1` again. Every column is OPTIONAL (nullable, as an Arrow table's
fields are by default), so each page starts with its definition levels (1 = a value, 0 = null) in the
RLE/bit-packed hybrid encoding, then the PLAIN values of the rows that have one.

Why our own: the results dataset and the rehearsal's Parquet dummy files then need no pyarrow (31 MiB
and a second of import in a run), and their bytes depend on planrunner alone, never on which pyarrow
is installed (a rehearsal's `verify` writes the dummy files again and compares bytes). No time stamp
and no version number goes into a file: the same columns make the same bytes.
"""

from __future__ import annotations

import struct
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

MAGIC = b"PAR1"
CREATED_BY = "planrunner"  # no version: a new planrunner release must not change a rehearsal's bytes

Kind = Literal["string", "double", "int64", "bool"]

# parquet.thrift enums: Type, FieldRepetitionType, ConvertedType, Encoding, CompressionCodec, PageType
_PHYSICAL_TYPE: dict[str, int] = {"bool": 0, "int64": 2, "double": 5, "string": 6}
_OPTIONAL = 1
_CONVERTED_UTF8 = 0
_PLAIN, _RLE = 0, 3
_UNCOMPRESSED = 0
_DATA_PAGE = 0
_FORMAT_VERSION = 2  # FileMetaData.version: the 2.x format (logical type annotations)
_I32_MAX = 2**31 - 1  # page sizes and value counts are Thrift i32

# Thrift compact protocol type ids (field and element types share these for the kinds used here)
_I32, _I64, _BINARY, _LIST, _STRUCT = 5, 6, 8, 9, 12

Field = tuple[int, int, bytes]  # field id, compact type id, the encoded value


@dataclass(frozen=True)
class ParquetColumn:
    """One column: its name, its kind and its values in row order (None = null). A numpy array of
    doubles, 64-bit integers or booleans is taken as it is (no nulls; a NaN is a value, not a null)."""

    name: str
    kind: Kind
    values: Sequence[Any] | np.ndarray


# --- the Thrift compact protocol ------------------------------------------------------------------

def varint(n: int) -> bytes:
    """Unsigned LEB128: 7 bits a byte, least significant group first, high bit set on all but the last."""
    if n < 0:
        raise ValueError(f"a var int is unsigned, not {n}")
    out = bytearray()
    while n > 0x7F:
        out.append(n & 0x7F | 0x80)
        n >>= 7
    out.append(n)
    return bytes(out)


def zigzag(n: int) -> int:
    """A signed 64-bit integer folded onto the unsigned ones: 0, -1, 1, -2, 2 ... become 0, 1, 2, 3, 4 ..."""
    if not -(2**63) <= n < 2**63:
        raise ValueError(f"{n} is outside the 64-bit integers")
    return (n << 1) ^ (n >> 63)


def _struct(*fields: Field | None) -> bytes:
    """A Thrift struct: each field's header (id delta and type in one byte when the delta is 1 to 15,
    else the type then the id as a zigzag var int), its value, and a stop byte. None fields are left out."""
    out = bytearray()
    last = 0
    for field in fields:
        if field is None:
            continue
        field_id, kind, value = field
        if 0 < field_id - last <= 15:
            out.append((field_id - last) << 4 | kind)
        else:
            out.append(kind)
            out += varint(zigzag(field_id))
        out += value
        last = field_id
    out.append(0)
    return bytes(out)


def _i32(field_id: int, n: int) -> Field:
    return field_id, _I32, varint(zigzag(n))


def _i64(field_id: int, n: int) -> Field:
    return field_id, _I64, varint(zigzag(n))


def _binary(data: bytes) -> bytes:
    return varint(len(data)) + data


def _string(field_id: int, text: str) -> Field:
    return field_id, _BINARY, _binary(text.encode("utf-8"))


def _substruct(field_id: int, encoded: bytes) -> Field:
    return field_id, _STRUCT, encoded


def _list(field_id: int, element_type: int, elements: Sequence[bytes]) -> Field:
    """A list: size and element type in one byte below 15 elements, else 0xF plus the size as a var int."""
    size = len(elements)
    header = bytes([size << 4 | element_type]) if size < 15 else bytes([0xF0 | element_type]) + varint(size)
    return field_id, _LIST, header + b"".join(elements)


# --- pages ------------------------------------------------------------------------------------------

def _definition_levels(present: np.ndarray) -> bytes:
    """The definition levels of an OPTIONAL column (bit width 1) as RLE runs of the RLE/bit-packed hybrid:
    per run of equal levels, the var int (run length << 1) and the level in one byte; in a data page v1
    the encoded levels follow their byte length (4 bytes, little endian)."""
    out = bytearray()
    if present.size:
        starts = np.flatnonzero(present[1:] != present[:-1]) + 1
        bounds = [0, *starts.tolist(), int(present.size)]
        for start, end in zip(bounds[:-1], bounds[1:]):
            out += varint((end - start) << 1)
            out.append(int(present[start]))
    return struct.pack("<I", len(out)) + bytes(out)


def _present_and_values(column: ParquetColumn) -> tuple[np.ndarray, list[Any] | np.ndarray]:
    """Which rows have a value, and those values."""
    if isinstance(column.values, np.ndarray):
        return np.ones(column.values.shape[0], dtype=bool), column.values
    present = np.array([v is not None for v in column.values], dtype=bool)
    return present, [v for v in column.values if v is not None]


def _plain(kind: Kind, values: list[Any] | np.ndarray) -> bytes:
    """PLAIN encoding: booleans one bit each (least significant bit first), integers and doubles 8 bytes
    little endian (a double's bits as they are: NaN payloads, -0.0 and infinities survive), text as its
    UTF-8 bytes after their length (4 bytes, little endian)."""
    if kind == "bool":
        return np.packbits(np.asarray(values, dtype=bool), bitorder="little").tobytes()
    if kind == "int64":
        return np.asarray(values, dtype="<i8").tobytes()
    if kind == "double":
        return np.asarray(values, dtype="<f8").tobytes()
    encoded = [v.encode("utf-8") for v in values]
    return b"".join(struct.pack("<I", len(b)) + b for b in encoded)


def _data_page(column: ParquetColumn) -> tuple[bytes, int]:
    """A column's only page (page header and body) and its number of rows."""
    present, values = _present_and_values(column)
    body = _definition_levels(present) + _plain(column.kind, values)
    if len(body) > _I32_MAX or present.size > _I32_MAX:
        raise ValueError(f"column '{column.name}' is too large for one Parquet page ({len(body)} bytes)")
    data_page_header = _struct(_i32(1, int(present.size)), _i32(2, _PLAIN), _i32(3, _RLE), _i32(4, _RLE))
    header = _struct(_i32(1, _DATA_PAGE), _i32(2, len(body)), _i32(3, len(body)),
                     _substruct(5, data_page_header))
    return header + body, int(present.size)


# --- the file ---------------------------------------------------------------------------------------

def _schema_element(column: ParquetColumn) -> bytes:
    text = column.kind == "string"
    return _struct(_i32(1, _PHYSICAL_TYPE[column.kind]), _i32(3, _OPTIONAL), _string(4, column.name),
                   _i32(6, _CONVERTED_UTF8) if text else None,
                   # LogicalType is a union: field 1, STRING, an empty struct
                   _substruct(10, _struct(_substruct(1, _struct()))) if text else None)


def _column_chunk(column: ParquetColumn, offset: int, size: int, rows: int) -> bytes:
    meta = _struct(_i32(1, _PHYSICAL_TYPE[column.kind]), _list(2, _I32, [varint(zigzag(_PLAIN)), varint(zigzag(_RLE))]),
                   _list(3, _BINARY, [_binary(column.name.encode("utf-8"))]), _i32(4, _UNCOMPRESSED),
                   _i64(5, rows), _i64(6, size), _i64(7, size), _i64(9, offset))
    # file_offset (2) is deprecated; writers put 0 there
    return _struct(_i64(2, 0), _substruct(3, meta))


def parquet_bytes(columns: Sequence[ParquetColumn], metadata: Mapping[str, str] | None = None) -> bytes:
    """A Parquet file of the columns (all of one length), with `metadata` as the file's key-value pairs."""
    names = [c.name for c in columns]
    if len(set(names)) != len(names):
        raise ValueError(f"column names repeat: {names}")
    body = bytearray(MAGIC)
    chunks: list[bytes] = []
    lengths: set[int] = set()
    for column in columns:
        page, rows = _data_page(column)
        lengths.add(rows)
        chunks.append(_column_chunk(column, len(body), len(page), rows))
        body += page
    if len(lengths) > 1:
        raise ValueError(f"the columns differ in length: {sorted(lengths)}")
    rows = lengths.pop() if lengths else 0
    data_size = len(body) - len(MAGIC)
    row_group = _struct(_list(1, _STRUCT, chunks), _i64(2, data_size), _i64(3, rows), _i64(5, len(MAGIC)),
                        _i64(6, data_size))
    schema = [_struct(_string(4, "schema"), _i32(5, len(columns))), *(_schema_element(c) for c in columns)]
    pairs = [_struct(_string(1, key), _string(2, value)) for key, value in (metadata or {}).items()]
    footer = _struct(_i32(1, _FORMAT_VERSION), _list(2, _STRUCT, schema), _i64(3, rows), _list(4, _STRUCT, [row_group]),
                     _list(5, _STRUCT, pairs) if pairs else None, _string(6, CREATED_BY))
    return bytes(body) + footer + struct.pack("<I", len(footer)) + MAGIC
