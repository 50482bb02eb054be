"""Canonical JSON, the hashes built on it, and a path-by-path difference of two documents.

One canonical form serves every hash of parsed content (a plan's parsed YAML, a record, a lock, a
history entry): sorted keys, no insignificant white space, UTF-8, floats as Python's shortest
round-trip repr. Two documents have the same hash exactly when they hold the same content,
whatever the key order or layout of the file they came from.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

RECORD_HASH_FIELD = "record_sha256"


def canonical_json(value: Any) -> str:
    # A record never holds NaN (see record.sanitize), but a plan may say `.nan`; its canonical form
    # is then the token NaN, which is only ever hashed, never parsed by another tool.
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=True)


def content_sha256(value: Any) -> str:
    """SHA-256 of the canonical JSON text of ``value``."""
    return hashlib.sha256(canonical_json(value).encode("utf-8")).hexdigest()


def self_hash(document: dict, field: str) -> str:
    """The hash a document carries of itself: over its canonical content without ``field``."""
    return content_sha256({k: v for k, v in document.items() if k != field})


def record_sha256(record: dict) -> str:
    return self_hash(record, RECORD_HASH_FIELD)


@dataclass(frozen=True)
class Difference:
    path: str  # dotted path, e.g. "analyses[0].resamples" or "datasets.shipments.rows_where"
    before: Any  # None with `missing_before` when the path did not exist
    after: Any
    missing_before: bool = False
    missing_after: bool = False


def dotted_join(path: str, part: str | int) -> str:
    if isinstance(part, int):
        return f"{path}[{part}]"
    return f"{path}.{part}" if path else str(part)


def differences(before: Any, after: Any, path: str = "") -> list[Difference]:
    """Every leaf where two JSON-like documents differ, in document order.

    Lists are compared position by position (a plan's analyses are a list, and their order is part
    of the plan). A key present on one side only is one difference at that key.
    """
    if isinstance(before, dict) and isinstance(after, dict):
        out: list[Difference] = []
        for key in list(before) + [k for k in after if k not in before]:
            sub = dotted_join(path, key)
            if key not in after:
                out.append(Difference(sub, before[key], None, missing_after=True))
            elif key not in before:
                out.append(Difference(sub, None, after[key], missing_before=True))
            else:
                out += differences(before[key], after[key], sub)
        return out
    if isinstance(before, list) and isinstance(after, list):
        out = []
        for i in range(max(len(before), len(after))):
            sub = dotted_join(path, i)
            if i >= len(after):
                out.append(Difference(sub, before[i], None, missing_after=True))
            elif i >= len(before):
                out.append(Difference(sub, None, after[i], missing_before=True))
            else:
                out += differences(before[i], after[i], sub)
        return out
    if _same_leaf(before, after):
        return []
    return [Difference(path or "(document)", before, after)]


def _same_leaf(a: Any, b: Any) -> bool:
    # bool is an int in Python; true and 1 are different content in a plan or a record
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    if _number(a) and _number(b):
        return a == b  # 2 and 2.0 are the same number
    return type(a) is type(b) and a == b


def _number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def plain_number(x: Any) -> Any:
    """A plain Python number for JSON, at full precision (numpy scalars become bool, int or float;
    non-finite values are handled by `record.sanitize`)."""
    if x is None:
        return None
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    return float(x)
