"""Start-up stays light: the commands that compute nothing load none of the heavy libraries.

`planrunner --version` and `planrunner check --plan-only` run in a fresh interpreter, and the test
reads that interpreter's `sys.modules` after the command: no scipy, pandas, matplotlib, jinja2 or
dask may have been imported (they load only in the stage that uses them).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
HEAVY = ("scipy", "pandas", "matplotlib", "jinja2", "dask", "distributed")
PROBE = """
import json, os, sys
from planrunner.cli.main import main
try:
    code = main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
with open(os.environ["PLANRUNNER_MODULES_OUT"], "w", encoding="utf-8") as out:
    json.dump({"code": code, "modules": sorted(sys.modules)}, out)
"""


def loaded_by(tmp_path: Path, *args: str) -> tuple[int, set[str]]:
    """Exit code of `planrunner ARGS` in a fresh interpreter, and the top-level packages it imported."""
    out = tmp_path / "modules.json"
    env = {**os.environ, "PLANRUNNER_MODULES_OUT": str(out)}
    done = subprocess.run([sys.executable, "-c", PROBE, *args], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=120)
    assert out.is_file(), done.stderr[-2000:]
    found = json.loads(out.read_text(encoding="utf-8"))
    return found["code"], {name.split(".")[0] for name in found["modules"]}


def test_version_loads_no_heavy_library(tmp_path):
    code, packages = loaded_by(tmp_path, "--version")
    assert code == 0
    assert "planrunner" in packages
    assert not packages & set(HEAVY), sorted(packages & set(HEAVY))


@pytest.mark.parametrize("plan", sorted(p.name for p in (ROOT / "plans").iterdir() if (p / "plan.yaml").is_file()))
def test_plan_only_check_loads_no_heavy_library(tmp_path, plan):
    code, packages = loaded_by(tmp_path, "check", "--plan-only", str(ROOT / "plans" / plan / "plan.yaml"))
    assert code == 0
    assert {"planrunner", "pydantic", "yaml"} <= packages  # the plan was really read and validated
    assert not packages & set(HEAVY), sorted(packages & set(HEAVY))


def test_the_probe_sees_the_libraries_a_run_needs(tmp_path):
    # the same probe on a run, which writes reports, must see jinja2 and matplotlib: else the tests above
    # would prove nothing
    plan = ROOT / "plans" / "liner-trial" / "plan.yaml"
    code, packages = loaded_by(tmp_path, "run", str(plan), "--out", str(tmp_path / "out"), "--quiet")
    assert code == 0
    assert {"jinja2", "matplotlib", "numpy"} <= packages


# The numbers of the demo records (tests/record_digest.py), computed on main before the import diet
# and the pictures' rewrite: start-up work must change no number. A change that means to change a
# demo's numbers (a new method, a fixed bug) updates its digest here and says so in its commit.
DEMO_DIGESTS = {
    "liner-trial": "3e2c3364bdb18d0711873da7559ff40fb48876fa94ac19d5ff63203a6ee826a1",
    "monthly-fill": "bcbd1d77264f264e966f7ee0714dba0704008da94a790353dbbe1cd97ae0c32a",
    "orchard-irrigation": "1b06df03ac88daac4fd08d9d92e78bd56c2c5049521db9c1289c82444d6fcea3",
    "seal-endurance": "af03d378adc6fd3ec48ecbd1d1b88fa3934272791ed49ca482607206617e164b",
    "ward-hygiene": "090737b21a180537084ef529bef37f492c774623d5baf22e78180b07386a396c",
}


@pytest.mark.parametrize("plan", sorted(DEMO_DIGESTS))
def test_demo_record_numbers_are_unchanged(plan):
    from record_digest import demo_record, numbers_digest

    assert numbers_digest(demo_record(plan)) == DEMO_DIGESTS[plan]
