"""The writers of a rehearsal's typed dummy files: XPT v5 (data/xpt.py: write_xpt, double_to_ibm) and
.xlsx (data/sheets.py: write_sheet).

Checked against outside values: the IBM hexadecimal floating-point definition and its worked
conversions, the bytes an independent XPT writer (pyreadstat / ReadStat) gives the same numbers, and
outside readers (pandas.read_sas, pyreadstat.read_xport, pandas.read_excel) of our files; the exact
round trip of every double in IBM's range; and the same bytes whatever the clock says.
"""

from __future__ import annotations

import datetime as dt
import io
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planrunner.data import sheets
from planrunner.data.sheets import FIXED_TIME, read_sheet, write_sheet
from planrunner.data.xpt import (
    FIXED_STAMP,
    IBM_LIMIT,
    IBM_SMALLEST,
    RECORD,
    XptColumn,
    double_to_ibm,
    ibm_to_double,
    read_xpt,
    write_xpt,
)
from planrunner.errors import DataError

pyreadstat = pytest.importorskip("pyreadstat")
openpyxl = pytest.importorskip("openpyxl")


def hexes(values: list[float]) -> list[str]:
    rows, refused = double_to_ibm(np.array(values, dtype=np.float64))
    assert not refused.any()
    return [bytes(r).hex().upper() for r in rows]


def test_ibm_worked_conversions():
    # Source: V-IBM. The IBM System/370 hexadecimal double: sign, 7-bit excess-64 exponent of 16,
    # 56-bit fraction (IBM, System/370 Principles of Operation, GA22-7000). Worked values:
    # 1.0 = 0.1 (hex) x 16^1 → 41 10 00 00 00 00 00 00; −118.625 = −0.76A (hex) x 16^2 → C2 76 A0 00 ...
    # (the worked example of the IBM hexadecimal floating-point description; # from memory);
    # 0.5 = 0.8 x 16^0 → 40 80 ...; 100 = 0.64 x 16^2 → 42 64 ...
    assert hexes([1.0, -118.625, 0.5, 100.0]) == ["4110000000000000", "C276A00000000000", "4080000000000000",
                                                  "4264000000000000"]
    # zero is all zero bytes (either sign); a missing value is '.' (0x2E) then seven zero bytes (SAS TS-140)
    assert hexes([0.0, -0.0, float("nan")]) == ["0000000000000000", "0000000000000000", "2E00000000000000"]
    # the ends of the range: 16^-65 = 0.1 (hex) x 16^-64 → exponent 0; the largest double below 16^63
    # = (1 − 2^-53) x 16^63 → exponent 127, fraction FFFFFFFFFFFFF8 (53 ones, then three zero bits)
    assert hexes([IBM_SMALLEST, np.nextafter(IBM_LIMIT, 0.0)]) == ["0010000000000000", "7FFFFFFFFFFFFFF8"]


def test_ibm_bytes_equal_an_independent_writers(tmp_path: Path):
    # Source: pyreadstat (ReadStat) writes the same numbers into an XPT v5 file; its bytes for each value
    # are the reference (values inside 1e-70..1e70, where ReadStat neither clamps nor flushes)
    rng = np.random.default_rng(3)
    values = np.concatenate([rng.normal(0, 1, 200) * 10.0 ** rng.integers(-60, 60, 200),
                             [1.0, -118.625, 0.1, 1 / 3, -2.0 ** 52 - 1, 123456.789]])
    path = tmp_path / "x.xpt"
    pyreadstat.write_xport(pd.DataFrame({"x": values}), str(path), file_format_version=5, table_name="X")
    body = path.read_bytes()
    obs = body.index(b"HEADER RECORD*******OBS     HEADER RECORD") + RECORD
    theirs = np.frombuffer(body[obs:obs + 8 * values.size], dtype=np.uint8).reshape(-1, 8)
    np.testing.assert_array_equal(double_to_ibm(values)[0], theirs)


def test_every_double_in_ibms_range_round_trips_exactly():
    # exact identity: |x| = m·2^e → fraction m·2^(56−r), an integer shift of the 53-bit significand, so
    # IBM → double gives back every bit; sampled over the whole exponent range, both signs, both ends
    rng = np.random.default_rng(11)
    n = 200_000
    significand = rng.integers(2 ** 52, 2 ** 53, size=n, dtype=np.int64).astype(np.float64)
    x = np.ldexp(significand, rng.integers(-260 - 53 + 1, 252 - 53, size=n)) * rng.choice([-1.0, 1.0], n)
    edges = [IBM_SMALLEST, -IBM_SMALLEST, np.nextafter(IBM_LIMIT, 0.0), np.nextafter(IBM_SMALLEST, 1.0),
             2.0 ** 53 + 2, 1e-78, 7e75, 5e-79 * 2]
    x = np.concatenate([x, edges])
    rows, refused = double_to_ibm(x)
    assert not refused.any()
    back, missing = ibm_to_double(rows)
    assert not missing.any()
    np.testing.assert_array_equal(back.view(np.uint64), x.view(np.uint64))


