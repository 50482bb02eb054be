"""The columnar fast path gives exactly what the line-by-line reader gives, or leaves the file to it.

Three kinds of checks: decimals parse to the correctly rounded double (the reference is Python's
`float`, which rounds correctly: David Gay's algorithm), the fast path and the line-by-line reader
agree on every table and every message (random plain and broken files, and the whole bad-input
corpus), and a plain file really is read by the fast path.
"""

from __future__ import annotations

import random
import struct
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest

from planrunner.data import columnar, tables
from planrunner.errors import DataError
from planrunner.plan.load import read_plan
from planrunner.plan.schema import Dataset

HERE = Path(__file__).resolve().parent
CORPUS = sorted(p for p in (HERE / "bad_inputs").iterdir() if p.is_dir())


def read_both(spec: Dataset, folder: Path, monkeypatch) -> tuple[object, object, bool]:
    """(fast-path outcome, line-by-line outcome, whether the fast path produced the table)."""
    by_lines = []
    original = tables.read_rows

    def spy(*args):
        by_lines.append(True)
        return original(*args)

    monkeypatch.setattr(tables, "read_rows", spy)
    outcomes = []
    for threshold in (0, 1 << 62):
        monkeypatch.setattr(columnar, "COLUMNAR_FROM_BYTES", threshold)
        by_lines.clear()
        try:
            outcomes.append(tables.read_table("d", spec, folder))
        except DataError as exc:
            outcomes.append(f"{type(exc).__name__}: {exc}")
        if threshold == 0:
            fast_used = not by_lines
    return outcomes[0], outcomes[1], fast_used


def assert_same(fast, slow) -> None:
    if isinstance(fast, str) or isinstance(slow, str):
        assert fast == slow
        return
    assert (fast.rows_read, fast.excluded, fast.ignored_columns, fast.sha256, fast.format, fast.dictionary,
            fast.derived) == (slow.rows_read, slow.excluded, slow.ignored_columns, slow.sha256, slow.format,
                              slow.dictionary, slow.derived)
    assert fast.dropped.missing.tolist() == slow.dropped.missing.tolist()
    assert {c: v.tolist() for c, v in fast.dropped.labels.items()} == \
           {c: v.tolist() for c, v in slow.dropped.labels.items()}
    assert dict(fast.values_read) == dict(slow.values_read)
    assert np.array_equal(fast.lines, slow.lines)
    assert fast.columns.keys() == slow.columns.keys()
    for name, values in fast.columns.items():
        other = slow.columns[name]
        assert values.dtype == other.dtype and values.shape == other.shape, name
        if values.dtype.kind == "f":  # bit for bit: the sign of a zero counts
            assert np.array_equal(values.view(np.int64), other.view(np.int64)), name
        else:
            assert values.tolist() == other.tolist(), name


def spec_of(columns: dict[str, str], **more) -> Dataset:
    return Dataset.model_validate({"file": "d.csv", "columns": {c: {"type": t} for c, t in columns.items()}, **more})


def bits(x: float) -> str:
    return struct.pack(">d", x).hex()


# Source: Python's float() (correctly rounded decimal-to-binary conversion, David Gay's dtoa), with the
# expected bit patterns of IEEE 754 binary64 written out; 2.2250738585072011e-308 is the value that
# hung PHP and Java's converters in 2011 (from memory), 4.9e-324 the smallest subnormal 2**-1074.
EDGE_DECIMALS = [
    ("0.1", "3fb999999999999a"),
    ("0.30000000000000004", "3fd3333333333334"),
    ("-0.0", "8000000000000000"),
    ("0e0", "0000000000000000"),
    ("4.9e-324", "0000000000000001"),
    ("2.4703282292062327e-324", "0000000000000000"),  # just below half the smallest subnormal
    ("2.4703282292062328e-324", "0000000000000001"),  # just above it
    ("2.2250738585072011e-308", "000fffffffffffff"),
    ("2.2250738585072012e-308", "0010000000000000"),
    ("1.7976931348623157e308", "7fefffffffffffff"),
    ("1.7976931348623158e308", "7fefffffffffffff"),  # rounds down to the largest double
    ("9007199254740993", "4340000000000000"),  # 2**53 + 1: a tie, to even (2**53)
    ("9007199254740995", "4340000000000002"),  # 2**53 + 3: a tie, to even (2**53 + 4)
    ("123456789012345678901234567890", "45f8ee90ff6c373e"),
    ("1e23", "44b52d02c7e14af6"),
    ("8.98846567431158e307", "7fe0000000000000"),  # 2**1023 to 15 digits
    (".5", "3fe0000000000000"),
    ("5.", "4014000000000000"),
    ("+2", "4000000000000000"),
    ("1E-3", "3f50624dd2f1a9fc"),
]


