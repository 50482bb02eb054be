"""Start-up stays light: the commands that compute nothing load none of the heavy libraries.

`planrunner --version` and `planrunner check --plan-only` run in a fresh interpreter, and the test
reads that interpreter's `sys.modules` after the command: no scipy, pandas, matplotlib, jinja2 or
dask may have been imported (they load only in the stage that uses them). A demo run imports neither
scipy.stats nor pandas. Every demo record's numbers are those main computed before this work (a digest
of each, `record_digest.py`), and compiled templates from jinja2's cache render the same pages.
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
    code, modules = modules_loaded_by(tmp_path, *args)
    return code, {name.split(".")[0] for name in modules}


def modules_loaded_by(tmp_path: Path, *args: str) -> tuple[int, set[str]]:
    """Exit code of `planrunner ARGS` in a fresh interpreter, and every module it imported."""
    out = tmp_path / "modules.json"
    env = {**os.environ, "PLANRUNNER_MODULES_OUT": str(out)}
    done = subprocess.run([sys.executable, "-c", PROBE, *args], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=120)
    assert out.is_file(), done.stderr[-2000:]
    found = json.loads(out.read_text(encoding="utf-8"))
    return found["code"], set(found["modules"])


def test_version_loads_no_heavy_library(tmp_path):
    code, packages = loaded_by(tmp_path, "--version")
    assert code == 0
    assert "planrunner" in packages
    assert not packages & {*HEAVY, "numpy"}, sorted(packages & {*HEAVY, "numpy"})  # nor numpy: a tenth of a second


@pytest.mark.parametrize("plan", sorted(p.name for p in (ROOT / "plans").iterdir() if (p / "plan.yaml").is_file()))
def test_plan_only_check_loads_no_heavy_library(tmp_path, plan):
    code, packages = loaded_by(tmp_path, "check", "--plan-only", str(ROOT / "plans" / plan / "plan.yaml"))
    assert code == 0
    assert {"planrunner", "pydantic", "yaml"} <= packages  # the plan was really read and validated
    assert not packages & set(HEAVY), sorted(packages & set(HEAVY))


def test_building_the_parser_loads_no_numpy(tmp_path):
    # every command builds the whole parser first: it names the rehearsal's default units and the
    # signature meanings without importing the data or signing stages (which load numpy)
    code, packages = loaded_by(tmp_path, "--help")
    assert code == 0
    assert not packages & {*HEAVY, "numpy", "pydantic"}, sorted(packages & {*HEAVY, "numpy", "pydantic"})


EARLY_PROBE = """
import json, os, sys
from planrunner.execute import pool
started = pool.early_workers
seen = []
def early(execution):
    seen.append(sorted(sys.modules))
    return started(execution)
pool.early_workers = early
from planrunner.cli.main import main
code = main(sys.argv[1:])
with open(os.environ["PLANRUNNER_MODULES_OUT"], "w", encoding="utf-8") as out:
    json.dump({"code": code, "first": seen[0], "entered": len(seen)}, out)
