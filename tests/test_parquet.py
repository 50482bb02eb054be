"""planrunner's own Parquet writer (planrunner/data/parquet.py), checked against the two specifications
it follows and read back by outside readers: pyarrow.parquet and pandas.read_parquet.

Sources: the Apache Thrift compact protocol specification (thrift, doc/specs/thrift-compact-protocol.md:
"Integer encoding", "Struct encoding", "List and Set") and the Apache Parquet format specification
(parquet-format: README "File format", "Nested encoding", Encodings.md "Run Length Encoding /
Bit-Packing Hybrid", parquet.thrift for the metadata's fields and enum values).
"""

from __future__ import annotations

import hashlib
import io
import struct

import numpy as np
import pytest

from planrunner.data.parquet import (
    CREATED_BY,
    ParquetColumn,
    _definition_levels,
    _list,
    _struct,
    parquet_bytes,
    varint,
    zigzag,
)

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")
pd = pytest.importorskip("pandas")

QUIET_NAN = struct.unpack("<d", struct.pack("<Q", 0x7FF8_0000_0000_0000))[0]
PAYLOAD_NAN = struct.unpack("<d", struct.pack("<Q", 0x7FF4_0000_DEAD_BEEF))[0]  # a signalling NaN with a payload
NEGATIVE_NAN = struct.unpack("<d", struct.pack("<Q", 0xFFF8_0000_0000_0001))[0]
INT64_MIN, INT64_MAX = -(2**63), 2**63 - 1


def _bits(values) -> list[int]:
    return [struct.unpack("<Q", struct.pack("<d", v))[0] for v in values]


# --- the Thrift compact protocol ------------------------------------------------------------------

def test_var_int_matches_the_worked_example_of_the_thrift_compact_protocol_spec():
    # Thrift compact protocol spec, "Integer encoding": 50399 is encoded as 0xDF 0x89 0x03
    assert varint(50399) == b"\xdf\x89\x03"
    # Protocol Buffers encoding guide (the same unsigned LEB128): 1 is 0x01, 150 is 0x96 0x01  # from memory
    assert varint(1) == b"\x01" and varint(150) == b"\x96\x01"
    assert varint(0) == b"\x00" and varint(127) == b"\x7f" and varint(128) == b"\x80\x01"
    assert varint(2**64 - 1) == b"\xff" * 9 + b"\x01"  # 64 bits take 10 bytes (spec: "1 to 10 bytes (int64)")
    with pytest.raises(ValueError):
        varint(-1)


def test_zigzag_matches_the_thrift_compact_protocol_spec():
    # spec, "Integer encoding": 0, 1, 2, 3, 4 on the wire are 0, -1, 1, -2, 2
    assert [zigzag(n) for n in (0, -1, 1, -2, 2)] == [0, 1, 2, 3, 4]
    # the spec's formula (n << 1) ^ (n >> 63) at the ends of the 64-bit integers
    assert zigzag(INT64_MAX) == 2**64 - 2 and zigzag(INT64_MIN) == 2**64 - 1
    with pytest.raises(ValueError):
        zigzag(2**63)


def test_struct_and_list_headers_follow_the_thrift_compact_protocol_spec():
    # "Struct encoding": short form ddddtttt with delta 1 and I32 (5); value zigzag(5) = 10; stop byte 0
    assert _struct((1, 5, varint(zigzag(5)))) == b"\x15\x0a\x00"
    # a delta above 15 takes the long form: the type alone, then the field id as a zigzag var int
    assert _struct((1, 5, b"\x00"), (17, 8, b"\x00")) == b"\x15\x00" + b"\x08" + varint(zigzag(17)) + b"\x00\x00"
    # "List and Set": sssstttt below 15 elements, 1111tttt plus the size as a var int from 15 on
    assert _list(1, 5, [b"\x02"] * 3)[2] == b"\x35" + b"\x02" * 3
    assert _list(1, 5, [b"\x02"] * 15)[2] == b"\xf5\x0f" + b"\x02" * 15


def test_definition_levels_are_rle_runs_of_the_hybrid_encoding():
    # Encodings.md, RLE/bit-packing hybrid: rle-run = varint(run length << 1), then the value in
    # ceil(bit width / 8) = 1 byte; a data page v1 puts the encoded length (4 bytes, little endian) first
    assert _definition_levels(np.array([True, True, False])) == b"\x04\x00\x00\x00" + b"\x04\x01" + b"\x02\x00"
    assert _definition_levels(np.ones(1000, dtype=bool)) == b"\x03\x00\x00\x00" + varint(2000) + b"\x01"
    assert _definition_levels(np.zeros(0, dtype=bool)) == b"\x00\x00\x00\x00"


# --- outside readers --------------------------------------------------------------------------------

EDGE = [
    ParquetColumn("text", "string", ["plain", None, "", "Grüße, 東京 ✓", "x" * 70_000, "tab\tand\nnewline"]),
    ParquetColumn("double", "double", [PAYLOAD_NAN, float("inf"), -float("inf"), -0.0, None, NEGATIVE_NAN]),
    ParquetColumn("whole", "int64", [INT64_MIN, INT64_MAX, None, 0, -1, 1]),
    ParquetColumn("flag", "bool", [True, None, False, True, False, True]),
    ParquetColumn("no_text", "string", [None] * 6),
    ParquetColumn("no_double", "double", [None] * 6),
    ParquetColumn("no_whole", "int64", [None] * 6),
    ParquetColumn("no_flag", "bool", [None] * 6),
]
ARROW = {"string": "string", "double": "double", "int64": "int64", "bool": "bool"}


def _read(data: bytes):
    return pq.read_table(io.BytesIO(data))