def test_edge_decimals_are_the_correctly_rounded_doubles(tmp_path, monkeypatch):
    for text, expected in EDGE_DECIMALS:
        assert bits(float(text)) == expected, text  # the reference agrees with the written-out bits
    # a column of decimals (one with a point, so that pandas reads all as decimals) plus a filler
    body = "y,k\n" + "".join(f"{text},1\n" for text, _ in EDGE_DECIMALS if text != "-0.0")
    (tmp_path / "d.csv").write_text(body)
    spec = spec_of({"y": "number", "k": "integer"})
    fast, slow, used = read_both(spec, tmp_path, monkeypatch)
    assert used
    assert_same(fast, slow)
    expected = [e for t, e in EDGE_DECIMALS if t != "-0.0"]
    assert [bits(v) for v in fast.columns["y"]] == expected


def test_hard_decimals_at_random_agree_with_the_correct_rounding(tmp_path, monkeypatch):
    """17-digit renderings of random doubles, long mantissas with extreme exponents and exact
    midpoints between neighbouring doubles (the hardest case for rounding)."""
    rng = random.Random(16)
    texts = []
    for _ in range(3000):
        x = struct.unpack("<d", rng.getrandbits(64).to_bytes(8, "little"))[0]
        if np.isfinite(x):
            texts.append(f"{x:.17g}")
        digits = "".join(rng.choice("0123456789") for _ in range(rng.randint(16, 30)))
        texts.append(f"{digits[0]}.{digits[1:]}e{rng.randint(-320, 300)}")
        y = abs(struct.unpack("<d", rng.getrandbits(64).to_bytes(8, "little"))[0])
        if np.isfinite(y) and 0 < y < 1e300:
            texts.append(format((Decimal(y) + Decimal(float(np.nextafter(y, np.inf)))) / 2, "e"))
    texts = [t for t in texts if np.isfinite(float(t)) and float(t) != 0]
    (tmp_path / "d.csv").write_text("y\n" + "\n".join(texts) + "\n")
    fast, slow, used = read_both(spec_of({"y": "number"}), tmp_path, monkeypatch)
    assert used
    assert_same(fast, slow)
    reference = np.array([float(t) for t in texts])
    assert np.array_equal(fast.columns["y"].view(np.int64), reference.view(np.int64))


@pytest.mark.parametrize("column, kind", [
    ("k\n9007199254740993\n9223372036854775807\n-9223372036854775808\n12\n", "integer"),  # exact beyond 2**53
    ("k\n9223372036854775808\n1\n", "integer"),  # beyond 64 bits: refused by the line-by-line reader
    ("k\n0x1F\n1\n", "integer"),  # hexadecimal: pyarrow reads it, planrunner refuses it
    ("k\n+5\n007\n-0\n", "integer"),
    ("k\n1.0\n1e3\n", "integer"),
    ("y\n-0\n1\n", "number"),  # pandas: +0.0 among whole numbers ...
    ("y\n-0\n1.5\n", "number"),  # ... and -0.0 beside a decimal; the line-by-line reader decides
    ("y\n1\ninf\n", "number"),
    ("y\n1\n 2\n", "number"),  # pyarrow would take ' 2'; white space at a field's edge is left to the csv module
    ("y\n1\n1_0\n", "number"),
    ("y\n1\n1e400\n", "number"),
    ("y\n1\nNA\n\n", "number"),
    ("day\n2024-02-29\n2026-12-31\n1678-01-01\n2261-12-31\n", "date"),  # read without pandas
    ("day\n2026-02-29\n2026-01-01\n", "date"),  # not a calendar date
    ("day\n2300-01-01\n1600-01-01\n", "date"),  # beyond pandas' nanosecond years: pandas decides
    ("day\n0000-01-01\n2026-13-01\n", "date"),
    ("day\n\uff12\uff10\uff12\uff16-01-02\n2026-01-02\n", "date"),  # full-width digits
    ("day\n2026-1-2\n2026-01-02\n", "date"),
])
def test_edge_values_are_read_as_the_line_by_line_reader_reads_them(tmp_path, monkeypatch, column, kind):
    (tmp_path / "d.csv").write_text(column)
    name = column.split("\n")[0]
    fast, slow, _ = read_both(spec_of({name: kind}, missing="drop"), tmp_path, monkeypatch)
    assert_same(fast, slow)


