"""The light paths of a run give the heavy libraries' own bits: our mid-ranks and beta quantiles
against scipy.stats.rankdata (method='average') and scipy.stats.beta.ppf, the plain-decimal and
plain-date readers against pandas' to_numeric and to_datetime, the functions they spare a run from
importing."""

from __future__ import annotations

import random

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from planrunner.data.tables import PLAIN_VALUES_UP_TO, _plain_dates, _plain_numbers
from planrunner.engines.pvalues import clopper_pearson
from planrunner.engines.ranks import rankdata


def _same_bits(ours: np.ndarray, theirs: np.ndarray) -> bool:
    return ours.dtype == theirs.dtype and ours.shape == theirs.shape and ours.tobytes() == theirs.tobytes()


@pytest.mark.parametrize("seed", range(6))
def test_ranks_equal_scipy_on_random_tied_and_untied_rows(seed):
    rng = np.random.default_rng(seed)
    for shape in [(1,), (2,), (7,), (50,), (3, 40), (4, 2, 25)]:
        for values in (rng.normal(size=shape), rng.integers(0, 4, size=shape).astype(float),
                       rng.integers(-3, 3, size=shape), np.round(rng.exponential(size=shape), 1)):
            for axis in range(-len(shape), len(shape)):
                assert _same_bits(rankdata(values, axis=axis), stats.rankdata(values, axis=axis)), (shape, axis)


@pytest.mark.parametrize("values", [
    [], [5.0], [2.0, 2.0, 2.0], [np.inf, -np.inf, 0.0, np.inf], [-0.0, 0.0, 1.0], [1.0, np.nan, 0.5],
    [[1.0, 2.0, 2.0], [np.nan, 1.0, 0.0], [3.0, 3.0, 3.0]], [[], []], [True, False, True],
    [1e308, -1e308, 5e-324, -5e-324, 0.0]])
def test_ranks_equal_scipy_on_edges(values):
    assert _same_bits(rankdata(np.asarray(values)), stats.rankdata(values, axis=-1))


