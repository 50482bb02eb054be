"""Dummy data for a rehearsal: files made from the plan's declared columns alone, never from real data.

`planrunner rehearse` runs the whole plan on these files before the real data exist (or while they
stay blinded). Every value comes from the declarations (types, levels, min/max) and from the roles the
analyses give the columns (groups, strata, pairs, clusters, events, survival times); every random
number from the rehearsal's seed through a stream keyed by the dataset and column names
(`stream_of`), so the same plan, seed and sizes give the same bytes on every run and every machine
with the same numpy. The rules, each stated in `RULES` (and in the record):

* a *unit* is a row; with `pairs` it is a pair (one row per level of the paired groups column), with
  `clusters` a cluster of `ROWS_PER_CLUSTER` rows; a column whose type is category gives as many
  units as it has levels when it is the pairs or clusters column;
* strata are allocated balanced over the units, then each groups column balanced within every
  stratum and overall (counts of two levels differ by at most one: the cycle of levels goes on
  from one stratum to the next); every other category and boolean column is
  allocated balanced over the units (unit-level) or rows (row-level), then shuffled;
* an event column holds 1 on `n - n // 4` rows (three in four events), shuffled;
* numbers and integers are uniform on [min, max]; a side the plan leaves open is `SPAN` away from
  the other (from 0 when neither is given); a survival time reaches at least twice the plan's
  `at` or `horizon`; numbers are rounded to `DECIMALS` decimals;
* text columns number their units or rows (`column-0001`); dates are uniform over `DATE_DAYS`
  days from `DATE_START`;
* each file is written in its dataset's own format: CSV, TSV, Parquet and Dataset-JSON here, XPT
  (version 5) and .xlsx by `dummyformats.py`; no file holds the clock, so the seed fixes every byte;
* rows that hold a value the plan declares missing (`missing_values`), fail a derivation or the
  dataset's `rows_where` have their free columns (neither
  unit, groups, strata, events nor text) drawn again, up to `REDRAWS` times; rows still failing are an
  error naming the filter.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from planrunner.data.parquet import ParquetColumn, parquet_bytes
from planrunner.data.units import DEFAULT_UNITS, MAX_UNITS, MIN_UNITS
from planrunner.engines.streams import Stream, analysis_key
from planrunner.errors import DataError, ExpressionError, PlanError
from planrunner.plan.derived import derivations
from planrunner.plan.expr import parse_expression
from planrunner.plan.load import LoadedPlan
from planrunner.plan.schema import DATA_SUFFIXES, Column, Dataset, Plan

# changes with any change of the rules below or of the file writers (they fix every byte);
# /2: Parquet dummy files from planrunner's own writer (data/parquet.py) instead of pyarrow's
GENERATOR_ID = "planrunner.dummy/2"
ROWS_PER_CLUSTER = 4
SPAN = 100.0
DECIMALS = 3
EVENT_SHARE = "n - n // 4"
DATE_START = np.datetime64("2026-01-01")
DATE_DAYS = 365
REDRAWS = 50
STRATA_WITHOUT_LEVELS = 4  # a text or integer strata column gets this many values
# the delimiter of each text format (the typed formats have their own writers)
DELIMITERS = {"csv": ",", "tsv": "\t"}
DATASET_JSON_VERSION = "1.1.0"
# in a rehearsal's folder of dummy files: the note that marks them; a run refuses data under it
MARKER = "REHEARSAL-DUMMY-DATA.txt"
RULES = (
    "a unit is a row, a pair (one row per level of the paired groups column) or a cluster of "
    f"{ROWS_PER_CLUSTER} rows; strata balanced over units, groups balanced within strata, other "
    f"categories and booleans balanced over units or rows; events on {EVENT_SHARE} rows; numbers "
    f"uniform on [min, max] (an open side {SPAN:g} away, survival times past twice at/horizon), "
    f"{DECIMALS} decimals; text numbered; dates uniform over {DATE_DAYS} days from {DATE_START}; "
    f"rows failing rows_where have their free columns drawn again (at most {REDRAWS} times)"
)


def stream_of(seed: int, dataset: str, column: str) -> Stream:
    """The stream of one dummy column: keyed by the text 'rehearsal/DATASET/COLUMN', so adding or
    reordering columns or datasets changes no other column's values. Block r is redraw round r."""
    return Stream(seed, (analysis_key(f"rehearsal/{dataset}/{column}"),))


