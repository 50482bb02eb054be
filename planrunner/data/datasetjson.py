"""CDISC Dataset-JSON, read from its published specification (CDISC Dataset-JSON v1.1; v1.0 too).

Version 1.1 is one JSON object: `datasetJSONVersion`, the dataset's `name` and `label`, `records`
(the number of rows), `columns` (each with `itemOID`, `name`, `label`, `dataType`, optionally
`targetDataType`, `length`, `displayFormat`, `keySequence`) and `rows` (one array of values per
row, in the order of `columns`). Version 1.0 nests the same under `clinicalData` or
`referenceData` → `itemGroupData` → one item group, with `items` and `itemData` (its first item,
ITEMGROUPDATASEQ, is the record's sequence number).

Values must have the JSON type their dataType promises: `string`, `date`, `datetime`, `time` and
`URI` are strings; `integer` whole numbers; `float` and `double` numbers; `decimal` a number, or a
string holding one (1.1 writes decimals as strings to keep their digits); `boolean` true/false.
A value of another JSON type is an error naming the row and column. null is a missing value.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from decimal import Decimal, InvalidOperation

from planrunner.errors import DataError

JSON_TYPES = {"string": (str,), "date": (str,), "datetime": (str,), "time": (str,), "URI": (str,),
              "integer": (int,), "float": (int, float), "double": (int, float), "decimal": (int, float, str),
              "boolean": (bool,)}
SHOW = 5


@dataclass(frozen=True)
class Item:
    name: str
    label: str | None
    data_type: str
    display_format: str | None


@dataclass(frozen=True)
class DatasetJson:
    name: str | None
    label: str | None
    items: tuple[Item, ...]
    columns: dict[str, list[object]]


def _refuse(shown: str, what: str, hint: str = "write the file with a Dataset-JSON (v1.1) writer") -> DataError:
    return DataError(f"the file is not valid Dataset-JSON: {what}", where=shown, hint=hint)


def read_dataset_json(data: bytes, shown: str) -> DatasetJson:
    try:
        document = json.loads(data.decode("utf-8-sig"), parse_float=float, parse_constant=_no_constant)
    except UnicodeDecodeError as exc:
        raise _refuse(shown, f"byte {exc.start} is not UTF-8", "save the file as UTF-8") from None
    except json.JSONDecodeError as exc:
        raise DataError(f"line {exc.lineno}, column {exc.colno}: not valid JSON: {exc.msg}", where=shown,
                        hint="the file is damaged or truncated; write it again") from None
    except ValueError as exc:
        raise _refuse(shown, str(exc), "JSON has no NaN or Infinity: write a missing value as null") from None
    if not isinstance(document, dict):
        raise _refuse(shown, "the top level is not an object")
    if "columns" in document or "rows" in document:
        return _version_1_1(document, shown)
    return _version_1_0(document, shown)


def _no_constant(name: str) -> object:
    raise ValueError(f"'{name}' is not a JSON number")


def _version_1_1(document: dict, shown: str) -> DatasetJson:
    columns, rows = document.get("columns"), document.get("rows")
    if not isinstance(columns, list) or not columns:
        raise _refuse(shown, "'columns' is missing or empty")
    if not isinstance(rows, list):
        raise _refuse(shown, "'rows' is missing or not an array")
    items = tuple(_item(c, f"columns[{i}]", shown) for i, c in enumerate(columns))
    return _table(document.get("name"), document.get("label"), items, rows, document.get("records"), "rows", shown)


def _version_1_0(document: dict, shown: str) -> DatasetJson:
    for kind in ("clinicalData", "referenceData"):
        part = document.get(kind)
        if isinstance(part, dict) and isinstance(part.get("itemGroupData"), dict):
            groups = part["itemGroupData"]
            if len(groups) != 1:
                raise _refuse(shown, f"{kind}.itemGroupData holds {len(groups)} datasets",
                              "write one dataset per file")
            (oid, group), = groups.items()
            if not isinstance(group, dict) or not isinstance(group.get("items"), list):
                raise _refuse(shown, f"itemGroupData.{oid}.items is missing")
            items = tuple(_item(c, f"items[{i}]", shown) for i, c in enumerate(group["items"]))
            rows = group.get("itemData")
            if not isinstance(rows, list):
                raise _refuse(shown, f"itemGroupData.{oid}.itemData is missing or not an array")
            return _table(group.get("name"), group.get("label"), items, rows, group.get("records"), "itemData", shown)
    raise _refuse(shown, "it has neither 'columns' and 'rows' (v1.1) nor clinicalData/referenceData (v1.0)")


def _item(column: object, at: str, shown: str) -> Item:
    if not isinstance(column, dict) or not isinstance(column.get("name"), str):
        raise _refuse(shown, f"{at} has no name")
    kind = column.get("dataType", column.get("type"))
    if kind not in JSON_TYPES:
        raise _refuse(shown, f"{at} ('{column['name']}') has dataType {kind!r}",
                      "dataType is one of " + ", ".join(JSON_TYPES))
    label = column.get("label")
    display = column.get("displayFormat")
    return Item(column["name"], label if isinstance(label, str) else None, kind,
                display if isinstance(display, str) else None)


def _table(name: object, label: object, items: tuple[Item, ...], rows: list, records: object, key: str,
           shown: str) -> DatasetJson:
    width = len(items)
    columns: dict[str, list[object]] = {item.name: [] for item in items}
    if len(columns) != width:
        repeated = sorted({i.name for i in items if sum(j.name == i.name for j in items) > 1})
        raise _refuse(shown, f"column(s) named twice: {', '.join(repeated)}")
    wrong: dict[str, list[int]] = {}
    for number, row in enumerate(rows, start=1):
        if not isinstance(row, list) or len(row) != width:
            size = len(row) if isinstance(row, list) else "no"
            raise _refuse(shown, f"row {number} ({key}[{number - 1}]) has {size} value(s) but there are {width} "
                                 "columns", "every row holds one value per column, null where missing")
        for item, value in zip(items, row):
            if value is not None and (not isinstance(value, JSON_TYPES[item.data_type])
                                      or (isinstance(value, bool) and item.data_type != "boolean")):
                wrong.setdefault(item.name, []).append(number)
            elif item.data_type == "decimal" and isinstance(value, str):
                value = _decimal(value)
                if value is None:
                    wrong.setdefault(item.name, []).append(number)
            columns[item.name].append(value)
    if wrong:
        name_, numbers = next(iter(wrong.items()))
        item = next(i for i in items if i.name == name_)
        shown_rows = ", ".join(map(str, numbers[:SHOW])) + (f" and {len(numbers) - SHOW} more" if len(numbers) > SHOW
                                                            else "")
        raise _refuse(shown, f"column '{name_}' (dataType {item.data_type}): {len(numbers)} value(s) of another JSON "
                             f"type on row(s) {shown_rows}",
                      "write each value with the JSON type its dataType promises (null where missing)")
    if isinstance(records, int) and not isinstance(records, bool) and records != len(rows):
        raise _refuse(shown, f"'records' says {records} but the file holds {len(rows)} row(s)",
                      "the file is truncated or was edited by hand; write it again")
    return DatasetJson(name if isinstance(name, str) else None, label if isinstance(label, str) else None,
                       items, columns)


def _decimal(text: str) -> Decimal | None:
    try:
        number = Decimal(text.strip())
    except InvalidOperation:
        return None
    return number if number.is_finite() else None