NUMBERS = ["1.5", "-0", "0", "1e5", "1E-3", ".5", "5.", "+2", "0.1", "12345678901234567", "4.9e-324", "1e400",
           "inf", "nan", "abc", "1_0", "0x10", " 1", "1 ", "NA", "", "-999", "1,5"]
INTEGERS = ["1", "-3", "+4", "007", "-0", "1.0", "1e3", "0x10", "9007199254740993", "9223372036854775808", "NA", "",
            "-999", " 2", "x"]
TEXTS = ["a", "b", "a ", " b", "é", "e\u0301", "NA", "", "yes", "no", "TRUE", "False", "1", "0", "2026-01-02",
         "2026-1-2", "2026-02-30", "x\xa0", "c d", "ä", "\x1f", "-999", "\t", "b\u3000", '"q"', "x;y"]
CLEAN = {"number": NUMBERS[:9], "integer": INTEGERS[:4], "boolean": ["yes", "no", "TRUE", "false", "1", "0"],
         "date": ["2026-01-02", "2025-12-31"], "category": ["a", "b"], "text": ["a", "b", "é", "c d"]}


def random_case(rng: random.Random) -> tuple[bytes, dict, str]:
    kinds = ["number", "integer", "category", "text", "boolean", "date"]
    columns = {f"v{i}": rng.choice(kinds) for i in range(rng.randint(1, 4))}
    header = list(columns) + (["extra"] if rng.random() < 0.3 else [])
    rng.shuffle(header)
    clean = rng.random() < 0.7
    pools = {"number": NUMBERS, "integer": INTEGERS}

    def value(kind: str) -> str:
        return rng.choice(CLEAN[kind] if clean else pools.get(kind, TEXTS))

    fmt = rng.choice(["csv", "tsv"])
    sep = "," if fmt == "csv" else "\t"
    lines = [sep.join(header)] + [sep.join(value(columns.get(h, "text")) for h in header)
                                  for _ in range(rng.randint(1, 30))]
    if rng.random() < 0.1:
        lines.insert(rng.randint(1, len(lines)), "")
    if rng.random() < 0.1:
        lines[rng.randint(1, len(lines) - 1)] += sep + "z"
    newline = rng.choice(["\n", "\r\n"])
    data = (newline.join(lines) + (newline if rng.random() < 0.8 else "")).encode()
    if rng.random() < 0.1:
        data = b"\xef\xbb\xbf" + data
    spec = {"file": "d.csv", "format": fmt, "columns": {c: {"type": t} for c, t in columns.items()},
            "missing": rng.choice(["refuse", "drop"]),
            "missing_values": rng.choice([["", "NA"], [], ["-999"], ["NA"]])}
    for c, t in columns.items():
        if t == "category" and rng.random() < 0.3:
            spec["columns"][c]["levels"] = ["a", "b"]
        if t in ("number", "integer") and rng.random() < 0.3:
            spec["columns"][c]["min"] = 0.0
    if rng.random() < 0.2:
        spec["undeclared_columns"] = "refuse"
    numeric = [c for c, t in columns.items() if t in ("number", "integer")]
    if numeric and rng.random() < 0.4:  # rows the filter drops keep their labels (Table.dropped)
        spec["rows_where"] = f"{numeric[0]} > 1"
    return data, spec, fmt