@dataclass(frozen=True)
class DummyFile:
    name: str  # the dataset
    file: str  # the path the plan gives (parameters filled in)
    data: bytes
    rows: int
    units: int
    columns: dict[str, str]  # column -> the rule that made it

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.data).hexdigest()

    def entry(self) -> dict[str, Any]:
        return {"name": self.name, "file": self.file, "sha256": self.sha256, "rows": self.rows,
                "units": self.units, "columns": dict(self.columns)}


@dataclass
class _Roles:
    groups: dict[str, str | None] = field(default_factory=dict)  # groups column -> its strata column
    strata: list[str] = field(default_factory=list)
    events: set[str] = field(default_factory=set)
    reach: dict[str, float] = field(default_factory=dict)  # survival time column -> largest at/horizon
    pairs: set[tuple[str, str]] = field(default_factory=set)  # (pairs column, its groups column)
    clusters: set[str] = field(default_factory=set)
    compare: dict[str, list[str]] = field(default_factory=dict)  # groups column -> the levels compared


def _roles(plan: Plan, dataset: str) -> _Roles:
    roles = _Roles()
    for a in plan.analyses:
        if a.data != dataset:
            continue
        if a.strata is not None and a.strata not in roles.strata:
            roles.strata.append(a.strata)
        if a.groups is not None:
            roles.groups.setdefault(a.groups.by, a.strata)
            known = roles.compare.setdefault(a.groups.by, [])
            known += [level for level in a.groups.compare if level not in known]
        if a.event is not None:
            roles.events.add(a.event)
            reach = max(v for v in (a.at, a.horizon, 0.0) if v is not None)
            roles.reach[a.outcome] = max(roles.reach.get(a.outcome, 0.0), reach)
        if a.pairs is not None and a.groups is not None:
            roles.pairs.add((a.pairs, a.groups.by))
        if a.clusters is not None:
            roles.clusters.add(a.clusters)
    return roles


def _where(loaded: LoadedPlan, path: tuple[Any, ...]) -> str:
    pos = loaded.yaml.position(path)
    return f"{loaded.file}:{pos.line}:{pos.column}"


@dataclass(frozen=True)
class _Layout:
    unit_column: str | None
    paired_by: str | None  # the groups column whose levels each pair holds once
    units: int
    per_unit: int  # rows per unit


def _layout(loaded: LoadedPlan, name: str, spec: Dataset, roles: _Roles, units: int) -> _Layout:
    where = _where(loaded, ("datasets", name))
    unit_columns = {p for p, _ in roles.pairs} | roles.clusters
    if len(unit_columns) > 1 or len({by for _, by in roles.pairs}) > 1:
        raise PlanError(f"rehearse cannot make dummy data for dataset '{name}': its analyses declare more than one "
                        f"pairs or clusters column ({', '.join(sorted(unit_columns))})", where=where,
                        hint="rehearse a plan whose analyses of one dataset share one pairs or clusters column")
    if not unit_columns:
        return _Layout(None, None, units, 1)
    column = next(iter(unit_columns))
    declared = spec.columns[column]
    count = len(declared.levels) if declared.type == "category" and declared.levels else units
    if roles.pairs:
        by = next(iter(roles.pairs))[1]
        return _Layout(column, by, count, len(spec.columns[by].levels or ()))
    return _Layout(column, None, count, ROWS_PER_CLUSTER)


def _balanced(levels: list[Any], n: int, gen: np.random.Generator, start: int = 0) -> np.ndarray:
    """n values cycling through the levels from level ``start`` (counts differ by at most one), then
    shuffled. Strata continue the cycle where the stratum before stopped, so the groups stay
    balanced overall as well as within every stratum."""
    return gen.permutation(np.resize(np.roll(np.array(levels, dtype=object), -start), n))