def test_pyarrow_reads_every_value_back_bit_for_bit():
    table = _read(parquet_bytes(EDGE))
    assert [(f.name, str(f.type), f.nullable) for f in table.schema] == [(c.name, ARROW[c.kind], True) for c in EDGE]
    for column in EDGE:
        read = table.column(column.name).to_pylist()
        if column.kind == "double":
            assert [v is None for v in read] == [v is None for v in column.values]
            assert _bits(v for v in read if v is not None) == _bits(v for v in column.values if v is not None)
        else:
            assert read == list(column.values), column.name


def test_pandas_reads_the_same_values():
    frame = pd.read_parquet(io.BytesIO(parquet_bytes(EDGE)))
    assert list(frame.columns) == [c.name for c in EDGE]
    assert [None if pd.isna(v) else v for v in frame["text"]] == EDGE[0].values
    doubles = frame["double"].to_numpy(dtype=np.float64)
    assert _bits(doubles[[0, 1, 2, 3, 5]]) == _bits(EDGE[1].values[i] for i in (0, 1, 2, 3, 5))
    assert np.isnan(doubles[4])  # pandas shows a null double as NaN
    # an int64 column without nulls stays int64, exactly
    whole = pd.read_parquet(io.BytesIO(parquet_bytes([ParquetColumn("w", "int64", [INT64_MIN, INT64_MAX, 7])])))
    assert whole["w"].dtype == np.int64 and whole["w"].tolist() == [INT64_MIN, INT64_MAX, 7]
    assert frame["no_double"].isna().all() and frame["no_text"].isna().all()


@pytest.mark.parametrize("rows", [0, 1])
def test_zero_rows_and_one_row(rows):
    columns = [ParquetColumn(c.name, c.kind, list(c.values)[:rows]) for c in EDGE]
    table = _read(parquet_bytes(columns))
    assert table.num_rows == rows and table.column_names == [c.name for c in EDGE]
    assert table.column("whole").to_pylist() == [INT64_MIN][:rows]
    assert len(pd.read_parquet(io.BytesIO(parquet_bytes(columns)))) == rows


def test_numpy_arrays_are_taken_as_they_are():
    rng = np.random.default_rng(5)
    values = rng.standard_normal(2000)
    data = parquet_bytes([ParquetColumn("x", "double", values), ParquetColumn("k", "int64", np.arange(2000)),
                          ParquetColumn("b", "bool", values > 0)])
    table = _read(data)
    assert table.column("x").to_numpy().tobytes() == values.tobytes()
    assert table.column("k").to_pylist() == list(range(2000))
    assert table.column("b").to_pylist() == (values > 0).tolist()


def test_the_metadata_is_what_the_parquet_specification_says():
    data = parquet_bytes(EDGE, {"description:text": "some text", "ключ": "значение"})
    # File format: "PAR1", the column chunks, the footer, its length (4 bytes little endian), "PAR1"
    assert data[:4] == data[-4:] == b"PAR1"
    meta = pq.ParquetFile(io.BytesIO(data)).metadata
    assert (meta.num_rows, meta.num_row_groups, meta.num_columns) == (6, 1, len(EDGE))
    assert meta.created_by == CREATED_BY == "planrunner"  # no version number: stable bytes
    assert meta.format_version.startswith("2.")
    assert meta.metadata == {b"description:text": b"some text", "ключ".encode(): "значение".encode()}
    assert meta.serialized_size == struct.unpack("<I", data[-8:-4])[0]
    physical = {"string": "BYTE_ARRAY", "double": "DOUBLE", "int64": "INT64", "bool": "BOOLEAN"}
    group = meta.row_group(0)
    assert group.num_rows == 6
    for i, column in enumerate(EDGE):
        chunk = group.column(i)
        assert chunk.path_in_schema == column.name
        assert chunk.physical_type == physical[column.kind]
        assert chunk.compression == "UNCOMPRESSED"
        assert set(chunk.encodings) == {"PLAIN", "RLE"}  # values PLAIN, definition levels RLE
        assert not chunk.has_dictionary_page
        assert chunk.num_values == 6  # nulls count as values of the page
        assert chunk.total_compressed_size == chunk.total_uncompressed_size
        element = meta.schema.column(i)
        assert element.max_definition_level == 1 and element.max_repetition_level == 0  # OPTIONAL, flat
        assert element.logical_type.type == ("STRING" if column.kind == "string" else "NONE")
        assert element.converted_type == ("UTF8" if column.kind == "string" else "NONE")


def test_same_columns_same_bytes():
    first = parquet_bytes(EDGE, {"k": "v"})
    again = parquet_bytes([ParquetColumn(c.name, c.kind, list(c.values)) for c in EDGE], {"k": "v"})
    assert first == again
    # pinned: the writer's own bytes; a change here changes every rehearsal's Parquet dummy file, so
    # `verify` of an earlier rehearsal would no longer find its files (README, "Rehearsing a plan")
    assert hashlib.sha256(first).hexdigest() == PINNED


PINNED = "79bc9dbcc938981f541f2979ce6907119d9300b7d1492004383f167f2eae9640"


def test_bad_columns_are_refused():
    with pytest.raises(ValueError, match="repeat"):
        parquet_bytes([ParquetColumn("a", "int64", [1]), ParquetColumn("a", "int64", [2])])
    with pytest.raises(ValueError, match="differ in length"):
        parquet_bytes([ParquetColumn("a", "int64", [1]), ParquetColumn("b", "int64", [2, 3])])
    with pytest.raises(OverflowError):
        parquet_bytes([ParquetColumn("a", "int64", [2**63])])
