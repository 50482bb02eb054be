"""`planrunner rehearse`: the whole plan, end to end, on dummy data made from its declarations.

A rehearsal proves that the plan runs (tables → checks → jobs → engines → record → reports,
figures and results files) before the real data exist or are unblinded. The dummy files come from
`data/dummy.py` (never from the real data files, which are not even opened), are read through the
same reader as real data, and are kept in the rehearsal folder (`dummy-data/`) beside a note. The
record carries a `rehearsal` field (seed, sizes, rules, every file's hash), every report page
carries the stamp, and the folder goes under `rehearsals/` beside the plan, never into `runs/` and
never into a run history log. `verify` makes the dummy files again from the recorded seed and sizes
and re-runs them (`dummy_root`); nothing accepts a rehearsal where a real run is expected.
"""

from __future__ import annotations

import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from planrunner.data.dummy import DEFAULT_UNITS, GENERATOR_ID, MARKER, RULES, DummyFile, dummy_data
from planrunner.errors import OutputError, PlanError
from planrunner.execute.executors import Progress
from planrunner.execute.pool import Execution, early_workers
from planrunner.pipeline.check import check_plan, load_plan
from planrunner.pipeline.run import (
    Clock,
    RunOutcome,
    default_operator,
    execute_plan,
    new_run_id,
    utc_now,
    utc_stamp,
    write_run,
)
from planrunner.plan.load import LoadedPlan
from planrunner.record.build import RunFacts, build_record
from planrunner.record.rehearsal import STAMP, rehearsal_entry
from planrunner.trail.files import lock_for_run
from planrunner.trail.history import HISTORY_FILE
from planrunner.trail.names import require_person_name

REHEARSALS = "rehearsals"  # the default output folder, beside the plan
DUMMY_FOLDER = "dummy-data"  # in a rehearsal folder: the dummy files, under the plan's own paths
STREAM = ("numpy SeedSequence(entropy=rehearsal seed, spawn_key=(K, r)) with K the first 8 bytes of "
          "SHA-256('rehearsal/DATASET/COLUMN') read as a big-endian integer and r the draw round (0 first, "
          "then one per redraw); one PCG64 generator per round")
MARKER_TEXT = (f"{STAMP}.\nThese files were made by 'planrunner rehearse' from the plan's declared columns "
               "alone, to prove the pipeline before the real data are used. They are not data of anything: "
               "never analyse, lock or archive them as data.\n")


def rehearsal_root(loaded: LoadedPlan, out: str | Path | None) -> Path:
    """The folder that receives the rehearsal folder: rehearsals/ beside the plan, or ``out``;
    never the runs/ folder beside the plan, nor a folder that holds a run history log."""
    root = Path(out) if out is not None else loaded.folder / REHEARSALS
    runs = loaded.folder / "runs"
    if (root / HISTORY_FILE).exists() or (root.exists() and runs.exists() and root.resolve() == runs.resolve()) \
            or root.absolute() == runs.absolute():
        raise OutputError("a rehearsal is never written among real runs: this folder holds (or is) the run "
                          "history of the plan", where=str(root),
                          hint=f"leave out --out (the rehearsal goes to {REHEARSALS}/ beside the plan) or name "
                               "a folder of its own")
    return root


def regenerated(loaded: LoadedPlan, seed: int, units: int) -> tuple[list[DummyFile], dict]:
    """The dummy files of the plan and the record's `rehearsal` field that describes them."""
    files = dummy_data(loaded, seed=seed, units=units)
    entry = rehearsal_entry(seed=seed, units=units, generator=GENERATOR_ID, rules=RULES, stream=STREAM,
                            folder=DUMMY_FOLDER, files=[f.entry() for f in files])
    return files, entry


@contextmanager
def dummy_root(files: list[DummyFile]) -> Iterator[Path]:
    """A temporary data root holding the dummy files under the plan's own relative paths (read from
    there with `--data-root` semantics, so the plan's real data files are never opened)."""
    with tempfile.TemporaryDirectory(prefix="planrunner-rehearsal-") as tmp:
        root = Path(tmp).resolve()
        for f in files:
            target = (root / f.file).resolve()
            if not target.is_relative_to(root):
                raise PlanError(f"dataset '{f.name}': its file '{f.file}' leaves the plan's folder", where=f.file)
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(f.data)
        yield root


def rehearse_plan(path: str | Path, *, out: str | Path | None = None, seed: int | None = None,
                  units: int = DEFAULT_UNITS, params: dict[str, str] | None = None, operator: str | None = None,
                  command: list[str] | None = None, clock: Clock | None = None,
                  execution: Execution | None = None, progress: Progress | None = None) -> RunOutcome:
    """Make dummy data for every dataset, run the whole plan on them and write a rehearsal folder
    (record, reports, figures, results files, the dummy files); no history entry, no signature."""
    clock = clock or utc_now
    started = clock()
    operator = require_person_name(operator, "--operator") if operator is not None else default_operator()
    loaded, _ = load_plan(path, params)
    out_root = rehearsal_root(loaded, out)
    seed = loaded.plan.seed if seed is None else seed
    execution = execution or Execution()
    with early_workers(execution):  # worker processes start while the dummy data are made and checked
        files, entry = regenerated(loaded, seed, units)
        with dummy_root(files) as root:
            checked = check_plan(path, params=params, data_root=root)
            loaded, tables, jobs = checked.loaded, checked.tables, checked.jobs
            assert tables is not None and jobs is not None
            # the lock's identity and any deviation of the plan; the dummy files are no data deviation
            lock_entry = lock_for_run(loaded, {}, None, refuse_deviations=False)
            results, max_t = execute_plan(loaded.plan, jobs, execution=execution, progress=progress)
    finished = clock()
    run_id = new_run_id(loaded, tables, started)
    facts = RunFacts(run_id=run_id, started_utc=utc_stamp(started), finished_utc=utc_stamp(finished), operator=operator,
                     command=tuple(command or ["planrunner", "rehearse", str(path)]),
                     execution=execution.describe(), lock=lock_entry,
                     parameters=checked.parameters, rehearsal=entry)
    record = build_record(loaded, tables, jobs, results, max_t, facts)
    kept: dict[str, str | bytes] = {f"{DUMMY_FOLDER}/{MARKER}": MARKER_TEXT}
    kept.update({f"{DUMMY_FOLDER}/{f.file}": f.data for f in files})
    name = f"{loaded.plan.plan}-rehearsal-{started.strftime('%Y%m%dT%H%M%SZ')}-{run_id[:8]}"
    return write_run(out_root, name, record, kept, history=False)