def _as_kind(values: np.ndarray, column: Column) -> np.ndarray:
    """Allocated values in the dtype the reader gives the column (bool, int64, or text objects)."""
    if column.type == "boolean":
        return values.astype(bool)
    if column.type == "integer":
        return values.astype(np.int64)
    return values


def _bounds(column: Column, reach: float) -> tuple[float, float]:
    span = max(SPAN, 2.0 * reach)
    if column.min is not None and column.max is not None:
        return column.min, column.max
    if column.min is not None:
        return column.min, column.min + span
    if column.max is not None:
        return column.max - span, column.max
    return 0.0, span


def _draw(column: Column, name: str, n: int, gen: np.random.Generator, roles: _Roles) -> np.ndarray:
    """n values of a column that no balanced allocation makes (events, numbers, text, dates)."""
    kind = column.type
    if name in roles.events:
        ones = n - n // 4
        values = gen.permutation(np.arange(n) < ones)
        return values if kind == "boolean" else values.astype(np.int64)
    if kind == "text":
        return _numbered(name, n)
    if kind == "date":
        return DATE_START + gen.integers(0, DATE_DAYS, size=n).astype("timedelta64[D]")
    lo, hi = _bounds(column, roles.reach.get(name, 0.0))
    if kind == "integer":
        low, high = math.ceil(lo), math.floor(hi)
        return gen.integers(low, max(low, high) + 1, size=n).astype(np.int64)
    values = np.round(gen.uniform(lo, hi, size=n), DECIMALS)
    return np.clip(values, lo, hi)


def _levels(column: Column, name: str, roles: _Roles) -> list[Any] | None:
    """The values a balanced allocation cycles through, or None for a column drawn otherwise."""
    if column.type == "boolean" and name not in roles.events:
        return [False, True]
    if column.type == "category":
        return list(column.levels or roles.compare.get(name) or [f"{name}-1", f"{name}-2"])
    if name in roles.groups or name in roles.strata:
        named = roles.compare.get(name) or [str(k) for k in range(1, STRATA_WITHOUT_LEVELS + 1)]
        return [int(v) for v in named] if column.type == "integer" else named if column.type == "text" else None
    return None


def _rule(column: Column, name: str, roles: _Roles, layout: _Layout, unit_level: bool) -> str:
    if name == layout.unit_column:
        return "numbers the pairs" if layout.paired_by else "numbers the clusters"
    if name == layout.paired_by:
        return "every level once per pair"
    if name in roles.events:
        return f"event: 1 on {EVENT_SHARE} rows"
    where = "units" if unit_level else "rows"
    if name in roles.strata:
        return f"strata, balanced over {where}"
    if name in roles.groups:
        strata = roles.groups[name]
        return f"groups, balanced over {where}" + (f" within strata of {strata}" if strata else "")
    if _levels(column, name, roles) is not None:
        return f"balanced over {where}"
    if column.type in ("number", "integer"):
        lo, hi = _bounds(column, roles.reach.get(name, 0.0))
        return f"uniform on [{lo:g}, {hi:g}] per {'unit' if unit_level else 'row'}"
    if column.type == "text":
        return f"numbered {where}"
    return f"uniform dates over {DATE_DAYS} days from {DATE_START}"


def _unit_level(column: Column, name: str, roles: _Roles, layout: _Layout) -> bool:
    """Whether a column holds one value per unit (the same on every row of a pair or cluster)."""
    if layout.unit_column is None or name == layout.paired_by or name in roles.events:
        return False
    if name == layout.unit_column or name in roles.groups or name in roles.strata:
        return True
    # a pair is one unit measured under each group: its other categories are the unit's
    return layout.paired_by is not None and column.type in ("category", "boolean")


def _unit_ids(column: Column, name: str, units: int) -> np.ndarray:
    if column.type == "category":
        return np.array(column.levels or [], dtype=object)
    if column.type in ("integer", "number"):
        return np.arange(1, units + 1, dtype=np.int64 if column.type == "integer" else np.float64)
    return _numbered(name, units)


def _numbered(name: str, n: int) -> np.ndarray:
    """Text values that number the units or rows: name-0001, name-0002, ..."""
    width = max(4, len(str(n)))
    return np.array([f"{name}-{k + 1:0{width}d}" for k in range(n)], dtype=object)