def test_clopper_pearson_is_scipy_beta_quantiles_bit_for_bit():
    # the interval as the textbook writes it with scipy.stats.beta.ppf (Clopper & Pearson 1934)
    rng = np.random.default_rng(3)
    for trials in [1, 2, 3, 10, 99, 999, 9999, 10**5, 10**7]:
        counts = {0, 1, 2, trials // 2, trials - 2, trials - 1, trials, *rng.integers(0, trials + 1, 12).tolist()}
        for count in sorted(c for c in counts if 0 <= c <= trials):
            for level in (0.5, 0.9, 0.95, 0.99, 0.999):
                tail = (1.0 - level) / 2.0
                lower = 0.0 if count == 0 else float(stats.beta.ppf(tail, count, trials - count + 1))
                upper = 1.0 if count == trials else float(stats.beta.ppf(1.0 - tail, count + 1, trials - count))
                ours = clopper_pearson(count, trials, level)
                assert np.float64(ours).tobytes() == np.float64((lower, upper)).tobytes(), (count, trials, level)


def _decimal(rnd: random.Random, sign: str) -> str:
    digits = "".join(rnd.choice("0123456789") for _ in range(rnd.randint(0, 22)))
    point = rnd.randint(0, len(digits))
    text = sign + (digits[:point] + "." + digits[point:] if rnd.random() < 0.7 else digits or "0")
    if text in ("-.", "."):
        text = sign + "0"
    if rnd.random() < 0.5:
        text += rnd.choice("eE") + rnd.choice(["", "+", "-"]) + str(rnd.randint(0, 400 if rnd.random() < 0.9 else 9999))
    return text


EDGES = ["-0", "-0.0", "0", ".5", "5.", "0.1", "1e-400", "-1e-400", "1e400", "2e308", "4.9e-324", "2.4e-324",
         "2.5e-324", "1.7976931348623157e308", "2.2250738585072011e-308", "9007199254740993",
         "18446744073709551617", "-9223372036854775809", "123456789012345678", "00012", "1.e5", "1E5"]


def test_plain_decimals_read_as_pandas_reads_them():
    rnd = random.Random(11)
    columns = [[e] for e in EDGES] + [EDGES, [e for e in EDGES if "." not in e and "e" not in e.lower()]]
    for _ in range(1500):
        column = [_decimal(rnd, rnd.choice(["", "-", "+"])) for _ in range(rnd.randint(1, 8))]
        if rnd.random() < 0.4:  # columns of integers alone: pandas reads them as integers first
            column = [v.split(".")[0].split("e")[0].split("E")[0] for v in column]
            column = [v if v.strip("-+") else v + "0" for v in column]
        columns.append(column)
    fast = 0
    for column in columns:
        text = np.array(column)
        ours = _plain_numbers(text)
        if ours is None:
            assert any(v.startswith("+") or len(v) > 40 or v.lstrip("-").isdigit() and len(v.lstrip("-")) > 18
                       or "e" in v.lower() and len(v.lower().split("e")[1].lstrip("+-")) > 4 for v in column), column
            continue
        fast += 1
        theirs = pd.to_numeric(pd.Series(text), errors="coerce").to_numpy(dtype=float)
        assert ours.tobytes() == theirs.tobytes(), column
    assert fast > 300  # many columns took the fast path
    # a leading "+" is left to pandas: there it reads this decimal one unit in the last place off
    assert _plain_numbers(np.array(["+78.22757975010367114"])) is None
    # a long column goes to pandas, whose parser repays its import there
    assert _plain_numbers(np.array(["1.5"] * PLAIN_VALUES_UP_TO)) is not None
    assert _plain_numbers(np.array(["1.5"] * (PLAIN_VALUES_UP_TO + 1))) is None


def test_plain_dates_read_as_pandas_reads_them():
    rnd = random.Random(12)
    texts = ["1678-01-01", "2261-12-31", "2024-02-29", "1970-01-01", "1999-12-31"] + [
        f"{rnd.randint(1678, 2261):04d}-{rnd.randint(1, 12):02d}-{rnd.randint(1, 28):02d}" for _ in range(300)]
    ours = _plain_dates(np.array(texts), np.ones(len(texts), dtype=bool))
    theirs = pd.to_datetime(pd.Series(texts), format="%Y-%m-%d").to_numpy().astype("datetime64[D]")
    assert ours is not None and ours.tobytes() == theirs.tobytes()
    for refused in ["2023-02-29", "1677-12-31", "2262-01-01", "2026-1-05", "2026-13-01", "٢٠٢٦-01-05"]:
        assert _plain_dates(np.array([refused]), np.array([True])) is None  # pandas decides these


@pytest.mark.parametrize("plan", ["liner-trial", "ward-hygiene", "monthly-fill"])
def test_results_parquet_reads_back_as_the_table_pyarrow_writes(plan):
    # results.parquet comes from planrunner's own writer (data/parquet.py); pyarrow, writing the same
    # rows with the documented types, makes a file that reads back to the same schema (names, types,
    # nullability) and the same values
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    import io

    from record_digest import demo_record

    from planrunner.record.results import COLUMNS, result_rows, results_parquet

    record = demo_record(plan)
    kinds = {"string": pa.string(), "double": pa.float64(), "int64": pa.int64(), "bool": pa.bool_()}
    rows = result_rows(record)
    table = pa.table({name: pa.array([row[name] for row in rows], type=kinds[kind]) for name, kind, _ in COLUMNS})
    sink = io.BytesIO()
    pq.write_table(table, sink)
    theirs = pq.read_table(io.BytesIO(sink.getvalue()))
    ours = pq.read_table(io.BytesIO(results_parquet(record)))
    assert [(f.name, f.type, f.nullable) for f in ours.schema] == [(f.name, f.type, f.nullable) for f in theirs.schema]
    assert ours.replace_schema_metadata(None).equals(theirs.replace_schema_metadata(None))
    assert ours.schema.metadata == {f"description:{name}".encode(): meaning.encode() for name, _, meaning in COLUMNS}