def test_random_files_read_the_same_both_ways(tmp_path, monkeypatch):
    rng = random.Random(1616)
    fast_tables = 0
    for trial in range(400):
        data, spec, _ = random_case(rng)
        folder = tmp_path / str(trial)
        folder.mkdir()
        (folder / "d.csv").write_bytes(data)
        fast, slow, used = read_both(Dataset.model_validate(spec), folder, monkeypatch)
        assert_same(fast, slow)
        fast_tables += used
    assert fast_tables >= 40  # the fast path is really exercised, not only its refusals


@pytest.mark.parametrize("case", CORPUS, ids=[c.name for c in CORPUS])
def test_bad_input_corpus_reads_the_same_both_ways(case, tmp_path, monkeypatch):
    """Every dataset of the bad-input corpus gives the same table or the same located message."""
    plan_file = case / "plan.yaml"
    try:
        plan = read_plan(plan_file).plan
    except Exception:  # a bad plan or parameters the case supplies: nothing is read here
        return
    for name, spec in plan.datasets.items():
        if spec.format not in (None, "csv", "tsv"):
            continue
        outcomes = []
        for threshold in (0, 1 << 62):
            monkeypatch.setattr(columnar, "COLUMNAR_FROM_BYTES", threshold)
            try:
                outcomes.append(tables.read_table(name, spec, case))
            except DataError as exc:
                outcomes.append(f"{type(exc).__name__}: {exc}")
        assert_same(*outcomes)


def test_a_plain_file_is_read_by_the_fast_path(tmp_path, monkeypatch):
    rows = "".join(f"{i},{'ab'[i % 2]},{i / 7!r},{'yes' if i % 3 else 'no'},2026-01-{1 + i % 28:02d}\n"
                   for i in range(2000))
    (tmp_path / "d.csv").write_text("id,site,y,ok,day\n" + rows)
    spec = spec_of({"id": "integer", "site": "category", "y": "number", "ok": "boolean", "day": "date"})
    monkeypatch.setattr(columnar, "COLUMNAR_FROM_BYTES", 0)

    def refuse(*args):
        raise AssertionError("the line-by-line reader was asked")

    monkeypatch.setattr(tables, "read_rows", refuse)
    table = tables.read_table("d", spec, tmp_path)
    assert table.rows_used == 2000 and table.lines[0] == 2 and table.lines[-1] == 2001
    assert table.columns["y"][7] == 1.0 and table.columns["id"].dtype == np.int64
    assert table.values_read["id"][:3] == ("0", "1", "10")  # named as text, sorted as text
    assert table.columns["day"][0] == np.datetime64("2026-01-01")


@pytest.mark.parametrize("text", [
    b'a,b\n1,"2"\n',  # a quote: the csv module's rules decide
    b"a,b\n1,2\n\n3,4\n",  # a blank line shifts the line numbers
    b"a,b\n1,2\r3,4\n",  # a lone carriage return
    b"a,b\n1, 2\n",  # white space at a field's edge
    b"a,b\n1,2\xc2\xa0\n",  # a no-break space (str.strip removes it)
    b"a,b\n1,e\xcc\x81\n",  # not in NFC form
    b"a,b\n1,\xff\n",  # not UTF-8
    b"a,b\n",  # a header only
    b"a,b\n1,2\x00\n",  # a NUL
])
def test_files_that_are_not_plain_are_left_to_the_line_by_line_reader(text):
    assert columnar.plain_body(text, ",") is None


def test_plain_files_are_recognised():
    assert columnar.plain_body(b"a,b\n1,2\n", ",") == b"a,b\n1,2\n"
    assert columnar.plain_body(b"\xef\xbb\xbfa,b\r\n1,x y\r\n3,\xc3\xa9", ",") == b"a,b\r\n1,x y\r\n3,\xc3\xa9"
    assert columnar.plain_body(b"a\tb\n1\t2\n", "\t") is not None
    assert columnar.plain_body(b"a,b\n1,2\t\n", ",") is None  # a tab edges a CSV field ...
    assert columnar.plain_body(b"a\tb\n1\t\t\n", "\t") is not None  # ... but delimits TSV fields