def _allocated(column: Column, name: str, count: int, gen: np.random.Generator, roles: _Roles,
               spec: Dataset, done: dict[str, np.ndarray]) -> np.ndarray:
    """A column's first values: balanced (within strata for a groups column), else by its rule."""
    levels = _levels(column, name, roles)
    if levels is None or name in roles.events:
        return _draw(column, name, count, gen, roles)
    strata = roles.groups.get(name)
    if strata is None or strata not in done:
        return _as_kind(_balanced(levels, count, gen), column)
    values = np.empty(count, dtype=object)
    by_stratum = done[strata]
    start = 0
    for level in _levels(spec.columns[strata], strata, roles) or []:
        here = np.flatnonzero(by_stratum == level)
        values[here] = _balanced(levels, here.size, gen, start % len(levels))
        start += here.size
    return _as_kind(values, column)


def _columns(name: str, spec: Dataset, roles: _Roles, layout: _Layout, seed: int) -> dict[str, np.ndarray]:
    """Every declared column, per unit or per row (round 0 of every stream): strata first, then
    groups, then the rest, in the plan's order."""
    unit_of_row = np.repeat(np.arange(layout.units), layout.per_unit)
    per_unit: dict[str, np.ndarray] = {}  # unit-level columns, one value per unit
    out: dict[str, np.ndarray] = {}
    order = sorted(spec.columns, key=lambda c: (c not in roles.strata, c not in roles.groups))
    for column in order:
        declared = spec.columns[column]
        gen = stream_of(seed, name, column).generator(0)
        if column == layout.paired_by:
            out[column] = np.tile(np.array(_levels(declared, column, roles) or [], dtype=object), layout.units)
        elif column == layout.unit_column:
            per_unit[column] = _unit_ids(declared, column, layout.units)
            out[column] = per_unit[column][unit_of_row]
        elif _unit_level(declared, column, roles, layout):
            per_unit[column] = _allocated(declared, column, layout.units, gen, roles, spec, per_unit)
            out[column] = per_unit[column][unit_of_row]
        else:
            out[column] = _allocated(declared, column, unit_of_row.size, gen, roles, spec, out)
    return out


def _redrawn(name: str, spec: Dataset, roles: _Roles, layout: _Layout, seed: int, round_: int,
             columns: dict[str, np.ndarray], bad: np.ndarray) -> dict[str, np.ndarray]:
    """The free columns (neither unit, groups, strata, events nor text) drawn again on the failing rows (a
    unit-level column on the failing units) from block ``round_`` of their streams; a category is
    then a plain random choice among its levels."""
    unit_of_row = np.repeat(np.arange(layout.units), layout.per_unit)
    out = dict(columns)
    for column, declared in spec.columns.items():
        if _structural(declared, column, roles, layout):
            continue
        gen = stream_of(seed, name, column).generator(round_)
        unit_level = _unit_level(declared, column, roles, layout)
        if unit_level:
            units = np.zeros(layout.units, dtype=bool)
            units[unit_of_row[bad]] = True
            values = columns[column][:: layout.per_unit].copy()
            where = units
        else:
            values, where = columns[column].copy(), bad
        count = int(where.sum())
        levels = _levels(declared, column, roles)
        values[where] = (_draw(declared, column, count, gen, roles) if levels is None
                         else _as_kind(np.array(levels, dtype=object)[gen.integers(0, len(levels), size=count)],
                                       declared))
        out[column] = values[unit_of_row] if unit_level else values
    return out


