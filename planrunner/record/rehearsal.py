"""The stamp of a rehearsal: a record made on dummy data, to prove the pipeline, never a result.

`pipeline/rehearse.py` writes the record's `rehearsal` field; every view of a record (reports,
results dataset, index, verify, compare) and every place that needs a real run (signing as executed
or approved, a run's data) asks `is_rehearsal` and says so, or refuses.
"""

from __future__ import annotations

from typing import Any

STAMP = "REHEARSAL — dummy data, not a result"
FIELD = "rehearsal"


def is_rehearsal(record: Any) -> bool:
    """Whether a record (a parsed record.json) is a rehearsal's: it has the field, whatever it holds."""
    return isinstance(record, dict) and record.get(FIELD) is not None


def rehearsal_entry(*, seed: int, units: int, generator: str, rules: str, stream: str,
                    folder: str, files: list[dict[str, Any]]) -> dict[str, Any]:
    """The record's `rehearsal` field: what was dummied and how to make the same files again."""
    return {"stamp": STAMP, "seed": seed, "units": units, "generator": generator, "rules": rules,
            "stream": stream, "folder": folder, "datasets": files}
