"""The numbers of the demo records as one digest, to prove that a change of speed changed no number.

A record's fields that say when, by whom, where and how a run happened (times, run id, operator,
command, software versions, executor) are left out; everything else (every estimate, interval,
p-value, count, hash of the data, and the methods text built from them) is serialised canonically
(sorted keys, floats as Python's shortest round-trip repr, so equal text means equal bits) and hashed.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from planrunner.pipeline.check import check_plan
from planrunner.pipeline.run import execute_plan
from planrunner.record.build import RunFacts, build_record

ROOT = Path(__file__).resolve().parents[1]
DEMO_PLANS = sorted(p.name for p in (ROOT / "plans").iterdir() if (p / "plan.yaml").is_file())
NOT_NUMBERS = {"started_utc", "finished_utc", "run_id", "operator", "command", "environment", "execution",
               "record_sha256"}


def demo_record(plan_name: str) -> dict:
    """The record of the demo plan `plans/PLAN_NAME` as a run computes it (no files written)."""
    checked = check_plan(ROOT / "plans" / plan_name / "plan.yaml")
    assert checked.tables is not None and checked.jobs is not None
    results, max_t = execute_plan(checked.loaded.plan, checked.jobs)
    facts = RunFacts(run_id="0" * 16, started_utc="", finished_utc="", operator="", command=(),
                     execution={}, lock=None, parameters=checked.parameters)
    return build_record(checked.loaded, checked.tables, checked.jobs, results, max_t, facts)


def numbers_digest(record: dict) -> str:
    """SHA-256 of the record without its informational fields, canonically serialised."""
    kept = {key: value for key, value in record.items() if key not in NOT_NUMBERS}
    text = json.dumps(kept, sort_keys=True, ensure_ascii=True, allow_nan=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("ascii")).hexdigest()


if __name__ == "__main__":  # prints the digests to store in tests/test_startup.py
    for name in DEMO_PLANS:
        print(f'    "{name}": "{numbers_digest(demo_record(name))}",')