def test_values_outside_ibms_range_are_flagged_never_rounded():
    x = np.array([IBM_LIMIT, -1e300, np.nextafter(IBM_SMALLEST, 0.0), 5e-324, np.inf, -np.inf, 1.0, np.nan, 0.0])
    _, refused = double_to_ibm(x)
    assert refused.tolist() == [True] * 6 + [False] * 3


def columns_for_test() -> list[XptColumn]:
    days = np.array([0.0, 24_107.0, -1.0, 23_742.0])  # 1960-01-01, 2026-01-01, 1959-12-31, 2025-01-01
    return [XptColumn("ARM", np.array(["drug", "placebo", "drug", "ä-level"], dtype=object), False, "Arm"),
            XptColumn("note", np.array(["n1", None, "n3", "n4"], dtype=object), False),
            XptColumn("score", np.array([1.0, -118.625, np.nan, 0.1]), True, "Score (points)"),
            XptColumn("visits", np.array([0.0, 3.0, 2.0 ** 53, -7.0]), True),
            XptColumn("day", days, True, "Visit day", ("DATE", 9, 0))]


def test_our_xpt_files_read_back_through_three_readers(tmp_path: Path):
    columns = columns_for_test()
    data = write_xpt("SCORES", "Scores", columns)
    assert len(data) % RECORD == 0
    path = tmp_path / "scores.xpt"
    path.write_bytes(data)
    # planrunner's own reader
    ours = read_xpt(data, "scores.xpt")
    assert (ours.dataset, ours.label) == ("SCORES", "Scores")
    assert [v.name for v in ours.variables] == ["ARM", "note", "score", "visits", "day"]
    assert ours.columns["ARM"] == ["drug", "placebo", "drug", "ä-level"]
    assert ours.columns["note"] == ["n1", "", "n3", "n4"]  # a missing text value is blanks
    assert ours.columns["score"] == [1.0, -118.625, None, 0.1]
    assert ours.columns["visits"] == [0.0, 3.0, 2.0 ** 53, -7.0]
    assert [v.display_format for v in ours.variables] == [None, None, None, None, "DATE9."]
    # Source: pyreadstat (ReadStat) as an outside reader: names, labels, values, dates (DATE9.: days from 1960)
    frame, meta = pyreadstat.read_xport(str(path), encoding="utf-8")
    assert meta.column_names == ["ARM", "note", "score", "visits", "day"]
    assert meta.column_labels[:3] == ["Arm", None, "Score (points)"] and meta.table_name == "SCORES"
    assert frame["ARM"].tolist() == ours.columns["ARM"] and frame["note"].tolist() == ours.columns["note"]
    np.testing.assert_array_equal(frame["score"].to_numpy(), [1.0, -118.625, np.nan, 0.1])
    assert [pd.Timestamp(d).date() for d in frame["day"]] == [dt.date(1960, 1, 1), dt.date(2026, 1, 1),
                                                            dt.date(1959, 12, 31), dt.date(2025, 1, 1)]
    # Source: pandas.read_sas(format="xport") as an outside reader; it reads an IBM zero as 16^-65
    # (5.4e-79, see V-IBM), every other value as written
    theirs = pd.read_sas(path, format="xport", encoding="utf-8")
    assert list(theirs.columns) == ["ARM", "note", "score", "visits", "day"]
    assert theirs["ARM"].tolist() == ours.columns["ARM"]
    np.testing.assert_array_equal(theirs["score"].to_numpy(), [1.0, -118.625, np.nan, 0.1])
    assert theirs["visits"].tolist() == [IBM_SMALLEST, 3.0, 2.0 ** 53, -7.0]


def test_an_xpt_file_carries_fixed_dates_so_the_same_columns_give_the_same_bytes():
    data = write_xpt("SCORES", "Scores", columns_for_test())
    assert data == write_xpt("SCORES", "Scores", columns_for_test())
    headers = [data[i:i + RECORD] for i in range(0, 8 * RECORD, RECORD)]
    # created and modified stamps of the library and member headers (TS-140: records 2, 3, 6, 7)
    assert [h.count(FIXED_STAMP) for h in headers] == [0, 1, 1, 0, 0, 1, 1, 0]
    assert b"01JAN60:00:00:00" == FIXED_STAMP