def _failing(name: str, spec: Dataset, columns: dict[str, np.ndarray], where: str) -> np.ndarray:
    """Rows that hold a value the reader would take as missing (the plan's missing_values), that a
    derivation cannot compute or that the rows_where filter drops."""
    n = next(iter(columns.values())).size
    markers = set(spec.missing_values)
    bad = np.zeros(n, dtype=bool)
    for column, declared in spec.columns.items():
        bad |= np.array([_text(v, declared.type) in markers for v in columns[column]], dtype=bool)
    typed = dict(columns)
    for column, expression in derivations(spec).items():
        try:
            typed[column] = expression.evaluate(typed)
        except ExpressionError as exc:
            if not exc.rows:
                raise PlanError(f"rehearse cannot compute derived column '{column}' of dataset '{name}' on dummy "
                                f"data: {exc.message}", where=where, hint=exc.hint) from None
            bad[list(exc.rows)] = True
            return bad  # the rows after this derivation are judged in the next round
    if spec.rows_where is not None:
        try:
            bad |= ~parse_expression(spec.rows_where).evaluate(typed)
        except ExpressionError as exc:
            raise PlanError(f"rehearse cannot apply the rows_where filter of dataset '{name}' to dummy data: "
                            f"{exc.message}", where=where, hint=exc.hint) from None
    return bad


def _structural(column: Column, name: str, roles: _Roles, layout: _Layout) -> bool:
    """Columns a redraw keeps: units, groups, strata, events, and numbered text."""
    return (name in (layout.unit_column, layout.paired_by) or name in roles.groups or name in roles.strata
            or name in roles.events or column.type == "text")


def dummy_dataset(loaded: LoadedPlan, name: str, *, seed: int, units: int) -> DummyFile:
    """The dummy file of one dataset (see the module note for the rules)."""
    spec = loaded.plan.datasets[name]
    fmt = spec.format or _format_of(spec.file)
    if spec.sha256 is not None:
        raise PlanError(f"dataset '{name}' pins its file's SHA-256, which no dummy file can have",
                        where=_where(loaded, ("datasets", name, "sha256")),
                        hint="rehearse a copy of the plan without the sha256 pin (the analyses are the same)")
    roles = _roles(loaded.plan, name)
    layout = _layout(loaded, name, spec, roles, units)
    columns = _columns(name, spec, roles, layout, seed)
    rule_where = _where(loaded, ("datasets", name, "rows_where") if spec.rows_where else ("datasets", name))
    unit_of_row = np.repeat(np.arange(layout.units), layout.per_unit)
    for round_ in range(1, REDRAWS + 1):
        bad = _failing(name, spec, columns, rule_where)
        if not bad.any():
            break
        columns = _redrawn(name, spec, roles, layout, seed, round_, columns, bad)
    else:
        bad = _failing(name, spec, columns, rule_where)
    if bad.any():
        raise PlanError(f"rehearse cannot make rows of dataset '{name}' that pass its rows_where filter, "
                        f"derivations and missing values: {int(bad.sum())} of {bad.size} still fail after {REDRAWS} "
                        "redraws of the columns it may vary (units, groups, strata and events are kept)",
                        where=rule_where,
                        hint="a filter on the groups, strata, pairs, clusters or event columns, or on a value "
                             "outside the declared range, cannot be met by dummy data; declare min/max that the "
                             "filter keeps")
    rules = {c: _rule(spec.columns[c], c, roles, layout, _unit_level(spec.columns[c], c, roles, layout))
             for c in spec.columns}
    data = _file(loaded, name, fmt, columns)
    return DummyFile(name, spec.file, data, int(unit_of_row.size), layout.units, rules)


def _file(loaded: LoadedPlan, name: str, fmt: str, columns: dict[str, np.ndarray]) -> bytes:
    """The bytes of a dataset's dummy file in its own format."""
    from planrunner.data.dummyformats import dummy_xlsx, dummy_xpt

    spec = loaded.plan.datasets[name]
    if fmt == "parquet":
        return _parquet(spec, columns)
    if fmt == "dataset-json":
        return _dataset_json(name, spec, columns)
    if fmt == "xpt":
        return dummy_xpt(loaded, name, spec, columns)
    if fmt == "xlsx":
        return dummy_xlsx(loaded, name, spec, columns)
    return _write(spec, columns, DELIMITERS[fmt])


def _format_of(file: str) -> str:
    dot = file.rfind(".")
    return DATA_SUFFIXES.get(file[dot:].lower(), "csv") if dot >= 0 else "csv"


def _text(value: Any, kind: str) -> str:
    if kind == "boolean":
        return "true" if value else "false"
    if kind == "number":
        return repr(float(value))
    return str(value)