"""


def _early_start(tmp_path: Path, *args: str) -> tuple[dict, str]:
    """What `planrunner ARGS` had imported when it first entered `early_workers` (fresh interpreter),
    how often it entered it, its exit code; and its standard output."""
    out = tmp_path / "early.json"
    done = subprocess.run([sys.executable, "-c", EARLY_PROBE, *args, "--executor", "processes", "--workers", "2"],
                          cwd=ROOT, env={**os.environ, "PLANRUNNER_MODULES_OUT": str(out)}, capture_output=True,
                          text=True, timeout=300)
    assert out.is_file(), done.stderr[-2000:]
    return json.loads(out.read_text(encoding="utf-8")), done.stdout


def test_run_rehearse_and_verify_start_their_worker_processes_before_they_load_the_engines(tmp_path):
    # the workers start (a fresh interpreter importing numpy and the engines) while this process
    # imports the pipeline and reads the plan and the data, so they are up when the computing begins
    plan = ROOT / "plans" / "liner-trial" / "plan.yaml"
    run, printed = _early_start(tmp_path, "run", str(plan), "--out", str(tmp_path / "runs"), "--quiet")
    rehearsal, _ = _early_start(tmp_path, "rehearse", str(plan), "--out", str(tmp_path / "rehearsals"), "--quiet")
    verified, _ = _early_start(tmp_path, "verify", printed.strip().splitlines()[-1], "--plan", str(plan))
    for found in (run, rehearsal, verified):
        assert found["code"] == 0
        assert found["entered"] == 2  # the command line's, then the stage's own (which reuses its pool)
        early = {name.split(".")[0] for name in found["first"]} | set(found["first"])
        assert not early & {"numpy", "pydantic", "planrunner.pipeline.run", "planrunner.engines"}


# what only a run needs: computing on workers, the record, the reports, signing; `check` reads the
# plan and the data and builds the jobs, and imports none of them (pipeline/check.py)
RUN_ONLY = ("planrunner.execute.executors", "planrunner.execute.rangework", "planrunner.record.build",
            "planrunner.report", "planrunner.pipeline.run", "multiprocessing", "concurrent.futures")


@pytest.mark.parametrize("plan", sorted(p.name for p in (ROOT / "plans").iterdir() if (p / "plan.yaml").is_file()))
def test_check_with_data_loads_nothing_only_a_run_needs(tmp_path, plan):
    code, modules = modules_loaded_by(tmp_path, "check", str(ROOT / "plans" / plan / "plan.yaml"))
    assert code == 0
    assert {"planrunner.pipeline.check", "planrunner.compile.jobs", "numpy"} <= modules  # data read, jobs built
    loaded = sorted(name for name in modules if name.startswith(RUN_ONLY))
    assert loaded == [], loaded
    assert not {name.split(".")[0] for name in modules} & set(HEAVY)


def test_the_probe_sees_the_libraries_a_run_needs_and_no_more(tmp_path):
    # the same probe on a run, which writes reports, must see jinja2 and the SVG writer: else the tests
    # above would prove nothing
    plan = ROOT / "plans" / "liner-trial" / "plan.yaml"
    code, modules = modules_loaded_by(tmp_path, "run", str(plan), "--out", str(tmp_path / "out"), "--quiet")
    assert code == 0
    assert {"jinja2", "planrunner.report.canvas", "numpy", "scipy.special"} <= modules
    # the pictures are planrunner's own SVG (report/canvas.py): a run draws four and imports no plotting library
    assert not {name for name in modules if name.split(".")[0] == "matplotlib"}
    # ... and a demo run needs neither scipy.stats (our mid-ranks, scipy.special's beta quantiles) nor
    # pandas (plain decimals and dates read without it)
    assert "scipy.stats" not in modules
    assert not {name for name in modules if name.split(".")[0] == "pandas"}
    # nor pyarrow: results.parquet comes from planrunner's own writer (data/parquet.py)
    assert not {name for name in modules if name.split(".")[0] == "pyarrow"}


# The numbers of the demo records (tests/record_digest.py), computed on main before the import diet
# and the pictures' rewrite: start-up work must change no number. A change that means to change a
# demo's numbers (a new method, a fixed bug) updates its digest here and says so in its commit.
DEMO_DIGESTS = {
    "liner-trial": "9095362a01560c97c46891e18929c8172881d8c98a6565c13fc203ec0870bf44",
    "monthly-fill": "b921438c8502f081895ee35b083ce717d212865cfa6efc4b041e4eb1b5a2c80f",
    "orchard-irrigation": "1b06df03ac88daac4fd08d9d92e78bd56c2c5049521db9c1289c82444d6fcea3",
    "seal-endurance": "c4f7bf6d7563a7e088106d3688fd7013068233208e3c50558354e712b4a9870c",
    "ward-hygiene": "090737b21a180537084ef529bef37f492c774623d5baf22e78180b07386a396c",
}


@pytest.mark.parametrize("plan", sorted(DEMO_DIGESTS))
def test_demo_record_numbers_are_unchanged(plan):
    from record_digest import demo_record, numbers_digest

    assert numbers_digest(demo_record(plan)) == DEMO_DIGESTS[plan]


def test_compiled_templates_from_the_cache_render_the_same_pages(tmp_path):
    from record_digest import demo_record

    from planrunner.report import render

    record = demo_record("liner-trial")
    pages = {}
    for attempt in ("compiled", "from the cache", "without a cache"):
        compiled = render._compiled_templates(str(tmp_path)) if attempt != "without a cache" else None
        for kind, name in (("html", "report.html.j2"), ("md", "report.md.j2")):
            template = render.new_environment(kind, compiled).get_template(name)
            pages[attempt, kind] = template.render(**render._context(record))
        if attempt == "compiled":
            assert len(list(tmp_path.glob("planrunner-*.cache"))) >= 2  # written for the next process
    for kind in ("html", "md"):
        assert pages["compiled", kind] == pages["from the cache", kind] == pages["without a cache", kind]
    # a folder that cannot be written to costs the cache, never the report
    (tmp_path / "ro").mkdir(mode=0o500)
    template = render.new_environment("md", render._compiled_templates(str(tmp_path / "ro"))).get_template(
        "report.md.j2")
    assert template.render(**render._context(record)) == pages["compiled", "md"]
