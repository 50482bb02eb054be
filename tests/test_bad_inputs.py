"""The bad-input corpus, through the command line: every case gets one clear message and exit 2.

Two folders make the corpus:

- `tests/invalid_plans/*.yaml`: a plan whose first line is `# expect: LINE:COL fragment`; the
  message must have a line `PLAN:LINE:COL: ...` holding the fragment.
- `tests/bad_inputs/<case>/`: a plan (`plan.yaml`) with its data files. The plan's first comment
  lines say what must happen:
  `# exit: N` (the exit code), `# expect: FRAGMENT` (one line per fragment; all must appear in
  the message), and optionally `# args: ...` (the command line; `{plan}` and `{case}` are replaced
  by the paths of the copied case; default `check {plan}`), `# memory: BYTES` (the memory the run
  sees as available) and `# designs: KEY` (lets the plan check accept a design key whose engine is
  built elsewhere, so that the data checks for it can be tested).

Each case is copied into a temporary folder first, so a run never writes into the repository.
"""

from __future__ import annotations

import shlex
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from planrunner.cli import main as cli
from planrunner.pipeline import check as checker
from planrunner.plan import load as plancheck

HERE = Path(__file__).resolve().parent
PLANS = sorted((HERE / "invalid_plans").glob("*.yaml"))
FOLDERS = sorted(p for p in (HERE / "bad_inputs").iterdir() if p.is_dir())


@dataclass
class Case:
    source: Path  # a plan file (invalid_plans) or a case folder (bad_inputs)
    exit_code: int = 2
    fragments: list[str] = field(default_factory=list)
    at: str | None = None  # LINE:COL for invalid plans
    args: str = "check {plan}"
    memory: int | None = None
    designs: list[str] = field(default_factory=list)


def read_case(source: Path) -> Case:
    plan = source if source.is_file() else source / "plan.yaml"
    header = [line for line in plan.read_bytes().decode("utf-8", "replace").splitlines() if line.startswith("# ")]
    case = Case(source)
    if source.is_file():
        where, _, fragment = header[0].removeprefix("# expect: ").partition(" ")
        case.at, case.fragments = where, [fragment]
        return case
    for line in header:
        key, _, value = line[2:].partition(": ")
        if key == "exit":
            case.exit_code = int(value)
        elif key == "expect":
            case.fragments.append(value)
        elif key == "args":
            case.args = value
        elif key == "memory":
            case.memory = int(value)
        elif key == "designs":
            case.designs.append(value)
    return case


CASES = [read_case(p) for p in PLANS + FOLDERS]
IDS = [f"{c.source.parent.name}/{c.source.stem if c.source.is_file() else c.source.name}" for c in CASES]


def test_corpus_is_large_enough():
    assert len(CASES) >= 60 and len(FOLDERS) >= 40
    for case in CASES:
        assert case.fragments, f"{case.source} names no expected message"


@pytest.mark.parametrize("case", CASES, ids=IDS)
def test_bad_input_gives_one_clear_message(case: Case, tmp_path: Path, monkeypatch, capsys):
    copy = tmp_path / "case"
    if case.source.is_file():
        copy.mkdir()
        plan = copy / case.source.name
        shutil.copyfile(case.source, plan)
    else:
        shutil.copytree(case.source, copy)
        plan = copy / "plan.yaml"
    if case.memory is not None:
        monkeypatch.setattr(checker, "available_memory", lambda: case.memory)
    for key in case.designs:
        for method in list(plancheck.SUPPORTED_DESIGNS):
            monkeypatch.setitem(plancheck.SUPPORTED_DESIGNS, method, plancheck.SUPPORTED_DESIGNS[method] + (key,))
    argv = [a.format(plan=plan, case=copy) for a in shlex.split(case.args)]
    code = cli.main(argv)
    captured = capsys.readouterr()
    err = captured.err
    assert code == case.exit_code, f"exit {code}:\n{err}"
    assert "Traceback" not in err and "please report" not in err, err
    for fragment in case.fragments:
        assert fragment in err, f"'{fragment}' not in:\n{err}"
    # one message; indented lines continue it (every problem of one data file, listed together)
    messages = [line for line in err.splitlines() if line.strip() and not line.startswith("  ")]
    if case.at is not None:
        matching = [line for line in messages if line.startswith(f"planrunner: {plan}:{case.at}:")
                    or line.startswith(f"{plan}:{case.at}:")]
        assert any(case.fragments[0] in line for line in matching), f"nothing at {case.at}:\n{err}"
    elif "--frobnicate" not in case.args:  # argparse adds its usage line
        assert len(messages) == 1, f"more than one message:\n{err}"
    # nothing was written where a run's files would be expected
    assert not (copy / "runs").exists()