def test_what_version_5_cannot_hold_is_refused_column_by_column():
    wide = np.array(["x" * 201], dtype=object)
    columns = [XptColumn("longername", np.array([1.0]), True), XptColumn("1st", np.array([1.0]), True),
               XptColumn("text", wide, False), XptColumn("big", np.array([1e76]), True),
               XptColumn("ok", np.array([2.0]), True, "a label of forty-one characters, one more")]
    with pytest.raises(DataError) as caught:
        write_xpt("SCORES", "Scores", columns)
    messages = [p.message for p in caught.value.problems]
    assert len(messages) == 5
    assert "'longername' is not a version 5 variable name" in messages[0]
    assert "'1st' is not a version 5 variable name" in messages[1]
    assert "201 bytes" in messages[2] and "outside the range of IBM doubles" in messages[3]
    assert "label" in messages[4]


# --- .xlsx -----------------------------------------------------------------------------------------

NAMES = ["arm", "score", "day", "flag", "note"]
VALUES = [["drug", "placebo", "drug"], [1.5, -118.625, 0.1], [dt.date(2026, 1, 2), dt.date(2026, 3, 4),
                                                             dt.date(1999, 12, 31)],
          [True, False, True], ["=1+1", "plain", "x"]]


class _Clock:
    """A stand-in for the datetime module that openpyxl reads the time from."""

    timezone = dt.timezone

    def __init__(self, moment: dt.datetime):
        moment_ = moment

        class _Fixed(dt.datetime):
            @classmethod
            def now(cls, tz=None):
                return moment_.replace(tzinfo=tz)

        self.datetime = _Fixed


def _at(monkeypatch, moment: dt.datetime) -> None:
    """Every clock a workbook's writing reads (openpyxl's properties, zipfile's entry dates) at ``moment``."""
    import time

    from openpyxl.packaging import core
    from openpyxl.writer import excel
    monkeypatch.setattr(core, "datetime", _Clock(moment))
    monkeypatch.setattr(excel, "datetime", _Clock(moment))
    monkeypatch.setattr(time, "time", lambda: moment.timestamp())


def test_two_workbooks_written_at_different_times_are_the_same_bytes(monkeypatch):
    moments = [dt.datetime(2026, 12, 3, 4, 5, 6), dt.datetime(2026, 12, 3, 4, 5, 7), dt.datetime(2031, 6, 1, 12)]
    ours, plain = [], []
    for moment in moments:  # one second apart, then years apart
        _at(monkeypatch, moment)
        ours.append(write_sheet("scores", NAMES, VALUES))
        book = openpyxl.Workbook()
        buffer = io.BytesIO()
        book.save(buffer)
        plain.append(buffer.getvalue())
    monkeypatch.undo()
    assert ours[0] == ours[1] == ours[2] == write_sheet("scores", NAMES, VALUES)
    assert len({*plain}) == 3  # openpyxl alone stamps the clock: the clocks above did differ
    with zipfile.ZipFile(io.BytesIO(ours[0])) as package:
        assert {i.date_time for i in package.infolist()} == {FIXED_TIME.timetuple()[:6]}
        assert {i.compress_type for i in package.infolist()} == {zipfile.ZIP_STORED}
        core = package.read(sheets.CORE_PART).decode()
    assert "1980-01-01T00:00:00Z" in core and "<dc:creator>planrunner</dc:creator>" in core


def test_a_workbook_reads_back_through_our_sheet_reader_and_pandas():
    data = write_sheet("scores", NAMES, VALUES)
    found = read_sheet(data, "scores", "d.xlsx", "datasets.d.sheet")
    assert found.names == NAMES
    assert found.columns["arm"] == VALUES[0] and found.columns["flag"] == VALUES[3]
    assert found.columns["score"] == VALUES[1]
    assert [d.date() for d in found.columns["day"]] == VALUES[2]
    assert found.columns["note"] == ["=1+1", "plain", "x"]  # text, never a formula
    # Source: pandas.read_excel (openpyxl engine) as an outside reader of the same bytes
    frame = pd.read_excel(io.BytesIO(data), sheet_name="scores")
    assert list(frame.columns) == NAMES and frame["score"].tolist() == VALUES[1]
    assert frame["note"].tolist() == VALUES[4]
    with pytest.raises(DataError, match="no sheet 'other'"):
        read_sheet(data, "other", "d.xlsx", "datasets.d.sheet")


def test_what_a_sheet_cannot_hold_is_refused():
    with pytest.raises(DataError) as caught:
        write_sheet("a/b", ["x", "y", "z"], [["\x01"], ["y" * 32_768], [float("nan")]])
    messages = [p.message for p in caught.value.problems]
    assert "cannot name a sheet" in messages[0] and "control character" in messages[1]
    assert "longer than 32,767" in messages[2] and "NaN or infinite" in messages[3]