def _write(spec: Dataset, columns: dict[str, np.ndarray], delimiter: str) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, delimiter=delimiter, lineterminator="\n")
    names = list(spec.columns)
    writer.writerow(names)
    kinds = [spec.columns[c].type for c in names]
    for row in zip(*(columns[c] for c in names)):
        writer.writerow([_text(v, k) for v, k in zip(row, kinds)])
    return buffer.getvalue().encode("utf-8")


def _parquet(spec: Dataset, columns: dict[str, np.ndarray]) -> bytes:
    """A Parquet file: numbers as doubles, true/false as booleans, every other column as the same text
    the CSV writer would write (the reader takes each storage its declared type accepts). Written by
    planrunner's own writer (data/parquet.py): the seed alone makes the bytes, whatever pyarrow is
    installed (no time stamp, no version goes into the file)."""
    written = []
    for column, declared in spec.columns.items():
        if declared.type in ("number", "integer"):
            written.append(ParquetColumn(column, "double", np.asarray(columns[column], dtype=np.float64)))
        elif declared.type == "boolean":
            written.append(ParquetColumn(column, "bool", np.array([bool(v) for v in columns[column]], dtype=bool)))
        else:
            written.append(ParquetColumn(column, "string", [_text(v, declared.type) for v in columns[column]]))
    return parquet_bytes(written)


def _dataset_json(name: str, spec: Dataset, columns: dict[str, np.ndarray]) -> bytes:
    """A CDISC Dataset-JSON v1.1 file (numbers as `double`, true/false as `boolean`, the others as
    `string` holding the text the CSV writer would write). No creation time stamp goes into it, so
    the seed alone makes the same bytes."""
    kinds = {c: "double" if d.type in ("number", "integer") else "boolean" if d.type == "boolean" else "string"
             for c, d in spec.columns.items()}

    def value(v: Any, column: str) -> object:
        kind = kinds[column]
        return float(v) if kind == "double" else bool(v) if kind == "boolean" else _text(v, spec.columns[column].type)

    names = list(spec.columns)
    rows = [[value(v, c) for v, c in zip(row, names)] for row in zip(*(columns[c] for c in names))]
    document = {"datasetJSONVersion": DATASET_JSON_VERSION, "itemGroupOID": f"IG.{name}", "records": len(rows),
                "name": name, "label": f"{name} (rehearsal dummy data)",
                "columns": [{"itemOID": f"IT.{name}.{c}", "name": c, "label": c, "dataType": kinds[c]}
                            for c in names],
                "rows": rows}
    return (json.dumps(document, ensure_ascii=False, allow_nan=False) + "\n").encode("utf-8")


def dummy_data(loaded: LoadedPlan, *, seed: int, units: int = DEFAULT_UNITS) -> list[DummyFile]:
    """The dummy file of every dataset of the plan (parameters already filled in)."""
    if not (isinstance(units, int) and MIN_UNITS <= units <= MAX_UNITS):
        raise PlanError(f"the number of units must be a whole number from {MIN_UNITS} to {MAX_UNITS}, not {units}",
                        where="--units", hint=f"the default is {DEFAULT_UNITS}")
    if not (isinstance(seed, int) and 0 <= seed < 2 ** 63):
        raise PlanError(f"the rehearsal seed must be a whole number from 0 to 2**63 - 1, not {seed}", where="--seed")
    return [dummy_dataset(loaded, name, seed=seed, units=units) for name in loaded.plan.datasets]


def refuse_dummy_data(paths: list[Path]) -> None:
    """A run refuses data files in a rehearsal's folder of dummy files (the folder holds `MARKER`):
    a record made from them would look like a result."""
    for path in paths:
        for folder in path.parents:
            if (folder / MARKER).is_file():
                raise DataError(f"this file is dummy data written by 'planrunner rehearse' (see {folder / MARKER}); "
                                "a run on it would look like a result", where=str(path),
                                hint="run on the real data; to repeat a rehearsal, run 'planrunner rehearse' again "
                                     "or 'planrunner verify' on its record")
